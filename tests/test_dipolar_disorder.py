"""Random dipoles on a simple cubic lattice: site-energy width and correlation
against the analytic dipolar-disorder results."""

import numpy as np
import pytest

from clusterlab.electrostatics.ewald import ewald_potential
from clusterlab.electrostatics.lattice import (
    S4_SIMPLE_CUBIC,
    dipolar_sigma_eV,
    dipolar_site_energies,
    expected_correlation_eV2,
    kernel_s4,
    lattice_sum_s4,
    random_dipoles,
    sample_correlation_eV2,
    unit_charge_field_kernel,
)
from clusterlab.units import COULOMB_EV_A, DEBYE_E_A


def test_lattice_sum_s4():
    # S4 = sum over Z^3 \\ 0 of |n|^-4 = 16.5323 (Dieckmann, Bässler & Borsenberger,
    # J. Chem. Phys. 99, 8136 (1993); more digits 16.53231595..., from memory)
    assert lattice_sum_s4(40) == pytest.approx(16.5323, abs=2e-4)
    assert lattice_sum_s4(60) == pytest.approx(16.53231595, abs=1e-4)


def test_practical_sigma_formula():
    # practical form sigma = 7.04 p[D] c^1/2 / (eps a[Å]^2) eV (Young 1995 / Dieckmann 1993;
    # project reference table): our prefactor from S4 and CODATA constants must agree
    assert dipolar_sigma_eV(1.0, 1.0) == pytest.approx(7.04, rel=1e-3)
    # sigma = 2.35 e p/(eps a^2): the same in e, Å units
    assert np.sqrt(S4_SIMPLE_CUBIC / 3) == pytest.approx(2.35, abs=5e-3)
    # a made-up film: 3 D dipoles at 10 % concentration, a = 10 Å, eps = 3
    assert dipolar_sigma_eV(3.0, 10.0, 3.0, 0.1) == pytest.approx(7.04 * 3 * np.sqrt(0.1) / 300, rel=1e-3)


def test_kernel_lattice_sum_extrapolates_to_s4():
    """Finite periodic lattices miss O(1/n) of S4 (distant dipoles are images);
    Richardson extrapolation between n = 20 and 40 recovers S4 within 0.3 %."""
    s20 = kernel_s4(unit_charge_field_kernel(20))
    s40 = kernel_s4(unit_charge_field_kernel(40))
    assert s20 < s40 < S4_SIMPLE_CUBIC
    assert 2 * s40 - s20 == pytest.approx(S4_SIMPLE_CUBIC, rel=3e-3)


def test_sampled_sigma_matches_analytic():
    """Site energies from random dipoles (8 realisations of a 20^3 lattice,
    a = 10 Å, p = 2 D) have the width sqrt(S_kernel/3) e p/a^2 of this finite lattice
    (statistical tolerance 4 %: one realisation scatters by ~4 %, eight by ~1.4 %),
    and that width is within 4 % of the infinite-lattice sqrt(S4/3) e p/a^2."""
    n, a, p_D = 20, 10.0, 2.0
    k = unit_charge_field_kernel(n, a)
    p = p_D * DEBYE_E_A
    sig_lattice = np.sqrt(kernel_s4(k, a) / 3) * COULOMB_EV_A * p / a**2
    rng = np.random.default_rng(2024)
    var = np.mean([dipolar_site_energies(random_dipoles(n, p, rng), k).var() for _ in range(8)])
    assert np.sqrt(var) == pytest.approx(sig_lattice, rel=0.04)
    assert sig_lattice == pytest.approx(dipolar_sigma_eV(p_D, a), rel=0.04)
    assert np.sqrt(expected_correlation_eV2(k, p)[0, 0, 0]) == pytest.approx(sig_lattice, rel=1e-10)


def test_site_energy_of_one_dipole_is_coulomb():
    """A single dipole: the FFT convolution gives e p.r/r^3 (minimum image) exactly."""
    n = 8
    dip = np.zeros((n, n, n, 3))
    dip[0, 0, 0] = [0.0, 0.0, 1.0]
    u = dipolar_site_energies(dip, unit_charge_field_kernel(n, 2.0))
    assert u[0, 0, 1] == pytest.approx(COULOMB_EV_A / 2.0**2, rel=1e-12)
    assert u[0, 0, n - 1] == pytest.approx(-COULOMB_EV_A / 2.0**2, rel=1e-12)
    assert u[1, 0, 0] == pytest.approx(0.0, abs=1e-12)
    assert u[0, 0, 0] == pytest.approx(0.0, abs=1e-12)


@pytest.fixture(scope="module")
def ewald_kernel32():
    return unit_charge_field_kernel(32, kind="ewald")


def test_correlation_follows_coulomb_law(ewald_kernel32):
    """Poisson's equation: for r >> a, C(r) = (4 pi/3) (e p/eps)^2 G(r)/a^3, G the
    Coulomb Green function (1/r in an infinite lattice, so C/sigma^2 = (4 pi/S4) a/r
    = 0.760 a/r; Novikov et al., PRL 81, 4472 (1998) quote about 0.74, from memory).
    In the periodic lattice G is the periodic (tinfoil) Green function, computed
    independently here by an Ewald potential. Checked within 1 % for r >= 4a."""
    n, p = 32, 1.0
    c = expected_correlation_eV2(ewald_kernel32, p)
    r_list = [(4, 0, 0), (6, 0, 0), (8, 0, 0), (10, 0, 0), (3, 3, 0), (5, 5, 0), (3, 3, 3), (4, 4, 4)]
    pts = np.array(r_list, float)
    g = ewald_potential(pts, [[0, 0, 0]], [1.0], [n, n, n, 90, 90, 90], non_neutral="background",
                        accuracy=1e-10) / COULOMB_EV_A
    pred = 4 * np.pi / 3 * (COULOMB_EV_A * p) ** 2 * g
    got = np.array([c[r] for r in r_list])
    assert np.allclose(got / pred, 1.0, atol=0.01)
    # 1/r fall-off: C(4a)/C(8a) follows G(4)/G(8), and G itself is 1/r up to the
    # periodic offset -2.8373/n (the simple cubic Wigner/Madelung constant, from memory)
    assert c[4, 0, 0] / c[8, 0, 0] == pytest.approx(g[0] / g[2], rel=0.01)
    assert g[0] == pytest.approx(1 / 4 - 2.8373 / n + 2 * np.pi / 3 * 16 / n**3, rel=0.01)
    assert 4 * np.pi / S4_SIMPLE_CUBIC == pytest.approx(0.74, rel=0.03)


def test_sampled_correlation_matches_expected(ewald_kernel32):
    """Sampled spatial correlation of random-dipole site energies agrees with the
    exact ensemble average (statistical tolerance: 4 realisations of 32^3)."""
    p = 1.0
    rng = np.random.default_rng(7)
    c_exp = expected_correlation_eV2(ewald_kernel32, p)
    samples = [sample_correlation_eV2(dipolar_site_energies(random_dipoles(32, p, rng), ewald_kernel32))
               for _ in range(4)]
    c = np.mean(samples, axis=0)
    sig2 = c_exp[0, 0, 0]
    for r in [(1, 0, 0), (2, 0, 0), (4, 0, 0)]:
        # average over the three equivalent axes
        perm = [r, (r[1], r[0], r[2]), (r[2], r[1], r[0])]
        got = np.mean([c[q] for q in perm])
        assert got == pytest.approx(c_exp[r], abs=0.08 * sig2)
    assert c[0, 0, 0] == pytest.approx(sig2, rel=0.06)
