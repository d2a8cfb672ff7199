"""clusterlab: embedded quantum chemistry of molecules carved from organic
semiconductor films.

Results are model estimates: every function says which physics its model
leaves out.
"""

from __future__ import annotations

from .versions import __version__, software_versions

# Before anything loads PySCF: pick its bundled OpenBLAS kernel (see clusterlab/blas.py).
from .blas import blas_status, choose_pyscf_kernel as _choose_pyscf_kernel

_choose_pyscf_kernel()

from .charges import ChargeSource, MoleculeTypeCharges, TableCharges, TopologyCharges
from .cluster import Cluster
from .film import Film, MixedSpeciesWarning, film_from_universe, load_film
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
from .stats import (
    conformational_environmental,
    converged_radius,
    disorder_stats,
    grouped_disorder_stats,
    spatial_correlation,
    static_dynamic,
)
from .store import ResultStore
from .study import (
    ConfinementResult,
    HostGuestOverview,
    ScanResult,
    SiteSample,
    SpeciesEnergies,
    StateOrderResult,
    TorsionResult,
    dest_torsion,
    host_guest_overview,
    pick_species_molecule,
    radius_scan,
    sample_sites,
    species_energies,
    state_order,
    state_table,
    torsion_table,
    triplet_confinement,
)
from .study.plots import (
    plot_convergence,
    plot_correlation,
    plot_growth,
    plot_histogram,
    plot_parity,
    plot_torsion,
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
    ProvenanceError,
)

__all__ = [
    "blas_status",
    "Cluster",
    "Film",
    "load_film",
    "film_from_universe",
    "MixedSpeciesWarning",
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
    "radius_scan",
    "pick_species_molecule",
    "ScanResult",
    "sample_sites",
    "SiteSample",
    "ResultStore",
    "disorder_stats",
    "grouped_disorder_stats",
    "static_dynamic",
    "conformational_environmental",
    "spatial_correlation",
    "converged_radius",
    "plot_convergence",
    "plot_histogram",
    "plot_growth",
    "plot_correlation",
    "plot_parity",
    "plot_torsion",
    "species_energies",
    "SpeciesEnergies",
    "triplet_confinement",
    "ConfinementResult",
    "torsion_table",
    "dest_torsion",
    "TorsionResult",
    "state_table",
    "state_order",
    "StateOrderResult",
    "host_guest_overview",
    "HostGuestOverview",
    "ClusterlabError",
    "InputError",
    "ProvenanceError",
    "FilmError",
    "ChargeError",
    "CarvingError",
    "CalculationError",
    "ConvergenceError",
    "GeometryError",
    "__version__",
    "software_versions",
]
