"""The package version and the versions of the software a result depends on.

Bottom layer: imports nothing from the rest of the package except the BLAS
choice (itself dependency-free), so every layer can record its provenance.
"""

from __future__ import annotations

import sys
from importlib import import_module

#: clusterlab's own version (also ``clusterlab.__version__``).
__version__ = "0.1.0"

#: Libraries whose versions travel with every result (those not installed are left out).
TRACKED = ("pyscf", "numpy", "scipy", "pandas", "MDAnalysis", "pyarrow")


def software_versions() -> dict[str, str]:
    """Versions of clusterlab, Python and the tracked libraries, plus the
    OpenBLAS kernel PySCF runs with (:mod:`clusterlab.blas`).

    Returns
    -------
    dict of str -> str
        Keys ``clusterlab``, ``python``, one per installed library of
        :data:`TRACKED`, and ``pyscf_openblas_coretype``.

    Examples
    --------
    >>> v = software_versions()
    >>> v["clusterlab"] == __version__
    True
    """
    from .blas import blas_status

    out = {"clusterlab": __version__, "python": ".".join(map(str, sys.version_info[:3]))}
    for name in TRACKED:
        try:
            out[name] = str(import_module(name).__version__)
        except ImportError:  # pragma: no cover - optional libraries
            continue
    out["pyscf_openblas_coretype"] = blas_status()["coretype"] or "default"
    return out
