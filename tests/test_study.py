"""Radius scans and site samples through the runner and store.

The scan and sample numbers are checked against the engine called directly
on clusters carved independently (a second path through the code), and the
statistics against :func:`clusterlab.disorder_stats` on the same column
(whose own checks against scipy are in test_stats.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from clusterlab import Method, ResultStore, disorder_stats, excitations, film_from_universe, radius_scan, sample_sites
from clusterlab.errors import InputError, ProvenanceError
from clusterlab.study import choose_molecules

from conftest import build_water_universe, lattice_centres

BOX = np.array([9.3, 9.3, 9.3, 90.0, 90.0, 90.0])
METHOD = Method.preset("draft", basis="sto-3g", n_singlets=2, n_triplets=1)


@pytest.fixture(scope="module")
def film():
    u, _ = build_water_universe(lattice_centres(3, 0.1, np.random.default_rng(0)), BOX, n_frames=2)
    return film_from_universe(u)


@pytest.fixture(autouse=True)
def _quiet():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


def test_scan_narrates_each_radius(film, tmp_path):
    lines = []
    res = radius_scan(film, 4, [3.0, 4.5], METHOD, store=tmp_path / "n.sqlite", progress=False, on_step=lines.append)
    t = res.table.set_index("radius_A")
    assert lines == res.log and len(lines) == 3
    assert lines[0].startswith("2 radii to compute; first: vacuum reference and radius 3 Å (elapsed ")
    r3 = t.loc[3.0]
    assert lines[1].startswith(f"radius 3 Å: {int(r3.n_env_molecules)} molecules, {int(r3.n_charges)} charges, "
                               f"S1 shift {1e3 * r3.S1_shift_eV:+.1f} meV")
    assert "; next: radius 4.5 Å (1 of 2; elapsed" in lines[1] and lines[1].endswith(" left)")
    assert lines[2].startswith(f"radius 4.5 Å: {int(t.loc[4.5].n_env_molecules)} molecules")
    assert "(2 of 2; elapsed" in lines[2] and "left" not in lines[2] and "next" not in lines[2]


def test_scan_cancelled_after_one_radius_keeps_it_and_cannot_judge(film, tmp_path):
    import threading

    stop = threading.Event()
    res = radius_scan(film, 4, [3.0, 4.5, 6.0], METHOD, store=tmp_path / "c.sqlite", progress=False,
                      on_result=lambda row: stop.set(), cancel=stop)
    assert list(res.table.radius_A) == [0.0, 3.0]
    assert not res.verdict.judged and not res.converged
    assert "cannot be judged yet from 1 radius (3 Å)" in res.message and "add 2 radii beyond 3 Å" in res.message


def test_radius_scan_table_store_and_resume(film, tmp_path):
    rows = []
    path = tmp_path / "scan.sqlite"
    res = radius_scan(film, 4, [4.5, 3.0], METHOD, store=path, progress=False, on_result=rows.append)
    t = res.table
    assert list(t.radius_A) == [0.0, 3.0, 4.5]  # vacuum first, radii sorted
    assert t.n_charges.iloc[0] == 0 and t.S1_shift_eV.iloc[0] == 0.0
    assert t.n_charges.iloc[1] < t.n_charges.iloc[2]
    assert [r["radius_A"] for r in rows] == [3.0, 4.5]
    # shift = embedded - vacuum, exactly as reported
    np.testing.assert_allclose(t.S1_eV - t.S1_eV.iloc[0], t.S1_shift_eV, atol=1e-9)
    # independent path: carve and call the engine directly (cold start)
    direct = excitations(film.carve(4, 4.5), METHOD)
    assert abs(direct.s1.shift_eV - t.S1_shift_eV.iloc[2]) < 1e-4  # warm start agrees with cold
    assert abs(direct.t1.energy_eV - t.T1_eV.iloc[2]) < 1e-4
    # a re-run finds everything in the store and recomputes nothing
    again = radius_scan(film, 4, [3.0, 4.5], METHOD, store=path, progress=False)
    assert again.report.skipped == 2 and again.report.done == 0
    assert again.log == ["0 radii to compute (2 already in the store) (elapsed 0 s)"]
    np.testing.assert_allclose(again.table.S1_eV, t.S1_eV)
    assert ResultStore(path).counts()["done"] == 2
    # the verdict is the detector's verdict on the same numbers
    from clusterlab import converged_radius

    finite = t[t.radius_A > 0]
    v = converged_radius(finite.radius_A.to_numpy(), finite[res.tracked], tol=0.010)
    assert (v.converged, v.radius_A) == (res.verdict.converged, res.verdict.radius_A)
    assert set(res.tracked) >= {"S1_shift_eV", "T1_shift_eV", "dEST_eV"}
    fig = res.plot()
    assert fig.axes


def test_radius_scan_without_triplets_judges_what_was_computed(film, tmp_path):
    """n_triplets=0: T1 is NaN at every radius, so the verdict leaves T1 and dEST out (it used to
    fail on the vacuum row's T1 shift of 0.0) and equals the detector's verdict on S1 alone."""
    from clusterlab import converged_radius

    m = METHOD.replace(n_singlets=1, n_triplets=0)
    res = radius_scan(film, 4, [3.0, 4.5], m, store=tmp_path / "s.sqlite", progress=False)
    t = res.table
    assert list(t.radius_A) == [0.0, 3.0, 4.5] and t.S1_shift_eV.iloc[0] == 0.0
    assert t.T1_shift_eV.isna().all() and t.T1_eV.isna().all() and t.dEST_eV.isna().all()
    assert "T1_shift_eV" not in res.tracked and "dEST_eV" not in res.tracked and "S1_shift_eV" in res.tracked
    finite = t[t.radius_A > 0]
    v = converged_radius(finite.radius_A.to_numpy(), finite[res.tracked], tol=0.010)
    assert (v.converged, v.radius_A, v.message) == (res.verdict.converged, res.verdict.radius_A, res.message)
    assert "outer radius" not in res.message  # fixed charges: one radius, no layer named


def test_radius_scan_bad_input(film):
    with pytest.raises(InputError, match="positive and finite"):
        radius_scan(film, 0, [-1.0], METHOD, progress=False)
    with pytest.raises(InputError, match="duplicates"):
        radius_scan(film, 0, [3.0, 3.0], METHOD, progress=False)
    with pytest.raises(InputError, match="clusterlab.Method"):
        radius_scan(film, 0, [3.0], "draft", progress=False)


def test_sample_sites_statistics_and_resume(film, tmp_path):
    path = tmp_path / "sample.sqlite"
    s = sample_sites(film, "all", None, 3.0, METHOD, store=path, n=4, seed=3, runner="serial", progress=False)
    ids = choose_molecules(film, "all", n=4, seed=3)
    assert len(s.table) == 4 * 2
    assert sorted(set(s.table.molecule)) == sorted(ids.tolist())
    st = s.stats("S1_eV", n_boot=300, seed=1)
    ref = disorder_stats(s.table.S1_eV.to_numpy(), n_boot=300, seed=1)
    assert st["sigma"] == pytest.approx(ref["sigma"]) and st["n"] == 8
    # each row equals a direct engine call on the same carve
    row = s.table.iloc[3]
    direct = excitations(film.carve(int(row.molecule), 3.0, frame=int(row.frame)), METHOD)
    assert abs(direct.s1.energy_eV - row.S1_eV) < 1e-4
    sd = s.static_dynamic("S1_eV")
    assert sd["n_molecules"] == 4 and sd["n_frames"] == 2
    again = sample_sites(film, "all", None, 3.0, METHOD, store=path, n=4, seed=3, runner="serial", progress=False)
    assert again.report.skipped == 8 and again.report.done == 0


def test_choose_molecules_selection_and_errors(film):
    assert len(choose_molecules(film, "resname WAT")) == 27
    a = choose_molecules(film, "all", n=5, seed=7)
    b = choose_molecules(film, "all", n=5, seed=7)
    assert np.array_equal(a, b)
    with pytest.raises(InputError, match="exceeds"):
        choose_molecules(film, [1, 2], n=3)
    with pytest.raises(InputError, match="use n="):
        choose_molecules(film, 5)


def test_choose_molecules_and_frames_read_the_range_grammar(film):
    from clusterlab.ranges import RepeatedValueWarning
    from clusterlab.study import choose_frames

    assert choose_molecules(film, "0-4:2, 20").tolist() == [0, 2, 4, 20]   # ends included
    assert choose_molecules(film, "all").tolist() == list(range(27))
    assert choose_frames(film, "0-1") == [0, 1]
    assert choose_frames(film, "-1") == [1]
    assert choose_frames(film, None) == [0, 1] and choose_frames(film, slice(1, None)) == [1]
    with pytest.raises(InputError, match="valid molecule ids are 0..26"):
        choose_molecules(film, "25-27")
    with pytest.raises(InputError, match="the film has frames 0..1"):
        choose_frames(film, [0, 2])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(RepeatedValueWarning, match="frames"):   # a repeat would count twice
            choose_frames(film, [0, 0])


def test_site_table_keeps_one_films_finished_sites(film, tmp_path):
    """The store reader the disorder panel and the CLI share: kind, status and film filters."""
    from clusterlab.store import task_key
    from clusterlab.study import SiteSample, site_table

    path = tmp_path / "sites.sqlite"
    mine = {"film": {"film_id": film.film_id}}
    with ResultStore(path) as st:
        for m in range(4):
            k = task_key(film_id=film.film_id, frame=m % 2, molecule=m, radius_A=5.0, kind="excitations")
            st.put(k, {"kind": "excitations", "payload": mine}, "{}",
                   {"frame": m % 2, "molecule": m, "radius_A": 5.0, "S1_eV": 7.0 + 0.01 * m, "converged": True})
        other = task_key(film_id="another film", frame=0, molecule=9, radius_A=5.0, kind="excitations")
        st.put(other, {"kind": "excitations", "payload": {"film": {"film_id": "another film"}}}, "{}",
               {"frame": 0, "molecule": 9, "radius_A": 5.0, "S1_eV": 1.0})
        limit = task_key(film_id=film.film_id, frame=0, molecule=0, radius_A="inf", kind="periodic")
        st.put(limit, {"kind": "periodic", "payload": mine}, "{}",
               {"frame": 0, "molecule": 0, "radius_A": float("inf"), "S1_eV": 6.9})
        failed = task_key(film_id=film.film_id, frame=1, molecule=5, radius_A=5.0, kind="excitations")
        st.put_failure(failed, {"kind": "excitations", "payload": mine}, "SCF did not converge")
    t = site_table(path, film=film)
    assert sorted(t.molecule) == [0, 1, 2, 3] and set(t.kind) == {"excitations"}
    np.testing.assert_allclose(t.sort_values("molecule").S1_eV, [7.0, 7.01, 7.02, 7.03])
    # without a film: never the two films mixed (issue 18); a film id chooses, no centroids added
    with pytest.raises(ProvenanceError, match=film.film_id) as err:
        site_table(path)
    assert "another film" in str(err.value)
    assert sorted(site_table(path, film_id=film.film_id).molecule) == [0, 1, 2, 3]
    assert sorted(site_table(path, film_id="another").molecule) == [9]
    assert "centroid_x_A" not in site_table(path, film_id=film.film_id[:8]).columns
    # centroids from the film's own geometry when the records lack them
    row = t[t.molecule == 3].iloc[0]
    np.testing.assert_allclose([row.centroid_x_A, row.centroid_y_A, row.centroid_z_A],
                               film.frame_geometry(1, periodic=True).centroids_A[3])
    sample = SiteSample.from_store(path, film=film)
    assert set(sample.box) == {0, 1} and np.allclose(sample.box[1], film.box(1))
    assert sample.stats("S1_eV", n_boot=200, seed=0)["n"] == 4
    with pytest.raises(InputError, match="holds no finished site-energy records"):
        site_table(path, film=film, kinds=("transfer",))


def test_periodic_limit_reuses_the_scans_vacuum_and_agrees_with_a_cold_start(film, tmp_path):
    """The periodic limit is the scan's last step on the same QM region: it takes
    the vacuum calculation of the finite radii instead of repeating it (no vacuum
    time in its record), and its shift equals a cold periodic calculation that
    computes its own vacuum (independent path, to 1e-4 eV)."""
    import json

    from clusterlab.qm.periodic import periodic_excitations
    from clusterlab.study import tasks

    tasks._WARM.clear()  # earlier tests computed this QM region in this process: start from nothing
    tasks._COPIES.clear()
    path = tmp_path / "p.sqlite"
    res = radius_scan(film, 4, [3.0], METHOD, store=path, progress=False, periodic_limit=True)
    t = res.table.set_index("radius_A")
    assert np.isinf(t.index[-1])
    with ResultStore(path, readonly=True) as st:
        df = st.to_frame(status="done")
        timings = {r["kind"]: json.loads(st.get(r["key"]).result_json)["meta"]["timings_s"]
                   for _, r in df.iterrows()}
    assert "vacuum" in timings["excitations"] and "vacuum" not in timings["periodic"]
    assert t.loc[np.inf, "S1_vacuum_eV"] == t.loc[3.0, "S1_vacuum_eV"]
    cold = periodic_excitations(film.cell_cluster(4, frame=0), METHOD, vacuum=True)
    assert abs(cold.s1.shift_eV - t.loc[np.inf, "S1_shift_eV"]) < 1e-4
    assert abs(cold.t1.energy_eV - t.loc[np.inf, "T1_eV"]) < 1e-4
