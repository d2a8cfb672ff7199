"""The demo film and the one-command demo study."""

from __future__ import annotations

import os

from .errors import InputError

DEMO_TOPOLOGY = "bithiophene_film.psf"
DEMO_TRAJECTORY = "bithiophene_film.xtc"


def demo_dir() -> str:
    """Folder holding the demo film (``demo_traj/`` of the source tree)."""
    here = os.path.dirname(os.path.abspath(__file__))
    for cand in (os.path.join(here, "..", "demo_traj"), os.path.join(os.getcwd(), "demo_traj")):
        if os.path.exists(os.path.join(cand, DEMO_TOPOLOGY)):
            return os.path.abspath(cand)
    raise InputError(
        "The demo film was not found (looked for demo_traj/" + DEMO_TOPOLOGY + " next to the "
        "package and in the current folder). Install clusterlab from its source tree "
        "(pip install -e .) or run from the project root."
    )


def demo_paths() -> tuple[str, str]:
    """``(topology, trajectory)`` paths of the demo film."""
    d = demo_dir()
    return os.path.join(d, DEMO_TOPOLOGY), os.path.join(d, DEMO_TRAJECTORY)
