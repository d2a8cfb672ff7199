"""Transfer integrals of film pairs through the serial runner and the result store.

Outside check: for two identical molecules related by a translation the
two-state model gives dimer HOMO/HOMO-1 (LUMO/LUMO+1) splittings of exactly
2|J| (textbook physics of a symmetric dimer); the pair geometry across the
periodic boundary is checked against the minimum image written out here.
"""

from __future__ import annotations

import json

import MDAnalysis as mda
import numpy as np
import pandas as pd
import pytest
from MDAnalysis.coordinates.memory import MemoryReader

from clusterlab import ResultStore, film_from_universe
from clusterlab.errors import InputError
from clusterlab.export import pair_table
from clusterlab.export.transfer_tasks import (
    TRANSFER_KIND,
    compute_transfer_integrals,
    pair_geometry,
    transfer_task,
)
from clusterlab.qm.method import Method
from clusterlab.qm.transfer import transfer_integrals

#: HF/STO-3G with the SCF settings the projective method was written with (no DF, bare charges)
HF_STO = Method(xc="hf", basis="sto-3g", density_fit=False, charge_smearing_A=0.0)

L = 12.0
H2 = np.array([[0.0, 0.0, -0.37], [0.0, 0.0, 0.37]])  # r(HH) = 0.74 Å (common practice)


@pytest.fixture(scope="module")
def h2_film():
    """Three made-up polar H2 molecules (charges +-0.2 e) in a 12 Å cubic box.

    Molecule 1 sits across the x face from molecule 0: their minimum-image
    separation is 3 Å along -x. Molecule 2 is 5 Å away from both along y.
    """
    centres = np.array([[1.0, 6.0, 6.0], [10.0, 6.0, 6.0], [0.0, 11.0, 6.0]])
    pos = np.vstack([c + H2 for c in centres]) % L
    u = mda.Universe.empty(6, n_residues=3, atom_resindex=np.repeat(np.arange(3), 2), trajectory=True)
    u.add_TopologyAttr("names", ["H1", "H2"] * 3)
    u.add_TopologyAttr("elements", ["H", "H"] * 3)
    u.add_TopologyAttr("resnames", ["HHX"] * 3)
    u.add_TopologyAttr("resids", [1, 2, 3])
    u.add_TopologyAttr("charges", [0.2, -0.2] * 3)
    u.load_new(pos[None].astype(np.float32), format=MemoryReader,
               dimensions=np.array([[L, L, L, 90, 90, 90]], dtype=np.float32))
    return film_from_universe(u, name="h2 trio")


def test_pair_geometry_is_the_minimum_image(h2_film):
    si, pi, sj, pj = pair_geometry(h2_film, 0, 0, 1)
    assert si == sj == ["H", "H"]
    assert np.allclose(pj.mean(0) - pi.mean(0), [-3.0, 0, 0], atol=1e-5)
    assert np.allclose(pj - pj.mean(0), H2, atol=1e-5)  # whole, not split by the face


def test_transfer_tasks_store_and_skip(h2_film, tmp_path):
    pairs = pair_table(h2_film, 0, 5.5)
    assert {(0, 1), (0, 2), (1, 2)} == set(zip(pairs.i, pairs.j))
    store = ResultStore(tmp_path / "t.sqlite")
    out = compute_transfer_integrals(h2_film, pairs, 0, HF_STO, store=store, max_pairs=2)
    assert len(out) == 2 and out.converged.all()
    assert list(zip(out.i, out.j))[0] == (0, 1)  # closest pair first
    rep = out.attrs["report"]
    assert (rep.done, rep.skipped, rep.failed) == (2, 0, 0)
    # symmetric (translated) dimer: |J| = half the dimer splitting, two-state model;
    # mixing with other orbitals makes it approximate - 5 % (common practice)
    rec = store.get(transfer_task(h2_film, 0, 0, 1, HF_STO).key)
    res = json.loads(rec.result_json)
    e = res["dimer_mo_energy_eV"]  # HOMO-1, HOMO, LUMO, LUMO+1
    assert abs(out.J_hole_eV.iloc[0]) == pytest.approx((e[1] - e[0]) / 2, rel=0.05)
    assert abs(out.J_electron_eV.iloc[0]) == pytest.approx((e[3] - e[2]) / 2, rel=0.05)
    # same numbers as a direct call on the minimum-image geometry
    _, pi, _, pj = pair_geometry(h2_film, 0, 0, 1)
    direct = transfer_integrals(["H", "H"], pi, ["H", "H"], pj, HF_STO)
    assert out.J_hole_eV.iloc[0] == pytest.approx(direct.j_hole_eV, abs=1e-7)
    # a re-run computes only the pair not yet stored; (1, 0) is the same task as (0, 1)
    swapped = pd.DataFrame({"i": [1, 2, 2], "j": [0, 0, 1]})
    again = compute_transfer_integrals(h2_film, swapped, 0, HF_STO, store=store)
    rep2 = again.attrs["report"]
    assert (rep2.done, rep2.skipped) == (1, 2)
    assert set(zip(again.i, again.j)) == {(0, 1), (0, 2), (1, 2)}
    assert len(store.to_frame(kind=TRANSFER_KIND)) == 3
    joined = pair_table(h2_film, 0, 5.5, transfer=again)
    assert joined.J_hole_eV.notna().all() and joined.transfer_converged.all()


def test_embedding_charges_exclude_the_pair(h2_film, tmp_path):
    store = ResultStore(tmp_path / "e.sqlite")
    pairs = pd.DataFrame({"i": [0], "j": [1]})
    emb = compute_transfer_integrals(h2_film, pairs, 0, HF_STO, store=store,
                                     embed_radius_A=5.5)
    vac = compute_transfer_integrals(h2_film, pairs, 0, HF_STO, store=store)
    # only molecule 2 (two charges, 5.10 Å away) is within 5.5 Å; the pair's own atoms are not charges
    assert int(emb.n_env_charges.iloc[0]) == 2 and int(vac.n_env_charges.iloc[0]) == 0
    assert emb.J_hole_eV.iloc[0] != pytest.approx(vac.J_hole_eV.iloc[0], abs=1e-9)
    far = compute_transfer_integrals(h2_film, pairs, 0, HF_STO, store=store,
                                     embed_radius_A=1.0)
    assert int(far.n_env_charges.iloc[0]) == 0


def test_transfer_task_rejects_bad_input(h2_film):
    with pytest.raises(InputError, match="two different molecules"):
        transfer_task(h2_film, 0, 1, 1, HF_STO)
    with pytest.raises(InputError, match="embed_radius_A"):
        transfer_task(h2_film, 0, 0, 1, HF_STO, embed_radius_A=-1.0)
    a = transfer_task(h2_film, 0, 0, 1, HF_STO)
    assert a.key == transfer_task(h2_film, 0, 1, 0, HF_STO).key
    assert a.key != transfer_task(h2_film, 0, 0, 1, HF_STO.replace(basis="6-31g")).key
