"""One grammar for molecule ids, frames and radii written as text.

Widgets, the command line and study files all read "which molecules",
"which frames" and "which radii" through this module, so ``"5-12"`` means
the same everywhere: **both ends included**, as a person reads it.

Grammar
-------
A text is a list of items separated by commas (or spaces); spaces inside an
item are not allowed.

ids and frames (integers)
    ``all``                 every molecule / every frame (the whole text)
    ``3``                   one value
    ``0-10``                0, 1, ..., 10 (the end is included)
    ``0-10:2``              0, 2, ..., 10 (a step after the colon)
    ``1,4,9-12``            a list of items
    ``-1``, ``-3--1``       frames only: negative values count from the end
                            (``-1`` is the last frame); ``3--1`` runs from
                            frame 3 to the last one
radii (Å, positive numbers)
    ``5,8,12``              a list (returned in ascending order)
    ``5-12:1``, ``6-15:3``  start-end:step; the end is included when it lies
                            on the step grid (within 1e-9 of a step), and a
                            radius range always needs its step

species (molecule selections only)
    ``species:GST``         every molecule of species GST (the prefix is
                            case-insensitive, names are not)
    ``species:HST,GST``     several species; spaces after commas are allowed

Every function also takes values that are already parsed (an int, a list or
an array of them, ``None`` for all; for frames also a Python ``slice``, which
keeps Python's own rules), so a caller can pass either.

A value given twice is dropped after its first appearance, with a
:class:`RepeatedValueWarning` (a repeated frame or site would count twice
in the statistics). Ids and frames keep the order they were given in.

Bad input raises :class:`~clusterlab.errors.InputError` naming the bad item,
the valid range and the grammar.

Examples
--------
>>> parse_ids("1,4,9-12", 20).tolist()
[1, 4, 9, 10, 11, 12]
>>> parse_ids("0-10:5", 20).tolist()
[0, 5, 10]
>>> parse_frames("0-19:5", 20)
[0, 5, 10, 15]
>>> parse_frames("-3--1", 20)
[17, 18, 19]
>>> parse_frames("all", 3)
[0, 1, 2]
>>> parse_frames([0, -1], 10)
[0, 9]
>>> parse_radii("6-15:3")
[6.0, 9.0, 12.0, 15.0]
>>> parse_radii("0.1-0.3:0.1")
[0.1, 0.2, 0.3]
>>> parse_radii("12, 6 9")
[6.0, 9.0, 12.0]
>>> parse_species("species:HST, GST")
['HST', 'GST']
>>> parse_frames("5-12", 10)
Traceback (most recent call last):
...
clusterlab.errors.InputError: frames '5-12' are not valid: frame 12 in '5-12' is out of range; the film has frames 0..9 (-10..-1 counted from the end). Frames are written 'all', '3', '0-10' (both ends included), '0-10:2' (a step), lists '1,4,9-12', and negative frames count from the end ('-1' is the last).
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Iterable
from typing import Any

import numpy as np
import numpy.typing as npt

from .errors import InputError

__all__ = ["parse_ids", "parse_frames", "parse_radii", "parse_species", "is_id_text", "RepeatedValueWarning",
           "ID_GRAMMAR", "FRAME_GRAMMAR", "RADIUS_GRAMMAR", "SPECIES_GRAMMAR", "SPECIES_PREFIX"]

#: how the grammar is explained in error messages
ID_GRAMMAR = ("Molecule ids are written 'all', '3', '0-10' (both ends included), '0-10:2' (a step) "
              "or lists '1,4,9-12'.")
FRAME_GRAMMAR = ("Frames are written 'all', '3', '0-10' (both ends included), '0-10:2' (a step), "
                 "lists '1,4,9-12', and negative frames count from the end ('-1' is the last).")
RADIUS_GRAMMAR = ("Radii (Å) are written as positive numbers '5,8,12' or ranges start-end:step such as "
                  "'5-12:1' (the end included when it lies on the step grid).")

SPECIES_GRAMMAR = ("Molecules of given species are written 'species:GST' or 'species:HST,GST' "
                   "(species names as in the film's molecules table).")

#: the prefix of a species selection
SPECIES_PREFIX = "species:"

#: radii are compared and rounded to this many decimals (1e-6 Å, the precision of the store keys)
RADIUS_DECIMALS = 6

_INT_ITEM = re.compile(r"(?P<start>-?\d+)(?:-(?P<stop>-?\d+)(?::(?P<step>\d+))?)?")
_NUM = r"-?(?:\d+(?:\.\d*)?|\.\d+)"
_RADIUS_ITEM = re.compile(rf"(?P<start>{_NUM})(?:-(?P<stop>{_NUM})(?::(?P<step>{_NUM}))?)?")
_SLICE_LIKE = re.compile(r"-?[\d.]*:-?[\d.]*(?::[\d.]*)?")
_ID_TEXT = re.compile(r"\s*(?:all|[\d\s,:\-]*\d[\d\s,:\-]*)\s*", re.IGNORECASE)


class RepeatedValueWarning(UserWarning):
    """Warned when a list of ids, frames or radii names a value twice (the
    repeat is dropped)."""


def _items(text: str) -> list[str]:
    return [t for t in re.split(r"[,\s]+", text.strip()) if t]


def _dedupe(values: list, what: str, text: Any, stacklevel: int) -> list:
    seen: set = set()
    out, repeated = [], []
    for v in values:
        if v in seen:
            if v not in repeated:
                repeated.append(v)
            continue
        seen.add(v)
        out.append(v)
    if repeated:
        shown = ", ".join(f"{v:g}" if isinstance(v, float) else str(v) for v in repeated[:10])
        warnings.warn(f"{what} {text!r} name {shown} more than once; each is used once.",
                      RepeatedValueWarning, stacklevel=stacklevel + 1)
    return out


def _is_int(v: Any) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))


class _IntGrammar:
    """Shared reader of the integer grammar (ids and frames)."""

    def __init__(self, what: str, singular: str, grammar: str, *, negative: bool) -> None:
        self.what, self.singular, self.grammar, self.negative = what, singular, grammar, negative

    def fail(self, value: Any, reason: str, n: int | None = None) -> InputError:
        return InputError(f"{self.what} {value!r} are not valid: {reason}{self.valid(n)}. {self.grammar}")

    def valid(self, n: int | None) -> str:
        if n is None:
            return ""
        if n == 0:
            return f"; there are no {self.what}"
        if self.negative:
            return f"; the film has {self.what} 0..{n - 1} (-{n}..-1 counted from the end)"
        return f"; valid {self.what} are 0..{n - 1}"

    def resolve(self, v: int, n: int | None, value: Any, where: str) -> int:
        """``v`` checked against ``0..n-1`` (negative counted from the end
        where allowed); ``n=None`` leaves it as it is."""
        if v < 0 and not self.negative:
            raise self.fail(value, f"{self.singular} {v}{where} is negative; {self.what} count from 0", n)
        if n is None:
            return v
        r = v + n if v < 0 else v
        if not 0 <= r < n:
            raise self.fail(value, f"{self.singular} {v}{where} is out of range", n)
        return r

    def parse(self, value: Any, n: int | None) -> list[int]:
        if n is not None and (not _is_int(n) or n < 0):
            raise InputError(f"the number of {self.what} must be a non-negative integer; got {n!r}.")
        if value is None or (isinstance(value, str) and value.strip().lower() == "all"):
            if n is None:
                raise self.fail(value, f"'all' needs the number of {self.what}, which is not known here")
            return list(range(n))
        if isinstance(value, str):
            out = self._parse_text(value, n)
        elif _is_int(value):
            out = [self.resolve(int(value), n, value, "")]
        elif isinstance(value, Iterable) and not isinstance(value, (bytes, dict)):
            out = []
            for v in value:
                if not _is_int(v):
                    raise self.fail(value, f"{v!r} is not an integer {self.singular}", n)
                out.append(self.resolve(int(v), n, value, ""))
        else:
            raise self.fail(value, f"give a text, an integer or a list of integers, not "
                                   f"{type(value).__name__}", n)
        if not out:
            raise self.fail(value, f"no {self.what} given", n)
        return _dedupe(out, self.what, value, 3)  # warn at the caller of parse_ids/parse_frames

    def _parse_text(self, text: str, n: int | None) -> list[int]:
        out: list[int] = []
        for item in _items(text):
            m = _INT_ITEM.fullmatch(item)
            if m is None:
                hint = ""
                if _SLICE_LIKE.fullmatch(item):
                    hint = " (a range is start-end:step with both ends included, e.g. '0-19:5')"
                raise self.fail(text, f"{item!r} is not a {self.singular}, a range or 'all'{hint}", n)
            where = f" in {item!r}" if item != m.group("start") else ""
            start = int(m.group("start"))
            if m.group("stop") is None:
                out.append(self.resolve(start, n, text, where))
                continue
            stop = int(m.group("stop"))
            step = int(m.group("step") or 1)
            if step < 1:
                raise self.fail(text, f"the step of {item!r} must be at least 1", n)
            if n is None and (start < 0) != (stop < 0):
                raise self.fail(text, f"{item!r} runs from a negative to a non-negative {self.singular}, "
                                      f"which needs the number of {self.what}; write both ends with the "
                                      "same sign")
            a, b = self.resolve(start, n, text, where), self.resolve(stop, n, text, where)
            if a > b:
                raise self.fail(text, f"{item!r} starts after it ends", n)
            out.extend(range(a, b + 1, step))
        return out


_IDS = _IntGrammar("molecule ids", "molecule id", ID_GRAMMAR, negative=False)
_FRAMES = _IntGrammar("frames", "frame", FRAME_GRAMMAR, negative=True)


def parse_ids(value: Any, n_molecules: int | None) -> npt.NDArray[np.int64]:
    """Molecule ids from text in the id grammar, or from ids already parsed.

    Parameters
    ----------
    value : str, int, sequence of int, array of int or None
        ``"all"``, ``"3"``, ``"0-10"``, ``"0-10:2"``, ``"1,4,9-12"``; an id;
        a list or array of ids; None for all.
    n_molecules : int or None
        Number of molecules: ids must lie in ``0..n_molecules-1``. None when
        it is not known yet (study files): the text is checked and expanded,
        but not bounded, and ``"all"`` is refused.

    Returns
    -------
    numpy.ndarray of int64, shape (n,)
        Ids in the order given, each once.

    Raises
    ------
    clusterlab.errors.InputError
        A bad item, a negative or out-of-range id, or nothing given.

    Warns
    -----
    RepeatedValueWarning
        An id given twice (used once).
    """
    return np.asarray(_IDS.parse(value, n_molecules), dtype=np.int64)


def parse_frames(value: Any, n_frames: int | None) -> list[int]:
    """Frame indices from text in the frame grammar, or from frames already parsed.

    Parameters
    ----------
    value : str, int, sequence of int, slice or None
        ``"all"``, ``"3"``, ``"0-10"``, ``"0-10:2"``, ``"1,4,9-12"``,
        ``"-1"`` (the last frame); a frame; a list of frames (negative ones
        count from the end); a Python ``slice`` (Python's rules, the stop
        left out); None for all.
    n_frames : int or None
        Number of frames. None when it is not known yet (study files):
        negative frames are kept negative (``Film.check_frame`` counts them
        from the end later), a range must not mix signs and ``"all"`` is
        refused.

    Returns
    -------
    list of int
        Frames in the order given, each once; non-negative when ``n_frames``
        is known.

    Raises
    ------
    clusterlab.errors.InputError
        A bad item, a frame out of range, or nothing given.

    Warns
    -----
    RepeatedValueWarning
        A frame given twice (used once: it would count twice in statistics).
    """
    if isinstance(value, slice):
        if n_frames is None:
            raise _FRAMES.fail(value, "a slice needs the number of frames, which is not known here")
        value = list(range(int(n_frames)))[value]
    return _FRAMES.parse(value, n_frames)


def parse_radii(value: Any) -> list[float]:
    """Cut radii (Å) from text in the radius grammar, or from numbers already parsed.

    Parameters
    ----------
    value : str, float or sequence of float
        ``"5,8,12"``, ``"5-12:1"`` (the end included when on the step grid);
        a radius; a list of radii.

    Returns
    -------
    list of float
        Ascending, each once (compared to 1e-6 Å).

    Raises
    ------
    clusterlab.errors.InputError
        A bad item, a radius that is not a positive finite number, a range
        without a step, or nothing given.

    Warns
    -----
    RepeatedValueWarning
        A radius given twice (used once).
    """
    def fail(reason: str) -> InputError:
        return InputError(f"radii {value!r} are not valid: {reason}. {RADIUS_GRAMMAR}")

    radii: list[float] = []
    if isinstance(value, str):
        for item in _items(value):
            m = _RADIUS_ITEM.fullmatch(item)
            if m is None:
                hint = " (write a range as start-end:step, e.g. '6-15:3')" if _SLICE_LIKE.fullmatch(item) else ""
                raise fail(f"{item!r} is not a number or a range start-end:step{hint}")
            start = float(m.group("start"))
            if m.group("stop") is None:
                radii.append(start)
                continue
            if m.group("step") is None:
                raise fail(f"the range {item!r} needs a step, e.g. '{item}:1'")
            stop, step = float(m.group("stop")), float(m.group("step"))
            if not step > 0:
                raise fail(f"the step of {item!r} must be positive")
            if start > stop:
                raise fail(f"{item!r} starts after it ends")
            # the end is on the grid when (stop - start) / step is an integer within rounding
            n = math.floor((stop - start) / step + 1e-9) + 1
            radii.extend(start + i * step for i in range(n))
    elif isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_)):
        radii = [float(value)]
    elif isinstance(value, Iterable) and not isinstance(value, (bytes, dict)):
        for r in value:
            if isinstance(r, (bool, np.bool_)) or not isinstance(r, (int, float, np.integer, np.floating)):
                raise fail(f"{r!r} is not a number")
            radii.append(float(r))
    else:
        raise fail(f"give a text, a number or a list of numbers, not {type(value).__name__}")
    if not radii:
        raise fail("no radii given")
    bad = [r for r in radii if not (math.isfinite(r) and r > 0)]
    if bad:
        raise fail(f"{bad[0]:g} is not allowed; radii must be positive numbers of Å")
    rounded = [round(r, RADIUS_DECIMALS) for r in radii]
    return sorted(_dedupe(rounded, "radii", value, 2))


def is_id_text(text: str) -> bool:
    """Whether ``text`` is written in the id grammar (digits, ``,``, ``-``,
    ``:``, spaces, or ``all``) rather than being, say, an MDAnalysis
    selection such as ``"resname WAT"``.

    >>> is_id_text("3-9, 12"), is_id_text("all"), is_id_text("resname WAT")
    (True, True, False)
    """
    return bool(_ID_TEXT.fullmatch(str(text)))


def parse_species(text: Any) -> list[str] | None:
    """The species names of a species selection ``"species:GST"`` or
    ``"species:HST,GST"``; None when ``text`` is not one (ids, ``all`` or an
    MDAnalysis selection). Whether the film has these species is checked by
    :meth:`clusterlab.Film.check_species`.

    Raises
    ------
    clusterlab.errors.InputError
        The prefix without a name, or an empty name between commas.

    >>> parse_species("species:GST"), parse_species("resname GST")
    (['GST'], None)
    """
    if not isinstance(text, str):
        return None
    t = text.strip()
    if not t.lower().startswith(SPECIES_PREFIX):
        return None
    body = t[len(SPECIES_PREFIX):]
    names = [n.strip() for n in body.split(",")]
    if not body.strip() or any(not n or re.search(r"\s", n) for n in names):
        raise InputError(f"species selection {text!r} is not valid: give one or more species names after "
                         f"{SPECIES_PREFIX!r}, separated by commas. {SPECIES_GRAMMAR}")
    return _dedupe(names, "species", text, 2)
