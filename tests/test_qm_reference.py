"""Checks of the quantum engine against the outside world: published
benchmarks, experiments and physical laws (sources beside each check)."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from clusterlab import Cluster
from clusterlab.qm import Method, charged_states, excitation_series, excitations
from clusterlab.units import A_TO_BOHR

# TIP3P: Jorgensen, Chandrasekhar, Madura, Impey, Klein, J. Chem. Phys. 79, 926 (1983)
TIP3P_ROH_A, TIP3P_HOH_DEG, TIP3P_QO, TIP3P_QH = 0.9572, 104.52, -0.834, 0.417


def formaldehyde(rco=1.220, rch=1.104, hch_deg=115.8):
    """C2v formaldehyde in the yz plane, C=O along +z. Default geometry close
    to the MP2/6-31G(d) structure of the Schreiber et al. (2008) set
    (C=O 1.22 Å, C-H 1.10 Å, HCH 116°; from memory)."""
    a = np.radians(hch_deg / 2)
    return ["C", "O", "H", "H"], np.array([[0, 0, 0], [0, 0, rco], [0, rch * np.sin(a), -rch * np.cos(a)],
                                           [0, -rch * np.sin(a), -rch * np.cos(a)]])


def water(origin=(0.0, 0.0, 0.0)):
    a = np.radians(TIP3P_HOH_DEG / 2)
    r = TIP3P_ROH_A
    return np.array([[0, 0, 0], [0, r * np.sin(a), r * np.cos(a)], [0, -r * np.sin(a), r * np.cos(a)]]) + origin


def test_formaldehyde_vacuum_npi_star_against_best_estimates():
    """Schreiber, Silva-Junior, Sauer, Thiel, J. Chem. Phys. 128, 134110
    (2008), best estimates 1A2 3.88 eV, 3A2 3.50 eV (from memory). B3LYP response on that set deviates by about 0.2-0.3 eV
    for singlets and more for triplets (Silva-Junior et al., J. Chem. Phys.
    129, 104103 (2008); from memory) and the geometry here is only close
    to theirs, so the tolerances are 0.3 eV (singlet) and 0.45 eV (triplet).
    The states must also be the n->pi* pair: dark (f < 1e-6 by symmetry)
    and of HOMO->LUMO character."""
    sym, pos = formaldehyde()
    m = Method(xc="b3lyp", basis="def2-svp", n_singlets=1, n_triplets=1, response_grid_level=1)
    r = excitations(Cluster.from_arrays(sym, pos), m, vacuum=False)
    assert r.s1.energy_eV == pytest.approx(3.88, abs=0.3)
    assert r.t1.energy_eV == pytest.approx(3.50, abs=0.45)
    lead = r.s1.pairs.split(",")[0].split()
    assert r.s1.osc_strength < 1e-6 and lead[0] == "H->L" and float(lead[1]) > 0.9
    assert 0 < r.delta_est_eV < 1.0


def _tip3p_water(o_pos, oh_dir, rng):
    """TIP3P water with oxygen at o_pos, one O-H along oh_dir, the other at
    the TIP3P angle in a random plane."""
    d = oh_dir / np.linalg.norm(oh_dir)
    perp = np.cross(d, rng.normal(size=3))
    perp /= np.linalg.norm(perp)
    t = np.radians(TIP3P_HOH_DEG)
    return np.array([o_pos, o_pos + TIP3P_ROH_A * d, o_pos + TIP3P_ROH_A * (d * np.cos(t) + perp * np.sin(t))])


def hydrated_formaldehyde(seed, n_random=10):
    """A simple recipe for a water configuration (our own, not an MD
    ensemble): two waters donating a linear hydrogen bond (H...O 1.9 Å) to
    the carbonyl oxygen along its in-plane lone-pair directions (120° from
    C=O), plus ``n_random`` randomly oriented waters with O within 6.5 Å of
    the solute, at least 2.9 Å from solute atoms and 2.8 Å from each other."""
    rng = np.random.default_rng(seed)
    sym, pos = formaldehyde()
    o = pos[1]
    waters = []
    for sgn in (1, -1):
        d = np.array([0, sgn * np.sin(np.radians(60)), np.cos(np.radians(60))])
        h = o + 1.9 * d
        waters.append(_tip3p_water(h + TIP3P_ROH_A * d, -d, rng))
    centre = pos.mean(0)
    while len(waters) < 2 + n_random:
        ow = centre + rng.uniform(-6.5, 6.5, 3)
        if np.linalg.norm(ow - centre) > 6.5 or np.min(np.linalg.norm(pos - ow, axis=1)) < 2.9:
            continue
        if any(np.linalg.norm(w[0] - ow) < 2.8 for w in waters):
            continue
        rot = Rotation.random(random_state=int(rng.integers(1 << 30)))
        waters.append(rot.apply(water()) + ow)
    env = np.vstack(waters)
    return Cluster.from_arrays(sym, pos, env, np.tile([TIP3P_QO, TIP3P_QH, TIP3P_QH], len(waters)))


def test_carbonyl_npi_star_blue_shift_in_tip3p_water():
    """Experiment: acetone n->pi* shifts by +0.221 eV from vapour to water
    (Renge, J. Phys. Chem. A 113, 10678 (2009)); a polarisable CC/MM model
    gives +0.14 to +0.15 eV (Aidas et al., J. Phys. Chem. A 109, 8001
    (2005)). Our model is cruder: formaldehyde instead of acetone, fixed
    TIP3P charges (no polarisation, no dispersion), three hand-built
    configurations instead of an MD average, a small basis. We therefore
    check the sign, that the shift is a blue shift of the followed n->pi*
    state in every configuration, and the mean within 0.15 eV of +0.22 eV.
    A red shift or a shift above 0.37 eV would mean wrong electrostatics."""
    m = Method(xc="b3lyp", basis="6-31g", n_singlets=1, n_triplets=0, grid_level=2, response_grid_level=1)
    results = excitation_series([hydrated_formaldehyde(s) for s in range(3)], m)
    shifts = np.array([r.s1.followed_shift_eV for r in results])
    assert all(r.s1.follow_overlap > 0.95 for r in results)
    assert np.all(shifts > 0.03)
    assert shifts.mean() == pytest.approx(0.221, abs=0.15)


def _sheets(distance_A, half_width_A, spacing_A, q_e):
    """+q sheet at z = -d and -q sheet at z = +d (square grids)."""
    g = np.arange(-half_width_A, half_width_A + 1e-9, spacing_A)
    xx, yy = np.meshgrid(g, g)
    plane = np.column_stack([xx.ravel(), yy.ravel()])
    lower = np.column_stack([plane, np.full(len(plane), -distance_A)])
    upper = np.column_stack([plane, np.full(len(plane), distance_A)])
    return np.vstack([lower, upper]), np.concatenate([np.full(len(plane), q_e), np.full(len(plane), -q_e)])


def _finite_field_energy(symbols, pos_A, field_au, m):
    """Independent finite-field SCF: E(F) with H = H0 + F.r for electrons
    and -sum_A Z_A F.R_A for nuclei (plain PySCF, no qmmm module)."""
    from pyscf import dft, gto

    mol = gto.M(atom=[(s, tuple(p)) for s, p in zip(symbols, pos_A)], basis=m.basis, unit="Angstrom", verbose=0)
    mf = dft.RKS(mol, xc=m.xc)
    mf.grids.level = m.grid_level
    mf.conv_tol = 1e-11
    h0 = mf.get_hcore()
    with mol.with_common_orig((0, 0, 0)):
        r_ao = mol.intor_symmetric("int1e_r", comp=3)
    mf.get_hcore = lambda *a: h0 + np.einsum("x,xij->ij", field_au, r_ao)
    e = mf.kernel()
    return e - mol.atom_charges() @ mol.atom_coords() @ field_au


def test_stark_energy_between_charge_sheets_matches_finite_field():
    """Physics: a neutral molecule in a uniform field F has
    E(F) - E(0) = -mu.F - 1/2 alpha F^2 + O(F^3). The field of two
    oppositely charged sheets 30 Å away is computed here by Coulomb's law
    from the charges themselves (its gradient vanishes at the centre by
    symmetry); mu and alpha along F come from an independent finite-field
    calculation. The quadratic term (~2e-5 Eh) must be reproduced too."""
    pos = water() - water().mean(0)
    env, q = _sheets(30.0, 60.0, 3.0, 0.006)
    m = Method(xc="b3lyp", basis="6-31g", n_singlets=0, n_triplets=0, grid_level=2, density_fit=False,
               conv_tol=1e-11, charge_smearing_A=0.0)
    r = excitations(Cluster.from_arrays(["O", "H", "H"], pos, env, q), m)
    de = r.scf_energy_Eh - r.vacuum_scf_energy_Eh
    # field at the molecule's centre (atomic units): F = sum q R / |R|^3, R from charge to point
    rvec = (pos.mean(0) - env) * A_TO_BOHR
    f_au = (q[:, None] * rvec / np.linalg.norm(rvec, axis=1)[:, None] ** 3).sum(0)
    fz = f_au[2]
    assert abs(fz) > 1e-3 and np.allclose(f_au[:2], 0, atol=1e-9)
    e0 = _finite_field_energy(["O", "H", "H"], pos, np.zeros(3), m)
    ep = _finite_field_energy(["O", "H", "H"], pos, np.array([0, 0, fz]), m)
    em = _finite_field_energy(["O", "H", "H"], pos, np.array([0, 0, -fz]), m)
    mu_z = -(ep - em) / (2 * fz)
    alpha_zz = -(ep + em - 2 * e0) / fz ** 2
    predicted = -mu_z * fz - 0.5 * alpha_zz * fz ** 2
    assert 3 < alpha_zz < 15  # water polarisability in a small basis (exp. 9.8 au, common practice)
    quad = 0.5 * alpha_zz * fz ** 2
    assert abs(de - predicted) < 0.1 * quad
    assert abs(de - (-mu_z * fz)) > 0.5 * quad  # the linear term alone is not enough


def test_water_gas_phase_dipole_against_experiment():
    """Experiment 1.8546 D (Clough, Beers, Klein, Rothman, J. Chem. Phys. 59,
    2254 (1973)) at the experimental geometry (r 0.9572 Å, 104.52°, the same
    as TIP3P). B3LYP with a diffuse double-zeta basis is within about 0.1 D
    of experiment for small molecules (common practice; Hait & Head-Gordon,
    J. Chem. Theory Comput. 14, 1969 (2018), from memory), so 0.1 D."""
    m = Method(xc="b3lyp", basis="aug-cc-pvdz", n_singlets=0, n_triplets=0)
    r = excitations(Cluster.from_arrays(["O", "H", "H"], water()), m, vacuum=False)
    mu = np.asarray(r.ground_dipole_D)
    assert np.linalg.norm(mu) == pytest.approx(1.8546, abs=0.1)
    # along the C2 axis, pointing from O to the H side (mu = sum q r convention)
    assert mu[2] > 0 and abs(mu[0]) < 1e-6 and abs(mu[1]) < 1e-6


def test_water_vertical_ip_by_delta_scf():
    """Experiment: vertical IP of water 12.6 eV (NIST Chemistry WebBook,
    photoelectron value ~12.62 eV; from memory). ΔSCF B3LYP with a diffuse
    basis is typically within 0.3 eV of experimental IPs (common practice);
    tolerance 0.4 eV. Plausibility: ΔSCF includes relaxation, so it lies
    above the B3LYP Koopmans value -e(HOMO), which underestimates IPs by
    several eV for hybrids (common practice)."""
    m = Method(xc="b3lyp", basis="aug-cc-pvdz", n_singlets=0, n_triplets=0)
    ch = charged_states(Cluster.from_arrays(["O", "H", "H"], water()), m, vacuum=False)
    assert ch.converged
    assert ch.IP_eV == pytest.approx(12.6, abs=0.4)
    assert ch.koopmans_IP_eV < ch.IP_eV - 2.0
    # water has no bound anion at this level: EA negative (unbound), small
    assert -2.0 < ch.EA_eV < 0.5


def _vacuum_potential_au(symbols, pos_A, charge, spin, at_A):
    """Electrostatic potential (hartree per e) of a vacuum B3LYP/6-31G molecule at a
    point: nuclei minus the electron density's <1/|r - R|>, from PySCF directly (an
    independent route: no clusterlab embedding, point charge or ΔSCF in it)."""
    from pyscf import dft, gto

    mol = gto.M(atom=list(zip(symbols, pos_A)), basis="6-31g", charge=charge, spin=spin, unit="Angstrom",
                verbose=0)
    mf = dft.RKS(mol) if spin == 0 else dft.UKS(mol)
    mf.xc, mf.grids.level = "b3lyp", 2
    mf.kernel()
    dm = mf.make_rdm1()
    dm = dm if dm.ndim == 2 else dm[0] + dm[1]
    at = np.asarray(at_A) * A_TO_BOHR
    with mol.with_rinv_origin(at):
        electrons = np.einsum("ij,ji", mol.intor("int1e_rinv"), dm)
    nuclei = sum(z / np.linalg.norm(at - xyz) for z, xyz in zip(mol.atom_charges(), mol.atom_coords()))
    return nuclei - electrons


@pytest.mark.parametrize("direction", [(6.0, 0.0, 0.0), (0.0, 0.0, 6.0)], ids=["x", "z"])
def test_ip_shift_sign_follows_electrostatics(direction):
    """Physics: to first order a point charge q at R shifts the IP by
    q [V_cation(R) - V_neutral(R)] and the EA by q [V_neutral(R) - V_anion(R)],
    with V each vacuum state's own electrostatic potential (nuclei and
    electrons), computed here with PySCF directly. A -0.5 e charge 6 Å from
    the centre gives about -1.2 eV (-0.5/6 Å as a point-charge estimate; the
    ions' dipoles move it by up to 50 meV along z). What ΔSCF adds beyond
    first order is the states' polarisation, -1/2 Δα F^2: F = 0.5 e/(6 Å)^2 =
    3.9e-3 au, and a polarisability difference between ion and neutral up to
    15 au (water's own is about 10 au, from memory; less in 6-31G) gives at most 1.1e-4 au =
    3 meV; measured 0.2-0.3 meV. Bound: 3 meV (was 0.4 eV around the
    point-charge estimate, kept below)."""
    from clusterlab.units import COULOMB_EV_A, HARTREE_TO_EV

    m = Method(xc="b3lyp", basis="6-31g", n_singlets=0, n_triplets=0, grid_level=2)
    pos = water()
    centre = pos.mean(0)
    charge_pos = centre + np.array(direction)
    ch = charged_states(Cluster.from_arrays(["O", "H", "H"], pos, [charge_pos], [-0.5]), m)
    phi_eV = COULOMB_EV_A * -0.5 / 6.0
    assert ch.IP_shift_eV == pytest.approx(phi_eV, abs=0.4)
    assert ch.EA_shift_eV == pytest.approx(phi_eV, abs=0.4)
    sym = ["O", "H", "H"]
    v0, vp, vm = (_vacuum_potential_au(sym, pos, c, s, charge_pos) for c, s in [(0, 0), (1, 1), (-1, 1)])
    ip_first_eV = -0.5 * (vp - v0) * HARTREE_TO_EV
    ea_first_eV = -0.5 * (v0 - vm) * HARTREE_TO_EV
    assert ch.IP_shift_eV == pytest.approx(ip_first_eV, abs=3e-3)
    assert ch.EA_shift_eV == pytest.approx(ea_first_eV, abs=3e-3)
