"""Background-job plumbing shared by the panels: one worker thread, a
cancel event, wait/cancel/running. The panels supply ``_work`` and the
status line; no science here."""

from __future__ import annotations

import html
import threading
import traceback
from typing import Any

from ..errors import InputError
from ._style import OK, WARN


def count_text(n: int, one: str, many: str) -> str:
    """``"1 radius"``, ``"3 radii"``."""
    return f"{n} {one if n == 1 else many}"


class BackgroundJob:
    """Mixin: ``_start(target, args, name)`` runs ``target(*args)`` in a daemon
    thread; ``wait``, ``cancel``, ``running`` and ``cancel_event`` follow it.

    The class using it sets ``self.exception`` (the job's error, or None) in
    its ``_work`` and provides ``run()``, an ``errors`` Output widget, a
    ``progress`` bar, a ``status`` HTML widget and ``_cancel_message``;
    ``_fail(exc)`` shows a failure (a cancel is never one: the panels check
    ``cancel_event`` first).
    """

    _cancel_message = "cancelling…"
    exception: BaseException | None
    _thread: threading.Thread | None
    _cancel: threading.Event

    def _init_job(self) -> None:
        self.exception = None
        self._thread = None
        self._cancel = threading.Event()

    def _start(self, target: Any, args: tuple, name: str) -> None:
        self.exception = None
        self._cancel = threading.Event()
        self._thread = threading.Thread(target=target, args=args, daemon=True, name=name)
        self._thread.start()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    @property
    def cancel_event(self) -> threading.Event:
        return self._cancel

    def wait(self, timeout: float | None = None, *, raise_error: bool = False) -> bool:
        """Block until the job ends (or ``timeout`` seconds pass).

        Returns True when it has ended. With ``raise_error`` the job's
        exception (also shown in the error box) is raised here, for scripts
        and notebooks that must stop on a failure.
        """
        if self._thread is not None:
            self._thread.join(timeout)
        if raise_error and self.exception is not None:
            raise self.exception
        return not self.running

    def _on_run_click(self, _b: Any) -> None:
        self._shown(self.run)  # type: ignore[attr-defined]

    def _on_cancel_click(self, _b: Any) -> None:
        self._shown(self.cancel)

    def _shown(self, action: Any) -> None:
        """Run a button's ``action``; a failure is shown by :meth:`_fail` (one
        line for an input problem) instead of a traceback under the cell."""
        try:
            action()
        except Exception as exc:  # noqa: BLE001 - shown to the user
            self._fail(exc)

    def _set_status(self, text: str, kind: str) -> None:
        """The status line (``text`` is HTML); ``kind`` one of ok, warn, error, info."""
        colour = {"ok": OK, "warn": WARN, "error": "#a00", "info": "#335"}.get(kind, "#555")
        self.status.value = f'<span class="clusterlab-status" style="color:{colour}">{text}</span>'  # type: ignore[attr-defined]

    def _fail(self, exc: BaseException) -> None:
        """Record ``exc`` and show it: a one-line status for an input problem (a setting to fix), the
        status plus the traceback in the error box for anything else."""
        self.exception = exc
        self.error = f"{type(exc).__name__}: {exc}"
        self.progress.bar_style = "danger"  # type: ignore[attr-defined]
        if isinstance(exc, InputError):
            self._set_status(f"check the settings: {html.escape(str(exc))}", "error")  # type: ignore[attr-defined]
            return
        text = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        self.errors.append_stderr(text)  # type: ignore[attr-defined]
        self._set_status(f"failed: {html.escape(self.error)}", "error")  # type: ignore[attr-defined]

    def cancel(self) -> None:
        """Ask the running job to stop (finished results stay in the store)."""
        self._cancel.set()
        if self.running:
            self._set_status(self._cancel_message, "warn")  # type: ignore[attr-defined]
