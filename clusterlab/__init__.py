"""clusterlab: embedded quantum chemistry of molecules carved from organic
semiconductor films.

Results are model estimates: every function says which physics its model
leaves out.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .charges import ChargeSource, MoleculeTypeCharges, TableCharges, TopologyCharges
from .cluster import Cluster
from .film import Film, film_from_universe, load_film
from .qm import (
    ChargedResult,
    EmbeddingWarning,
    ExcitationResult,
    ExcitedState,
    Method,
    charged_states,
    excitation_series,
    excitations,
    periodic_cluster,
    periodic_excitations,
)
from .errors import (
    CalculationError,
    CarvingError,
    ChargeError,
    ClusterlabError,
    ConvergenceError,
    FilmError,
    GeometryError,
    InputError,
)

__all__ = [
    "Cluster",
    "Film",
    "load_film",
    "film_from_universe",
    "ChargeSource",
    "TopologyCharges",
    "TableCharges",
    "MoleculeTypeCharges",
    "Method",
    "excitations",
    "excitation_series",
    "charged_states",
    "periodic_excitations",
    "periodic_cluster",
    "ExcitationResult",
    "ExcitedState",
    "ChargedResult",
    "EmbeddingWarning",
    "ClusterlabError",
    "InputError",
    "FilmError",
    "ChargeError",
    "CarvingError",
    "CalculationError",
    "ConvergenceError",
    "GeometryError",
    "__version__",
]
