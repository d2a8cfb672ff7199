"""Bad input as a new user would type it: every case is a named error.

One table of cases (issue 18): each row calls the library (or the CLI) with one
bad value and asserts the error class and that the message names the
offending value, so that a new check cannot be a raw library error and an old
one cannot quietly stop naming what was wrong. The rows marked ``good`` gave a
clear error before issue 18 and are kept here so they stay that way.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from typing import Any, Callable

import MDAnalysis as mda
import numpy as np
import pandas as pd
import pytest

from clusterlab import Method, ResultStore, film_from_universe, load_film, sample_sites
from clusterlab.errors import CarvingError, ChargeError, FilmError, InputError, ProvenanceError, StudyFileError
from clusterlab.export import export_study, hopping_rates, pair_table
from clusterlab.qm.calc import check_method
from clusterlab.ranges import RepeatedValueWarning
from clusterlab.stats import disorder_stats
from clusterlab.study import choose_molecules
from clusterlab.study.sample import choose_frames
from clusterlab.studyfile import validate

from conftest import build_water_universe, lattice_centres

BOX = np.array([12.0, 12.0, 12.0, 90.0, 90.0, 90.0])


def _universe(n_frames: int = 2):
    u, _ = build_water_universe(lattice_centres(2, 0.05, np.random.default_rng(0)), BOX, n_frames=n_frames)
    return u


@pytest.fixture(scope="module")
def film():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return film_from_universe(_universe())


@pytest.fixture(scope="module")
def sites_pairs(film):
    pairs = pair_table(film, 0, 5.5)
    pairs["lam"] = 0.2
    pairs.loc[pairs.index[0], "lam"] = -0.1
    pairs["J_hole_eV"] = 0.01
    sites = pd.DataFrame({"frame": 0, "molecule": np.arange(film.n_molecules), "IP_eV": 6.0})
    return sites, pairs


def _nan_film():
    u = _universe(n_frames=1)
    u.trajectory.coordinate_array[0, 4] = np.nan  # atom 4: molecule 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return film_from_universe(u, name="nan-film")


def _inf_charge_film(tmp_path):
    csv = tmp_path / "q.csv"
    csv.write_text("resname,name,charge\nWAT,OW,inf\nWAT,HW1,0.417\nWAT,HW2,0.417\n")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return film_from_universe(_universe(1), charges=str(csv)).charges


def _empty_file(tmp_path):
    (tmp_path / "empty.gro").write_bytes(b"")
    return load_film(tmp_path / "empty.gro")


def _cut_trajectory(tmp_path):
    """A four-frame XTC cut inside its last frame (a copy interrupted)."""
    u = _universe(n_frames=4)
    u.atoms.write(str(tmp_path / "w.pdb"))
    with mda.Writer(str(tmp_path / "w.xtc"), len(u.atoms)) as w:
        for _ in u.trajectory:
            w.write(u.atoms)
    data = (tmp_path / "w.xtc").read_bytes()
    (tmp_path / "w.xtc").write_bytes(data[:-5])
    return load_film(tmp_path / "w.pdb", tmp_path / "w.xtc")


def _study(**sections: dict) -> dict:
    return {"film": {"topology": "film.pdb"}, **sections}


@dataclass(frozen=True)
class Case:
    name: str
    call: Callable[..., Any]  # called with the fixtures it names
    error: type
    names: str  # text the message must contain (the offending value)
    good: bool = False  # a clear error before issue 18 too


CASES = [
    # ---- carving and selections
    Case("qm_shell text", lambda film, **_: film.carve(0, 5.0, qm_shell="x"), CarvingError, "'x'"),
    Case("periodic text", lambda film, **_: film.carve(0, 5.0, periodic="no"), CarvingError, "'no'"),
    Case("radius 1e4 A", lambda film, **_: film.carve(0, 1e4), CarvingError, "radius 10000 Å"),
    Case("radius text", lambda film, **_: film.carve(0, "big"), CarvingError, "'big'", good=True),
    Case("negative radius", lambda film, **_: film.carve(0, -2.0), CarvingError, "-2.0", good=True),
    Case("molecule out of range", lambda film, **_: film.carve(99, 5.0), CarvingError, "99", good=True),
    Case("frame out of range", lambda film, **_: film.carve(0, 5.0, frame=7), CarvingError, "7", good=True),
    Case("unknown rule", lambda film, **_: film.carve(0, 5.0, rule="sphere"), CarvingError, "'sphere'", good=True),
    Case("select text id", lambda film, **_: film.select(["a"]), CarvingError, "'a'"),
    Case("select empty list", lambda film, **_: film.select([]), CarvingError, "[]"),
    Case("selection matches nothing", lambda film, **_: film.select("resname XYZ"), CarvingError, "'resname XYZ'",
         good=True),
    Case("empty molecule list", lambda film, **_: choose_molecules(film, []), InputError, "[]"),
    Case("molecules as one int", lambda film, **_: choose_molecules(film, 3), InputError, "molecules=3", good=True),
    Case("empty frame list", lambda film, **_: choose_frames(film, []), InputError, "[]"),
    Case("text frame", lambda film, **_: choose_frames(film, ["a"]), InputError, "'a'"),
    Case("frame beyond the film", lambda film, **_: choose_frames(film, [5]), InputError, "5", good=True),
    # ---- film content
    Case("NaN coordinate", lambda **_: _nan_film().frame_geometry(0), FilmError, "atoms [4] in molecule(s) [1]"),
    Case("inf charge in a CSV", lambda tmp_path, **_: _inf_charge_film(tmp_path), ChargeError, "inf"),
    Case("empty topology file", lambda tmp_path, **_: _empty_file(tmp_path), FilmError, "empty.gro' is empty"),
    Case("truncated trajectory", lambda tmp_path, **_: _cut_trajectory(tmp_path), FilmError,
         "frame 3 (the last of 4) cannot be read"),
    # ---- methods
    Case("n_singlets text", lambda **_: Method(n_singlets="abc"), InputError, "'abc'", good=True),
    Case("n_singlets None", lambda **_: Method(n_singlets=None), InputError, "None", good=True),
    Case("conv_tol text", lambda **_: Method(conv_tol="tight"), InputError, "'tight'", good=True),
    Case("misspelt preset keyword", lambda **_: Method.preset("draft", n_singlet=3), InputError, "n_singlet",
         good=True),
    Case("from_dict of a list", lambda **_: Method.from_dict([1, 2]), InputError, "list", good=True),
    Case("unknown basis", lambda **_: check_method(Method(basis="6-31x"), ["O", "H"]), InputError, "6-31x",
         good=True),
    Case("unknown functional", lambda **_: check_method(Method(xc="b3lpy"), ["O"]), InputError, "b3lpy", good=True),
    Case("unknown basis before any task",
         lambda film, tmp_path, **_: sample_sites(film, [0], [0], 4.0, Method(basis="6-31x"),
                                                  store=tmp_path / "s.sqlite", runner="serial", progress=False),
         InputError, "6-31x"),
    # ---- statistics
    Case("confidence text", lambda **_: disorder_stats(np.arange(10.0), confidence="high"), InputError, "'high'"),
    Case("n_boot text", lambda **_: disorder_stats(np.arange(10.0), n_boot="many"), InputError, "'many'"),
    Case("n_boot too small", lambda **_: disorder_stats(np.arange(10.0), n_boot=5), InputError, "n_boot=5",
         good=True),
    Case("CI method", lambda **_: disorder_stats(np.arange(10.0), method="jackknife"), InputError, "'jackknife'",
         good=True),
    # ---- export, pairs, rates
    Case("export cutoff text", lambda film, tmp_path, **_: export_study(film, tmp_path / "e", cutoff_A="8"),
         InputError, "'8'"),
    Case("pair cutoff beyond half the box", lambda film, **_: pair_table(film, 0, 7.0), InputError, "7.0"),
    Case("pair cutoff text", lambda film, **_: pair_table(film, 0, "8"), InputError, "'8'"),
    Case("misspelt rate keyword",
         lambda film, tmp_path, **_: export_study(film, tmp_path / "e", cutoff_A=5.0, rates={"lamda_eV": 0.2}),
         InputError, "'lamda_eV'"),
    Case("negative per-pair lambda",
         lambda sites_pairs, **_: hopping_rates(*sites_pairs, lambda_eV="lam"), InputError, "'lam'"),
    Case("field vector of length 2",
         lambda sites_pairs, **_: hopping_rates(*sites_pairs, lambda_eV=0.2, field_V_per_A=[1e-3, 0.0]),
         InputError, "[0.001, 0.0]"),
    Case("unknown rate law", lambda sites_pairs, **_: hopping_rates(*sites_pairs, law="marcos"), InputError,
         "'marcos'", good=True),
    # ---- study files
    Case("workers = 0", lambda **_: validate(_study(runner={"workers": 0})), StudyFileError, "workers = 0"),
    Case("quantity of a state not computed",
         lambda **_: validate(_study(sample={"quantities": ["S9_eV"]})), StudyFileError, "'S9_eV'"),
    Case("quantity that is no column", lambda **_: validate(_study(sample={"quantities": ["S1"]})), StudyFileError,
         "'S1'"),
    Case("IP without charged states", lambda **_: validate(_study(sample={"quantities": ["IP_eV"]})),
         StudyFileError, "'IP_eV'"),
    Case("frames text", lambda **_: validate(_study(sample={"frames": ["a"]})), StudyFileError, "'a'"),
    Case("unknown section", lambda **_: validate(_study(smaple={})), StudyFileError, "[smaple]", good=True),
    Case("unknown key", lambda **_: validate(_study(sample={"radious": 5.0})), StudyFileError, "'radious'",
         good=True),
    Case("wrong type", lambda **_: validate(_study(sample={"n": "ten"})), StudyFileError, "'ten'", good=True),
    # ---- stores
    Case("store path is a directory", lambda tmp_path, **_: ResultStore(tmp_path), StudyFileError, "is a directory"),
    Case("read-only store missing", lambda tmp_path, **_: ResultStore(tmp_path / "no.sqlite", readonly=True),
         StudyFileError, "no.sqlite", good=True),
    Case("store of another film",
         lambda film, tmp_path, **_: _claim_twice(tmp_path, film), ProvenanceError, "0123456789abcdef0123"),
]


def _claim_twice(tmp_path, film):
    with ResultStore(tmp_path / "claims.sqlite") as st:
        st.claim_film("0123456789abcdef0123", topology="other.pdb")
        st.claim_film(film.film_id, topology=film.topology_path)


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_bad_input_is_a_named_error(case, film, sites_pairs, tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(case.error) as err:
            case.call(film=film, sites_pairs=sites_pairs, tmp_path=tmp_path)
    assert case.names in str(err.value), f"{case.name}: {err.value}"
    assert isinstance(err.value, InputError)  # every bad input is an InputError (and a ValueError)


def test_no_task_was_queued_for_an_unknown_basis(film, tmp_path):
    path = tmp_path / "s.sqlite"
    with pytest.raises(InputError, match="6-31x"):
        sample_sites(film, [0, 1], [0], 4.0, Method(basis="6-31x"), store=path, runner="serial", progress=False)
    with ResultStore(path) as st:
        assert st.counts()["total"] == 0  # not one failed record per site


CLI_CASES = [
    (["report", "{store}", "--quantity", "S9_eV", "--out", "{tmp}/r"], "'S9_eV'"),
    (["report", "{store}", "--out", "{tmp}/afile"], "afile"),
    (["report", "{tmp}", "--out", "{tmp}/r"], "is a directory"),
    (["report", "{tmp}/missing.sqlite"], "missing.sqlite"),
]


@pytest.mark.parametrize("argv,names", CLI_CASES, ids=["quantity", "out-is-a-file", "store-is-a-dir", "no-store"])
def test_cli_bad_input_exits_1_and_names_it(argv, names, tmp_path, capsys):
    from clusterlab.cli import main

    store = tmp_path / "s.sqlite"
    with ResultStore(store) as st:
        for m in range(3):
            st.put(f"k{m}", {"kind": "excitations", "payload": {}}, "{}",
                   {"frame": 0, "molecule": m, "radius_A": 5.0, "S1_eV": 3.0 + 0.1 * m})
    (tmp_path / "afile").write_text("x")
    args = [a.format(store=store, tmp=tmp_path) for a in argv]
    assert main(args) == 1
    err = capsys.readouterr().err
    assert names in err and re.match(r"clusterlab report: error: ", err), err


def test_repeated_frames_are_computed_and_counted_once(film, tmp_path):
    """frames=[0, 0] used to give two rows per site for one calculation each (a too-narrow interval)."""
    method = Method(xc="hf", basis="sto-3g", n_singlets=1, n_triplets=0)
    with pytest.warns(RepeatedValueWarning, match=r"frames \[0, 0\] name 0 more than once"):
        s = sample_sites(film, [0, 1], [0, 0], 3.0, method, store=tmp_path / "s.sqlite", runner="serial",
                         progress=False)
    assert len(s.table) == 2 and sorted(s.table.molecule) == [0, 1] and set(s.table.frame) == {0}
    assert s.report.n_tasks == 2 and s.report.done == 2 and s.report.duplicates == 0


def test_cli_run_in_which_every_task_failed_exits_nonzero(monkeypatch, tmp_path, capsys):
    import clusterlab.pipeline as pipeline
    import clusterlab.studyfile as studyfile
    from clusterlab.cli import main
    from clusterlab.runner import RunReport
    from clusterlab.study import SiteSample

    def fake_run(study, **kw):
        rep = RunReport(runner="serial", n_tasks=3, failed=3)
        sample = SiteSample(table=pd.DataFrame(), report=rep, failures=["frame 0 molecule 0 radius 5.0: SCF blew up"])
        return pipeline.StudyOutcome(film=None, report_dir=str(tmp_path), sample=sample)

    monkeypatch.setattr(studyfile, "load_study", lambda path, over: {})
    monkeypatch.setattr(pipeline, "run_study", fake_run)
    assert main(["run", "study.toml", "--quiet"]) == 1
    assert "every one of the 3 site calculations failed" in capsys.readouterr().err
    # one finished site is a partial success: exit 0 (the failures are in the report)
    ok = fake_run({})
    ok.sample.report.failed, ok.sample.report.done = 2, 1
    ok.sample.table = pd.DataFrame({"S1_eV": [3.0]})
    monkeypatch.setattr(pipeline, "run_study", lambda study, **kw: ok)
    assert main(["run", "study.toml", "--quiet"]) == 0


def test_a_qm_shell_that_fills_the_qm_region_is_warned_before_anything_runs():
    # a 4 x 4 x 4 water lattice (4 Å spacing): an 8 Å QM shell pulls dozens of neighbours into the QM
    # region. cluster_task only describes the task (nothing runs), and warns with the counts there.
    from clusterlab.errors import QMRegionSizeWarning
    from clusterlab.qm import engine
    from clusterlab.study.tasks import cluster_task

    box = np.array([16.0, 16.0, 16.0, 90.0, 90.0, 90.0])
    u, _ = build_water_universe(lattice_centres(4, 0.05, np.random.default_rng(1)), box)
    film = film_from_universe(u)
    method = Method(xc="hf", basis="sto-3g")
    engine._QM_SIZE_WARNED.clear()
    with warnings.catch_warnings():
        warnings.simplefilter("error", QMRegionSizeWarning)
        cluster_task(film, 0, 8.0, method, qm_shell_A=1.0)  # no neighbour within 1 Å: no word
    big = film.carve(0, 8.0, qm_shell=8.0)
    k = len(big.qm_molecules)
    assert big.n_qm_atoms == 3 * k > 100
    with pytest.warns(QMRegionSizeWarning) as rec:
        cluster_task(film, 0, 8.0, method, qm_shell_A=8.0)
    msg = str(rec[0].message)
    assert rec[0].filename == __file__  # points at the caller
    # STO-3G is a minimal basis: 5 functions on O (1s 2s 2p), 1 on H (Hehre, Stewart & Pople, J. Chem.
    # Phys. 51, 2657, 1969), so 7 per water and a cost factor of k³ for k waters
    assert f"holds {3 * k} atoms in {k} molecules (3 in the central molecule 0, {3 * k - 3} added" in msg
    assert f"{7 * k} basis functions (sto-3g) against 7" in msg and f"≈ {k ** 3:.0f}×" in msg
    assert "rough estimate" in msg
    # once per process and region size: the next radius of the same scan says nothing more
    with warnings.catch_warnings():
        warnings.simplefilter("error", QMRegionSizeWarning)
        cluster_task(film, 0, 10.0, method, qm_shell_A=8.0)
    # the engine gives the same text to the result's warnings (qm_region_size_note)
    assert engine.qm_region_size_note(big, method) == msg
    assert engine.qm_region_size_note(film.carve(0, 8.0), method) is None
