"""Transport kernels: hopping rates, a reference hopping simulation,
excitonic couplings, charge-transfer integrals and neighbour pairs.

Sign conventions for site energies and hops are in
:mod:`clusterlab.transport.rates`.
"""

from __future__ import annotations

from .couplings import orientation_factor, point_dipole_coupling, transition_charge_coupling
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
    "neighbour_pairs",
]

from .export import (  # noqa: E402 - appended: the transport-model export
    ExportTables,
    export_study,
    graph_from_export,
    hopping_rates,
    pair_table,
    read_export,
    site_table,
    write_export,
)
from .transfer_tasks import compute_transfer_integrals, transfer_task  # noqa: E402

__all__ += [
    "ExportTables",
    "site_table",
    "pair_table",
    "hopping_rates",
    "write_export",
    "read_export",
    "export_study",
    "graph_from_export",
    "transfer_task",
    "compute_transfer_integrals",
]
