"""Transport kernels on plain arrays: hopping rates, a reference hopping
simulation, excitonic couplings and neighbour pairs.

The table-level export (site and pair tables, rates on tables, files) is
:mod:`clusterlab.export`; the PySCF transfer integrals belong to the quantum
engine and are not re-exported here.

Sign conventions for site energies and hops are in
:mod:`clusterlab.transport.rates`.
"""

from __future__ import annotations

from .couplings import (
    orientation_factor,
    pair_transition_charge_couplings,
    point_dipole_coupling,
    transition_charge_coupling,
)
from .hopping import (
    HoppingGraph,
    KMCResult,
    build_hopping_graph,
    cubic_lattice_pairs,
    master_equation_mobility,
    run_kmc,
    steady_state_occupation,
)
from .pairs import neighbour_pairs
from .rates import (
    carrier_charge,
    carrier_site_energies,
    field_energy_change,
    marcus_rate,
    miller_abrahams_rate,
)

__all__ = [
    "marcus_rate",
    "miller_abrahams_rate",
    "carrier_site_energies",
    "carrier_charge",
    "field_energy_change",
    "HoppingGraph",
    "KMCResult",
    "build_hopping_graph",
    "cubic_lattice_pairs",
    "run_kmc",
    "steady_state_occupation",
    "master_equation_mobility",
    "point_dipole_coupling",
    "orientation_factor",
    "transition_charge_coupling",
    "pair_transition_charge_couplings",
    "neighbour_pairs",
]
