"""Jupyter widgets: explore a film, watch a radius scan converge, look at
static disorder. Thin layers over the library (no science here).

* :class:`FilmExplorer` - pick a molecule, carve, see the cluster in 3D.
* :class:`ShiftScanPanel` - run a radius scan in the background and watch
  the environment shift converge.
* :class:`DisorderPanel` - sample or load site energies; histogram, σ vs
  radius, site energies on the film, spatial correlation, CSV export.
"""

from __future__ import annotations

from .calc import ShiftScanPanel
from .disorder import DisorderPanel
from .explorer import FilmExplorer

__all__ = ["FilmExplorer", "ShiftScanPanel", "DisorderPanel"]
