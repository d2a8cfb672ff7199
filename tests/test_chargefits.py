"""State-charge fits on a film's reference copies: conformer families, the
refit check of their cost, and the checks at the door."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from MDAnalysis.coordinates.memory import MemoryReader

from clusterlab import film_from_universe
from clusterlab.electrostatics.chargeset import StateChargeSet
from clusterlab.errors import InputError
from clusterlab.qm.method import Method
from clusterlab.study.chargefits import (
    ConformerSpread,
    add_field_response,
    conformer_spread,
    film_equivalence_classes,
    fit_state_charges,
    ground_charge_source,
)
from clusterlab.study.filmmodel import film_site_energies

from conftest import TIP3P_Q, build_water_universe, lattice_centres
from test_filmmodel import _carved_shift

#: HF/STO-3G: the state charges of the ions by ΔSCF, seconds per water
HF = Method(xc="hf", basis="sto-3g", density_fit=False)


def _two_shape_water_film():
    """64 TIP3P-like waters; the odd-numbered ones bent to 85° (O-H kept at 0.9572 Å)."""
    rng = np.random.default_rng(21)
    box = np.array([3.1 * 4] * 3 + [90.0] * 3)
    u, _ = build_water_universe(lattice_centres(4, 0.15, rng), box, seed=2)
    pos = u.atoms.positions.astype(float).copy()
    film0 = film_from_universe(u)
    whole = film0.frame_geometry(0).positions_A
    for k in range(1, 64, 2):
        o, h1, h2 = whole[3 * k], whole[3 * k + 1], whole[3 * k + 2]
        a, b = h1 - o, h2 - o
        n = np.cross(a, b)
        n /= np.linalg.norm(n)
        ua = a / np.linalg.norm(a)
        t = np.deg2rad(85.0)
        new_b = 0.9572 * (np.cos(t) * ua + np.sin(t) * np.cross(n, ua))
        pos[3 * k + 2] = o + new_b
        pos[3 * k + 1] = o + a
    u.load_new(pos[None].astype(np.float32), format=MemoryReader, dimensions=box[None].astype(np.float32))
    return film_from_universe(u)


def test_conformer_families_and_spread():
    """Copies of two shapes (HOH 104.5° and 85°). With one reference (a
    104.5° copy) the refit check of conformer_spread finds a clear error on the
    85° copies; with two conformer references it drops to the fit noise. The
    refit shifts are checked against an independent path (state_charges on the
    copy, Film.carve, Coulomb's law), and the reference copies' own errors are zero
    (HF/STO-3G ESP charges of the cation; ΔSCF)."""
    from clusterlab.qm.statecharges import state_charges

    film = _two_shape_water_film()
    kw = dict(states=("S0", "cation"), transition=False)
    one = fit_state_charges(film, HF, molecules={"WAT": 0}, **kw)
    two = fit_state_charges(film, HF, molecules={"WAT": 0}, n_conformers=2, min_conformer_rmsd_A=0.05, **kw)
    assert [c.molecule % 2 for c in two.conformers["WAT"]] == [0, 1]
    refs2 = [c.molecule for c in two.conformers["WAT"]]
    mols = sorted({0, 1, 2, 3, 5, 8, 9, *refs2})
    s1 = conformer_spread(film, one, HF, radius_A=6.0, states=("cation",), molecules=mols)
    s2 = conformer_spread(film, two, HF, radius_A=6.0, states=("cation",), molecules=mols)
    e1 = s1.table.set_index("molecule")["error_eV"]
    e2 = s2.table.set_index("molecule")["error_eV"]
    assert e1.loc[0] == 0.0 and all(e2.loc[r] == 0.0 for r in refs2)
    assert (s2.table.set_index("molecule")["conformer"].loc[mols].to_numpy() == np.array(mols) % 2).all()
    odd = [k for k in mols if k % 2 and k not in refs2]
    rms1 = float(np.sqrt(np.mean(e1.loc[odd] ** 2)))
    rms2 = float(np.sqrt(np.mean(e2.loc[odd] ** 2)))
    # The yardstick is the film's own fit noise, not a number read off this test: with one
    # reference the same-shape (104.5°) copies keep a small error because the fit points
    # turn with the lab frame. The 85° copies must stand clearly above that noise with one
    # reference, and drop to it (within half a meV) with two references, which include their shape.
    even = [k for k in mols if k % 2 == 0 and k not in refs2 and k != 0]
    noise = float(np.sqrt(np.mean(e1.loc[even] ** 2)))
    assert rms1 > 3 * noise
    assert rms2 < noise + 0.5e-3
    assert rms2 < 0.3 * rms1
    # the RMS to quote travels with the result, over all refitted copies
    assert s1.rms_error_eV["cation"] == pytest.approx(float(np.sqrt(np.mean(e1**2))), rel=1e-12)
    assert s2.summary()["cation_rms_error_eV"] == s2.rms_error_eV["cation"] and s2.summary()["n_copies"] == len(mols)
    back_spread = ConformerSpread.from_json(s2.to_json())
    pd.testing.assert_frame_equal(back_spread.table, s2.table, check_exact=True)
    assert back_spread.rms_error_eV == s2.rms_error_eV and back_spread.method == HF.to_dict()
    # independent path for one copy
    c = film.carve(5, 6.0)
    sc = state_charges(c.qm_symbols, c.qm_positions, HF, states=("S0", "cation"), transition=False)
    assert s2.table.set_index("molecule").loc[5, "shift_refit_eV"] == pytest.approx(
        _carved_shift(c, sc.difference("cation")), abs=1e-10)
    # the film model uses each copy's family charges: molecule 5 (85°) takes reference 2's
    df = film_site_energies(film, two, states=("cation",), radius_A=6.0, molecules=[5], progress=False).table
    ref2 = two.conformers["WAT"][1].charges_e
    assert float(df["cation_shift_eV"].iloc[0]) == pytest.approx(_carved_shift(c, ref2["cation"] - ref2["S0"]),
                                                                  abs=1e-10)
    back = StateChargeSet.from_json(two.to_json())
    assert len(back.conformers["WAT"]) == 2 and np.allclose(back.conformers["WAT"][1].positions_A,
                                                            two.conformers["WAT"][1].positions_A)


def test_fits_take_a_method_and_no_qm_settings_of_their_own():
    """The Method is the one source of QM settings: an "xc/basis" string is named
    with its type, and QM settings among the fit options are refused (before any QM)."""
    film = _two_shape_water_film()
    with pytest.raises(InputError, match="fit_state_charges needs a clusterlab.Method.*got str"):
        fit_state_charges(film, "hf/sto-3g")
    with pytest.raises(InputError, match=r"\['grid_level'\] are QM settings"):
        fit_state_charges(film, HF, grid_level=1)
    cset = StateChargeSet.from_arrays({"WAT": {"S0": TIP3P_Q, "cation": [0.0, 0.5, 0.5]}})
    with pytest.raises(InputError, match="conformer_spread needs a clusterlab.Method"):
        conformer_spread(film, cset, "hf/sto-3g", radius_A=6.0)
    with pytest.raises(InputError, match="add_field_response needs a clusterlab.Method"):
        add_field_response(cset, film, "hf/sto-3g")
    with pytest.raises(InputError, match="no reference geometry"):
        add_field_response(cset, film, HF)


def test_equivalence_classes_from_the_film_and_fitted_ground_charges():
    """Water's two hydrogens are topologically equivalent (bonds from distances,
    the synthetic film has none); the fitted S0 charges serve as a charge source."""
    u, _ = build_water_universe(lattice_centres(2, 0.1, np.random.default_rng(0)), np.array([6.2] * 3 + [90.0] * 3))
    film = film_from_universe(u)
    lab = film_equivalence_classes(film)["WAT"]
    assert lab[1] == lab[2] != lab[0]
    cset = StateChargeSet.from_arrays({"WAT": {"S0": [-0.8, 0.4, 0.4], "cation": [0.0, 0.5, 0.5]}})
    sym = cset.symmetrized(film_equivalence_classes(film, cset.resnames))
    assert np.allclose(sym.charges_e["WAT"]["S0"], [-0.8, 0.4, 0.4])
    src = ground_charge_source(cset)
    assert np.allclose(src.atom_charges(film)[:3], [-0.8, 0.4, 0.4])
    with pytest.raises(InputError, match="no molecules named 'BTH'"):
        film_equivalence_classes(film, ["BTH"])


def test_field_response_in_worker_processes_matches_in_process():
    """Two conformer references (HOH 104.5° and 85°) fitted by finite fields in
    this process and in two spawned worker processes: the same Δμ and Δα on each
    reference (the same engine calculations, only placed elsewhere), and the two
    shapes give different tensors, so a swapped assignment would show."""
    from clusterlab.electrostatics.chargeset import ConformerCharges

    film = _two_shape_water_film()
    pos = film.frame_geometry(0).positions_A
    refs = [ConformerCharges(positions_A=pos[film.molecule_atoms(m)], charges_e={"S0": np.array(TIP3P_Q)},
                             frame=0, molecule=m) for m in (0, 1)]
    cset = StateChargeSet.from_conformers({"WAT": refs})
    cis = HF.replace(n_singlets=1, n_triplets=0, excited="tda", threads=1)
    kw = dict(states=("S1",), steps_V_A=(0.2,), progress=False)
    here = add_field_response(cset, film, cis, workers=1, **kw)
    there = add_field_response(cset, film, cis, workers=2, **kw)
    a, b = here.conformers["WAT"], there.conformers["WAT"]
    for ra, rb in zip(a, b):
        np.testing.assert_allclose(rb.dmu_D["S1"], ra.dmu_D["S1"], atol=1e-7)
        np.testing.assert_allclose(rb.dalpha_A3["S1"], ra.dalpha_A3["S1"], atol=1e-6)
    assert np.abs(a[0].dalpha_A3["S1"] - a[1].dalpha_A3["S1"]).max() > 0.05
    with pytest.raises(InputError, match="workers=0 must be at least 1"):
        add_field_response(cset, film, cis, workers=0, **kw)
