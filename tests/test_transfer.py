"""Projective-dimer transfer integrals against the dimer's own orbital
splittings (two-state model), the exponential decay of bound-state tails,
and electrostatics of an embedding point charge."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc

from clusterlab.errors import InputError
from clusterlab.qm.method import Method
from clusterlab.qm.transfer import effective_coupling, transfer_integrals

#: the SCF settings of the projective method as first written: no density fitting, bare charges
HF_631G = Method(xc="hf", basis="6-31g", density_fit=False, charge_smearing_A=0.0)

HARTREE_EV = sc.physical_constants["Hartree energy in eV"][0]
BOHR_A = sc.physical_constants["Bohr radius"][0] * 1e10
COULOMB_EV_A = sc.e / (4 * np.pi * sc.epsilon_0) * 1e10

# Ethylene in the xy plane, C=C along x; C=C 1.339 Å, C-H 1.087 Å, H-C-C 121.2°
# (typical experimental structure; from memory - only symmetry matters here).
_C, _CH, _ANG = 1.339 / 2, 1.087, np.radians(180 - 121.2)
ETHYLENE = np.array(
    [
        [-_C, 0, 0],
        [_C, 0, 0],
        [-_C - _CH * np.cos(_ANG), _CH * np.sin(_ANG), 0],
        [-_C - _CH * np.cos(_ANG), -_CH * np.sin(_ANG), 0],
        [_C + _CH * np.cos(_ANG), _CH * np.sin(_ANG), 0],
        [_C + _CH * np.cos(_ANG), -_CH * np.sin(_ANG), 0],
    ]
)
SYM = ["C", "C", "H", "H", "H", "H"]
DISTANCES = (3.5, 4.0, 4.5, 5.0)


@pytest.fixture(scope="module")
def stack_hf():
    """Cofacial ethylene dimers (B = A translated along z), HF/6-31G."""
    return {
        d: transfer_integrals(SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, d], HF_631G)
        for d in DISTANCES
    }


def test_symmetric_dimer_matches_half_splitting(stack_hf):
    # Physics check (two-state model): for two identical molecules related by a
    # symmetry operation (e1 = e2), the dimer's HOMO/HOMO-1 (and LUMO+1/LUMO) are the
    # +/- combinations of the monomer orbitals and split by exactly 2|J_eff|.
    # Deviations come only from mixing with other monomer orbitals and SCF
    # polarisation of the dimer; measured < 1% here, tolerance 5% (common practice
    # quotes agreement of the splitting and projective values of this order for
    # well-separated frontier orbitals).
    for d, r in stack_hf.items():
        assert r.converged
        e = r.dimer_mo_energy_eV  # HOMO-1, HOMO, LUMO, LUMO+1
        assert r.hole.e1_eV == pytest.approx(r.hole.e2_eV, abs=1e-5)
        assert abs(r.j_hole_eV) == pytest.approx((e[1] - e[0]) / 2, rel=0.05)
        assert abs(r.j_electron_eV) == pytest.approx((e[3] - e[2]) / 2, rel=0.05)
    # size check: pi-stacked ethylene at 3.5-4 Å has |J| of a few tenths of an eV
    assert 0.1 < abs(stack_hf[4.0].j_hole_eV) < 0.6


def test_transfer_integral_decays_exponentially(stack_hf):
    # A bound orbital's tail decays as exp(-kappa r) with kappa = sqrt(2 m IP)/hbar
    # (exact asymptotics of the Schrodinger/HF equations; IP = -e_HOMO by Koopmans);
    # the overlap of two tails - and J - then decays as R^n exp(-kappa R). Fit
    # ln|J| vs d over 3.5-5 Å and compare with kappa within 30% (power-law prefactor
    # and the finite Gaussian basis). Typical pi-stack slopes 1.5-2 Å^-1 (common
    # practice).
    d = np.array(DISTANCES)
    lnJ = np.log([abs(stack_hf[x].j_hole_eV) for x in DISTANCES])
    slope = -np.polyfit(d, lnJ, 1)[0]
    ip_Eh = -stack_hf[4.0].monomer_homo_eV[0] / HARTREE_EV
    kappa = np.sqrt(2 * ip_Eh) / BOHR_A  # Å^-1
    assert slope == pytest.approx(kappa, rel=0.3)
    assert 1.2 < slope < 2.5
    # monotonic decay
    assert np.all(np.diff(lnJ) < 0)


def test_lowdin_closed_form():
    # Valeev et al., J. Am. Chem. Soc. 128, 9882 (2006):
    # J_eff = (J - S (e1 + e2)/2) / (1 - S^2), and symmetric orthogonalisation
    # keeps the trace-like combination e1_eff + e2_eff = (e1 + e2 - 2 J S)/(1 - S^2).
    e1, e2, J, S = -7.3, -7.1, -0.21, 0.04
    c = effective_coupling(e1, e2, J, S)
    assert c.J_eff_eV == pytest.approx((J - S * (e1 + e2) / 2) / (1 - S**2), rel=1e-12)
    assert c.e1_eff_eV + c.e2_eff_eV == pytest.approx((e1 + e2 - 2 * J * S) / (1 - S**2), rel=1e-12)
    # eigenvalues of the generalised problem H c = E S c are preserved
    H = np.array([[e1, J], [J, e2]])
    Sm = np.array([[1, S], [S, 1]])
    import scipy.linalg

    ref = scipy.linalg.eigh(H, Sm, eigvals_only=True)
    got = np.linalg.eigvalsh([[c.e1_eff_eV, c.J_eff_eV], [c.J_eff_eV, c.e2_eff_eV]])
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_point_charge_shifts_site_energies():
    # Electrostatics: a +1 e charge on the stacking axis lowers each molecule's
    # orbital energies by about e*phi = k q / r (Coulomb's law); the site-energy
    # difference follows the potential difference (within 10%: polarisation of each
    # monomer by the charge). The dimer HOMO splitting then follows the two-state
    # formula sqrt(de^2 + 4 J_eff^2) (within 5%).
    d, zq = 4.0, -15.0
    r = transfer_integrals(
        SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, d], HF_631G,
        env_positions=[[0, 0, zq]], env_charges=[1.0],
    )
    assert r.converged and r.n_env_charges == 1
    dphi = COULOMB_EV_A * (1 / abs(zq) - 1 / abs(d - zq))
    assert r.hole.e1_eV - r.hole.e2_eV == pytest.approx(-dphi, rel=0.1)
    de = r.hole.e1_eff_eV - r.hole.e2_eff_eV
    e = r.dimer_mo_energy_eV
    assert e[1] - e[0] == pytest.approx(np.sqrt(de**2 + 4 * r.j_hole_eV**2), rel=0.05)


@pytest.mark.slow
def test_default_functional_symmetric_dimer():
    # Same two-state check with the default functional (B3LYP/6-31G). About 15 s.
    r = transfer_integrals(SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, 4.0], HF_631G.replace(xc="b3lyp"))
    assert r.converged and r.xc == "b3lyp"
    e = r.dimer_mo_energy_eV
    assert abs(r.j_hole_eV) == pytest.approx((e[1] - e[0]) / 2, rel=0.05)
    # more exact exchange -> larger |J| (common practice): HF above B3LYP
    hf = transfer_integrals(SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, 4.0], HF_631G)
    assert abs(hf.j_hole_eV) > abs(r.j_hole_eV)


def test_errors():
    h = np.array([[0.0, 0, 0]])
    with pytest.raises(InputError, match="closed-shell"):
        transfer_integrals(["H"], h, ["H"], h + [3.0, 0, 0], HF_631G.replace(basis="sto-3g"))
    with pytest.raises(InputError, match="overlap"):
        transfer_integrals(SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, 0.1], HF_631G)
    with pytest.raises(InputError, match="one charge per position"):
        transfer_integrals(
            SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, 4], HF_631G,
            env_positions=[[0, 0, 9.0]], env_charges=[1.0, 2.0],
        )
    with pytest.raises(InputError, match="transfer_integrals needs a clusterlab.Method.*got str"):
        transfer_integrals(SYM, ETHYLENE, SYM, ETHYLENE + [0, 0, 4], "hf/6-31g")
    with pytest.raises(InputError, match=r"\|S\| < 1"):
        effective_coupling(0.0, 0.0, 0.1, 1.0)
