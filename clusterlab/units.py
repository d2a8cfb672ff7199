"""Unit constants, taken from PySCF's CODATA tables where it has them.

Use these instead of literals: ``energy_eV = energy_Eh * HARTREE_TO_EV``.
"""

from __future__ import annotations

import scipy.constants as _sc

try:  # PySCF's own values, so energies agree with PySCF to the last digit
    from pyscf.data import nist as _nist

    HARTREE_TO_EV: float = float(_nist.HARTREE2EV)
    BOHR_A: float = float(_nist.BOHR)
except ImportError:  # pragma: no cover - pyscf is a hard dependency
    HARTREE_TO_EV = _sc.physical_constants["Hartree energy in eV"][0]
    BOHR_A = _sc.physical_constants["Bohr radius"][0] * 1e10

A_TO_BOHR: float = 1.0 / BOHR_A
EV_TO_HARTREE: float = 1.0 / HARTREE_TO_EV
#: Debye in e·Å (1 D = 1e-21 C m^2 / s / c ... = 0.2081943 e Å)
DEBYE_E_A: float = 1e-21 / _sc.c / _sc.e * 1e10
#: e·bohr in Debye
AU_DIPOLE_TO_DEBYE: float = BOHR_A / DEBYE_E_A
#: Coulomb constant e^2/(4 pi eps0) in eV·Å (14.3996...)
COULOMB_EV_A: float = _sc.e / (4 * _sc.pi * _sc.epsilon_0) * 1e10
#: Boltzmann constant in eV/K
KB_EV: float = _sc.k / _sc.e
#: hbar in eV·s
HBAR_EV_S: float = _sc.hbar / _sc.e
EV_TO_CM1: float = _sc.e / (_sc.h * _sc.c * 100)
