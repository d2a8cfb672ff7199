"""Electrostatics kernels (layer 1): pure numpy/scipy functions.

* :mod:`.ewald` - periodic potentials/fields/energies of point charges (Ewald).
* :mod:`.thole` - induced dipoles with Thole exponential damping.
* :mod:`.espfit` - fit points and charges fitted to an electrostatic potential.
* :mod:`.lattice` - dipolar-disorder check on a cubic lattice.
* :mod:`.pairsum` - exact potentials of every molecule's carved environment, all molecules at once.
* :mod:`.conformers` - superposition, conformer references, topological equivalence.
* :mod:`.stark` - the Stark energy of a dipole and polarizability change, the finite-field fit record.
* :mod:`.chargeset` - state charges per molecule type (plain data, JSON).
* :mod:`.fieldfit` - least-squares uniform field of a potential over each molecule.

Units: Å, e, V (= eV/e), V/Å, e·Å, Å³, eV; boxes ``[lx, ly, lz, alpha, beta, gamma]``.
"""

from .espfit import (
    EspFit,
    Restraint,
    charge_dipole_D,
    cubic_points,
    esp_rrms,
    fit_esp_charges,
    fit_points,
    shell_points,
)
from .ewald import (
    EwaldParameters,
    choose_ewald_parameters,
    ewald_energy,
    ewald_potential,
    lattice_vectors,
    minimum_image,
)
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
    "EspFit", "Restraint", "charge_dipole_D", "cubic_points", "esp_rrms", "fit_esp_charges", "fit_points",
    "shell_points",
    "EwaldParameters", "choose_ewald_parameters", "ewald_energy", "ewald_potential",
    "lattice_vectors", "minimum_image",
    "THOLE_EXP_A", "Polarization", "atomic_polarizabilities", "molecular_polarizability",
    "permanent_field", "polarization_energy", "solve_induced_dipoles",
]

from .chargeset import ConformerCharges, StateChargeSet  # noqa: E402
from .conformers import assign_conformers, equivalence_classes, pick_references, superpose  # noqa: E402
from .fieldfit import UniformFieldFit, uniform_field_fit  # noqa: E402
from .pairsum import environment_potential  # noqa: E402
from .stark import StarkFit, stark_energy_eV, uniform_field_charges  # noqa: E402

__all__ += ["StateChargeSet", "ConformerCharges", "UniformFieldFit", "uniform_field_fit", "environment_potential",
            "superpose", "pick_references", "assign_conformers", "equivalence_classes",
            "StarkFit", "stark_energy_eV", "uniform_field_charges"]
