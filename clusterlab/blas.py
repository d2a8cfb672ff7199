"""Choice of the BLAS kernel of PySCF's bundled OpenBLAS.

PySCF's Linux wheels bundle OpenBLAS 0.3.3 (2018), whose run-time CPU
detection does not know recent CPUs and falls back to a generic SSE3
("Prescott") kernel. Measured on two machines with ``pyscf.lib.dot`` of a
300 x 6000 x 300 product on one thread: an Intel CPU with AVX-512, 130 ms
by default vs 52 ms with the Haswell kernel; an AMD EPYC (AVX2, FMA),
112 ms vs 41 ms (see DEVELOPERS.md). The exchange-correlation kernel of a
TDA spends about half of its time in such products.

OpenBLAS reads ``OPENBLAS_CORETYPE`` once, when the library is loaded. So
:func:`choose_pyscf_kernel` runs first thing on ``import clusterlab`` (and
therefore in every worker process, which imports clusterlab to run a task):

* it does nothing if the user set ``OPENBLAS_CORETYPE`` (their choice wins),
  if ``CLUSTERLAB_BLAS_TUNING`` is ``0``/``off``/``false``/``no``, if PySCF
  was imported before clusterlab (too late: its OpenBLAS is loaded), or if
  the CPU does not report both AVX2 and FMA (Linux ``/proc/cpuinfo``;
  other systems are left alone);
* otherwise it imports NumPy first (so NumPy's own, newer OpenBLAS keeps
  its own detection), sets ``OPENBLAS_CORETYPE=Haswell``, imports
  ``pyscf.lib`` (which loads the bundled OpenBLAS with that kernel) and
  restores the environment, so later libraries and child processes are
  not affected.

The Haswell kernel needs exactly AVX2 and FMA, which the CPU reports; the
faster AVX-512 ("SkylakeX") kernel of this old OpenBLAS is not chosen
(correctness first). What happened is in :func:`blas_status`, and every
result records it with the software versions.
"""

from __future__ import annotations

import os
import sys
from typing import Iterable

__all__ = ["recommended_coretype", "cpu_flags", "choose_pyscf_kernel", "blas_status"]

#: Environment switch that turns the choice off.
OPT_OUT_ENV = "CLUSTERLAB_BLAS_TUNING"
_OFF = ("0", "off", "false", "no")

_STATUS: dict[str, str] = {"action": "not-run", "coretype": "", "reason": ""}


def recommended_coretype(flags: Iterable[str], machine: str) -> str | None:
    """OpenBLAS core type for a CPU, or None to keep OpenBLAS's own choice.

    Parameters
    ----------
    flags : iterable of str
        CPU feature flags as Linux lists them in ``/proc/cpuinfo``.
    machine : str
        ``platform.machine()`` (e.g. ``"x86_64"``).

    Returns
    -------
    str or None
        ``"Haswell"`` for x86-64 CPUs with AVX2 and FMA, else None.

    Examples
    --------
    >>> recommended_coretype({"sse3", "avx", "avx2", "fma"}, "x86_64")
    'Haswell'
    >>> recommended_coretype({"sse3", "avx"}, "x86_64") is None
    True
    """
    f = set(flags)
    if machine.lower() not in ("x86_64", "amd64"):
        return None
    if {"avx2", "fma"} <= f:
        return "Haswell"
    return None


def cpu_flags(path: str = "/proc/cpuinfo") -> set[str]:
    """Feature flags of the first CPU listed in ``path`` (empty if unreadable)."""
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.startswith("flags"):
                    return set(line.split(":", 1)[1].split())
    except OSError:
        pass
    return set()


def choose_pyscf_kernel() -> dict[str, str]:
    """Load PySCF's OpenBLAS with a kernel suited to this CPU (see module doc).

    Safe to call more than once; only the first call can act.

    Returns
    -------
    dict
        ``action`` ("set", "user", "opted-out", "too-late", "unsupported-cpu",
        "no-pyscf"), ``coretype`` and ``reason``.
    """
    if _STATUS["action"] != "not-run":
        return dict(_STATUS)
    import platform

    def done(action: str, coretype: str, reason: str) -> dict[str, str]:
        _STATUS.update(action=action, coretype=coretype, reason=reason)
        return dict(_STATUS)

    user = os.environ.get("OPENBLAS_CORETYPE")
    if user:
        return done("user", user, "OPENBLAS_CORETYPE was set by the user")
    if os.environ.get(OPT_OUT_ENV, "").strip().lower() in _OFF:
        return done("opted-out", "", f"{OPT_OUT_ENV}={os.environ[OPT_OUT_ENV]}")
    if "pyscf.lib" in sys.modules:
        return done("too-late", "", "pyscf was imported before clusterlab; its OpenBLAS kept "
                    "its own kernel (set OPENBLAS_CORETYPE=Haswell before starting Python)")
    coretype = recommended_coretype(cpu_flags(), platform.machine())
    if coretype is None:
        return done("unsupported-cpu", "", "no AVX2+FMA reported (or not Linux x86-64): OpenBLAS default")
    import numpy  # noqa: F401 - load NumPy's own BLAS before the variable is set

    os.environ["OPENBLAS_CORETYPE"] = coretype
    try:
        import pyscf.lib  # noqa: F401 - loads the bundled OpenBLAS now
    except ImportError:  # pragma: no cover - pyscf is a hard dependency
        return done("no-pyscf", "", "pyscf is not importable")
    finally:
        del os.environ["OPENBLAS_CORETYPE"]
    return done("set", coretype, "CPU reports AVX2 and FMA")


def blas_status() -> dict[str, str]:
    """What :func:`choose_pyscf_kernel` did in this process."""
    return dict(_STATUS)
