"""Progress bars for long studies: a widget in Jupyter, text in a terminal.

Built on :mod:`tqdm.auto`, which picks the notebook widget bar when running
in a Jupyter kernel with ipywidgets and the plain text bar otherwise.  The
bar shows done/total, elapsed time and an estimate of the time left.
"""

from __future__ import annotations

import os
import sys
import time
from typing import Any, Callable

__all__ = ["StepLog", "format_duration", "progress_bar", "progress_wanted"]

_TRUE = {"1", "true", "yes", "on"}


def progress_wanted(enabled: bool = True, stream: Any = None) -> bool:
    """Whether a bar should be drawn.

    False when ``enabled`` is False, and when output is not a terminal while
    ``CI`` is set to a true value (``CI=true`` in most CI services), so logs
    of batch jobs stay clean.  In a Jupyter kernel (not a TTY but no CI) the
    bar is drawn.
    """
    if not enabled:
        return False
    stream = sys.stderr if stream is None else stream
    try:
        tty = bool(stream.isatty())
    except (AttributeError, ValueError):
        tty = False
    ci = os.environ.get("CI", "").strip().lower() in _TRUE
    return tty or not ci


def progress_bar(total: int | None, desc: str = "", enabled: bool = True, *,
                 initial: int = 0, unit: str = "cluster", leave: bool = True):
    """A tqdm progress bar (widget in Jupyter, text in a terminal).

    Parameters
    ----------
    total : int or None
        Number of items (tasks); None for an open-ended bar.
    desc : str
        Label in front of the bar.
    enabled : bool
        False gives a silent bar with the same methods (``update``,
        ``set_postfix``, ``close``), so callers need no branches.
    initial : int
        Items already done (e.g. results already in the store).
    unit : str
        Name of one item.
    leave : bool
        Keep the finished bar on screen.

    Returns
    -------
    tqdm.tqdm
        Use as ``bar.update(1)`` and ``bar.close()`` or as a context manager.

    Examples
    --------
    >>> with progress_bar(3, "demo", enabled=False) as bar:
    ...     for _ in range(3):
    ...         _ = bar.update(1)
    >>> bar.disable
    True
    """
    from tqdm.auto import tqdm

    return tqdm(
        total=total, desc=desc, initial=initial, unit=unit, leave=leave,
        disable=not progress_wanted(enabled), dynamic_ncols=True, smoothing=0.1,
        file=sys.stderr,
    )


def format_duration(seconds: float) -> str:
    """``"8 s"``, ``"2 min 05 s"``, ``"1 h 03 min"``."""
    s = max(0.0, float(seconds))
    if s < 60:
        return f"{s:.0f} s"
    if s < 3600:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


class StepLog:
    """Narration of a long job: one line per step, with the elapsed time and
    an estimate of the time left, for a panel's status line, the command
    line and a report's log alike.

    Parameters
    ----------
    total : int
        Items the job will compute (not counting those already done).
    on_line : callable(str), optional
        Gets each line as it is written (a panel's status, ``print``).
    clock : callable, default time.monotonic
        Seconds (tests pass a fake clock).

    Attributes
    ----------
    lines : list of str
        Every line so far.
    done : int
        Items finished. The time left is the mean time per finished item
        times the items left.

    Examples
    --------
    >>> t = iter([0.0, 0.0, 10.0])
    >>> log = StepLog(2, clock=lambda: next(t))
    >>> log.say("radius 5 Å with the vacuum reference")
    'radius 5 Å with the vacuum reference (elapsed 0 s)'
    >>> log.finished("radius 5 Å: 12 molecules, 36 charges")
    'radius 5 Å: 12 molecules, 36 charges (1 of 2; elapsed 10 s, about 10 s left)'
    """

    def __init__(self, total: int, on_line: Callable[[str], Any] | None = None, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.total = int(total)
        self.done = 0
        self.lines: list[str] = []
        self._on_line = on_line
        self._clock = clock
        self._t0 = clock()

    @property
    def elapsed_s(self) -> float:
        return self._clock() - self._t0

    def _emit(self, line: str) -> str:
        self.lines.append(line)
        if self._on_line is not None:
            self._on_line(line)
        return line

    def say(self, text: str) -> str:
        """A step that starts (no item finished): the text and the elapsed time."""
        return self._emit(f"{text} (elapsed {format_duration(self.elapsed_s)})")

    def finished(self, text: str) -> str:
        """An item finished: the text, the count, the elapsed time and the time left."""
        self.done += 1
        elapsed = self.elapsed_s
        left = elapsed / self.done * max(self.total - self.done, 0)
        tail = "" if self.done >= self.total else f", about {format_duration(left)} left"
        return self._emit(f"{text} ({self.done} of {self.total}; elapsed {format_duration(elapsed)}{tail})")
