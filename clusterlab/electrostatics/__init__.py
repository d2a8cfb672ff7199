"""Electrostatics kernels (layer 1): pure numpy/scipy functions.

* :mod:`.ewald` - periodic potentials/fields/energies of point charges (Ewald).
* :mod:`.thole` - induced dipoles with Thole exponential damping.
* :mod:`.espfit` - charges fitted to a QM electrostatic potential; transition charges.
* :mod:`.statecharges` - ESP charges of S0, S1, T1, cation, anion (PySCF).
* :mod:`.lattice` - dipolar-disorder check on a cubic lattice.

Units: Å, e, V (= eV/e), V/Å, e·Å, Å³, eV; boxes ``[lx, ly, lz, alpha, beta, gamma]``.
"""

from .espfit import (
    EspFit,
    Restraint,
    charge_dipole_D,
    cubic_points,
    esp_charges,
    esp_on_points,
    esp_rrms,
    fit_esp_charges,
    shell_points,
    transition_charges,
    transition_density_ao,
)
from .ewald import (
    EwaldParameters,
    choose_ewald_parameters,
    ewald_energy,
    ewald_potential,
    lattice_vectors,
    minimum_image,
)
from .statecharges import StateCharges, parse_method, state_charges
from .thole import (
    THOLE_EXP_A,
    Polarization,
    atomic_polarizabilities,
    molecular_polarizability,
    permanent_field,
    polarization_energy,
    solve_induced_dipoles,
)

__all__ = [
    "EspFit", "Restraint", "charge_dipole_D", "cubic_points", "esp_charges", "esp_on_points",
    "esp_rrms", "fit_esp_charges", "shell_points", "transition_charges", "transition_density_ao",
    "EwaldParameters", "choose_ewald_parameters", "ewald_energy", "ewald_potential",
    "lattice_vectors", "minimum_image",
    "StateCharges", "parse_method", "state_charges",
    "THOLE_EXP_A", "Polarization", "atomic_polarizabilities", "molecular_polarizability",
    "permanent_field", "polarization_energy", "solve_induced_dipoles",
]

from .sitemodel import StateChargeSet, conformer_spread, environment_pairs, film_site_energies  # noqa: E402

__all__ += ["StateChargeSet", "film_site_energies", "conformer_spread", "environment_pairs"]
