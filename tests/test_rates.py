"""Marcus and Miller-Abrahams rates against physical laws and hand values."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc

from clusterlab.errors import InputError
from clusterlab.transport.rates import (
    carrier_site_energies,
    field_energy_change,
    marcus_rate,
    miller_abrahams_rate,
)

T = 300.0
KT_SI = sc.k * T / sc.e  # eV, computed from scipy, not from clusterlab.units


def test_marcus_detailed_balance():
    # Physical law (detailed balance): k_ij / k_ji = exp(-dG/kT) for any lambda.
    dG = np.linspace(-0.4, 0.4, 17)
    for lam in (0.1, 0.3, 0.8):
        ratio = marcus_rate(0.02, dG, lam, T) / marcus_rate(0.02, -dG, lam, T)
        np.testing.assert_allclose(ratio, np.exp(-dG / KT_SI), rtol=1e-9)


def test_marcus_maximum_at_minus_lambda():
    # Marcus, Rev. Mod. Phys. 65, 599 (1993): activationless maximum at dG = -lambda,
    # inverted region beyond it.
    lam = 0.25
    dG = np.linspace(-0.6, 0.2, 8001)
    k = marcus_rate(0.01, dG, lam, T)
    assert dG[np.argmax(k)] == pytest.approx(-lam, abs=2e-4)
    assert k[0] < k.max() and k[-1] < k.max()


def test_marcus_hand_value_si():
    # Hand value from the formula in SI units with scipy.constants (independent of
    # clusterlab.units): J = 10 meV, dG = 0, lambda = 0.2 eV, T = 300 K.
    J, lam = 0.01 * sc.e, 0.2 * sc.e
    kT = sc.k * T
    k_si = 2 * np.pi / sc.hbar * J**2 / np.sqrt(4 * np.pi * lam * kT) * np.exp(-lam / (4 * kT))
    assert marcus_rate(0.01, 0.0, 0.2, T) == pytest.approx(k_si, rel=1e-9)
    # magnitude sanity (common practice: ~1e11-1e12 s^-1 for these numbers)
    assert 1e11 < k_si < 1e13


def test_marcus_depends_on_J_squared_and_sign_free():
    k1 = marcus_rate(0.01, 0.05, 0.3, T)
    assert marcus_rate(0.02, 0.05, 0.3, T) == pytest.approx(4 * k1, rel=1e-12)
    assert marcus_rate(-0.01, 0.05, 0.3, T) == pytest.approx(k1, rel=1e-12)


def test_miller_abrahams_detailed_balance_and_ratio():
    # Miller & Abrahams, Phys. Rev. 120, 745 (1960); detailed balance is a physical law.
    dE = np.linspace(-0.3, 0.3, 13)
    r = 10.0
    up = miller_abrahams_rate(dE, r, T, nu0_per_s=1e12, gamma_per_A=0.2)
    down = miller_abrahams_rate(-dE, r, T, nu0_per_s=1e12, gamma_per_A=0.2)
    np.testing.assert_allclose(up / down, np.exp(-dE / KT_SI), rtol=1e-9)
    # downhill: no energy factor; distance factor exp(-2 gamma r)
    np.testing.assert_allclose(up[dE <= 0], 1e12 * np.exp(-4.0), rtol=1e-12)
    # distance ratio at fixed energy
    k5, k10 = miller_abrahams_rate(0.1, [5.0, 10.0], T, nu0_per_s=1e12, gamma_per_A=0.2)
    assert k5 / k10 == pytest.approx(np.exp(2 * 0.2 * 5.0), rel=1e-12)


def test_miller_abrahams_hand_value():
    # 0.1 eV uphill at 300 K: exp(-0.1 eV / kT) with kT from scipy.constants.
    k = miller_abrahams_rate(0.1, 0.0, T, nu0_per_s=1e13, gamma_per_A=0.3)
    assert k == pytest.approx(1e13 * np.exp(-0.1 * sc.e / (sc.k * T)), rel=1e-9)


def test_sign_conventions():
    # hole site energy +IP, electron -EA; the hop i->j dE = E_j - E_i
    ip = np.array([5.6, 5.4])
    ea = np.array([2.0, 2.3])
    Eh = carrier_site_energies(ip, "ip")
    Ee = carrier_site_energies(ea, "ea")
    # a hole hops downhill to the molecule with the lower IP ...
    assert Eh[1] - Eh[0] < 0
    # ... an electron to the one with the larger EA
    assert Ee[1] - Ee[0] < 0
    # a hole moving along +x in a field along +x goes downhill by e F dx
    dE = field_energy_change([0.0], [[10.0, 0, 0]], [0.01, 0, 0], "hole")
    assert dE[0] == pytest.approx(-0.1)
    dE = field_energy_change([0.0], [[10.0, 0, 0]], [0.01, 0, 0], "electron")
    assert dE[0] == pytest.approx(+0.1)


def test_bad_inputs():
    with pytest.raises(InputError, match="lambda_eV"):
        marcus_rate(0.01, 0.0, -0.1, T)
    with pytest.raises(InputError, match="T_K"):
        miller_abrahams_rate(0.0, 1.0, 0.0, nu0_per_s=1e12, gamma_per_A=0.1)
    with pytest.raises(InputError, match="r_A"):
        miller_abrahams_rate(0.0, -1.0, T, nu0_per_s=1e12, gamma_per_A=0.1)
    with pytest.raises(InputError, match="carrier kind"):
        field_energy_change([0.0], [[1.0, 0, 0]], [0, 0, 0], "positron")
    with pytest.raises(InputError, match="site quantity"):
        carrier_site_energies([1.0], "homo")
