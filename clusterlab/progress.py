"""Progress bars for long studies: a widget in Jupyter, text in a terminal.

Built on :mod:`tqdm.auto`, which picks the notebook widget bar when running
in a Jupyter kernel with ipywidgets and the plain text bar otherwise.  The
bar shows done/total, elapsed time and an estimate of the time left.
"""

from __future__ import annotations

import os
import sys
from typing import Any

__all__ = ["progress_bar", "progress_wanted"]

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
