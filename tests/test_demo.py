"""The demo study: one stage serves the next, and each stage says what it cost."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from clusterlab.pipeline import COSTS_FILE, StageCosts, parity_summary, run_study
from clusterlab.studyfile import validate

from test_cli import gro  # noqa: F401  (the periodic water film of the CLI tests, as a fixture)


def test_stage_costs_count_the_cpu_of_finished_children():
    """CPU time of a worker process that has exited is in the stage's ``cpu_s`` (the OS's own
    accounting, getrusage(RUSAGE_CHILDREN), POSIX), and the wall time is at least the child's."""
    clock = StageCosts()
    burn = "import time\nt = time.process_time()\nwhile time.process_time() - t < 0.4: pass\n"
    with clock.stage("work") as row:
        subprocess.run([sys.executable, "-c", burn], check=True)
        row["computed"], row["reused"] = 1.0, 0.0
    r = clock.rows["work"]
    assert r["cpu_workers_s"] >= 0.35 and r["cpu_s"] >= r["cpu_workers_s"]
    assert r["wall_s"] >= 0.35
    assert "1 calculations run, 0 from the store" in clock.lines()[0]


@pytest.mark.slow
def test_sample_takes_the_scanned_site_from_the_store_and_checks_the_model(gro, tmp_path):
    """The scanned molecule is one of the sampled ones at one of the scan's radii: the sample runs
    one calculation fewer (a store hit by task key) and its row is the scan's; the film model is
    checked on the sample's sites without new QM."""
    from scipy.stats import pearsonr

    from clusterlab.store import ResultStore
    from clusterlab.study.filmmodel import FilmModel

    study = validate({
        "film": {"topology": gro[0], "charges": gro[1]},
        "method": {"preset": "draft", "basis": "sto-3g", "n_singlets": 1, "n_triplets": 1},
        "scan": {"molecule": 4, "radii": [3.0, 4.5]},
        "sample": {"molecules": [4, 11, 20], "frames": [0], "radius": 3.0},
        "model": {"radius": 4.0, "charges_method": "hf/sto-3g"},
        "runner": {"kind": "serial"},
        "output": {"store": str(tmp_path / "st.sqlite"), "report": str(tmp_path / "rep")},
    })
    lines: list[str] = []
    out = run_study(study, progress=False, echo=lines.append)
    assert (out.costs["scan"]["computed"], out.costs["scan"]["reused"]) == (2, 0)
    assert (out.costs["sample"]["computed"], out.costs["sample"]["reused"]) == (2, 1)
    with ResultStore(tmp_path / "st.sqlite", readonly=True) as st:
        assert len(st.to_frame(kind="excitations")) == 4  # 2 radii + 2 new sites, not 5
    scanned = out.scan.table[out.scan.table.radius_A == 3.0].iloc[0]
    row = out.sample.table[out.sample.table.molecule == 4].iloc[0]
    assert row["S1_eV"] == scanned["S1_eV"] and row["wall_s"] == scanned["wall_s"]  # the one stored record
    # each stage's cost in the report folder and on the console
    saved = json.loads((tmp_path / "rep" / COSTS_FILE).read_text())["stages"]
    assert set(saved) == {"scan", "sample", "model", "total"} and saved["total"]["cpu_s"] > 0
    assert saved["sample"]["reused"] == 1
    assert any(x.strip().startswith("sample") and "1 from the store" in x for x in lines)
    summary = (tmp_path / "rep" / "summary.md").read_text()
    assert "## Timings" in summary and "sampled sites" in summary
    # parity: the model at the sample's radius on exactly the sampled sites, the same numbers as the
    # model over the whole film at that radius; r from scipy (independent library)
    pairs = out.parity
    assert sorted(pairs.molecule) == [4, 11, 20] and pairs.attrs["radius_A"] == 3.0
    whole = FilmModel(out.film, out.model.charges, radius_A=3.0, states=("S1", "T1")).run([0], progress=False).table
    ref = whole.set_index("molecule").loc[pairs.molecule, "S1_shift_eV"].to_numpy()
    np.testing.assert_allclose(pairs["S1_shift_model_eV"].to_numpy(), ref, rtol=0, atol=1e-12)
    qm = out.sample.table.set_index("molecule").loc[pairs.molecule, "S1_shift_eV"].to_numpy()
    np.testing.assert_allclose(pairs["S1_shift_qm_eV"].to_numpy(), qm, rtol=0, atol=0)
    s = parity_summary(pairs).set_index("quantity").loc["S1_shift_eV"]
    d = ref - qm
    assert s["n"] == 3 and s["rms_eV"] == pytest.approx(np.sqrt(np.mean(d ** 2)), abs=1e-14)
    assert s["r"] == pytest.approx(pearsonr(qm, ref)[0], abs=1e-12)


def test_demo_study_chains_its_stages():
    """Both demo sizes: the scanned molecule is sampled, in the scan's frame, at one of the scan's
    radii (so its site is a store hit), the scan has a verdict's radii (3, or 2 with the quick
    demo's note), and the film model keeps its response."""
    from clusterlab.demo import DEMO_SAMPLE, demo_film, demo_study
    from clusterlab.study.sample import choose_molecules

    film = demo_film()
    for quick in (True, False):
        st = demo_study("unused_dir", quick=quick, film=film)
        smp, scan = st["sample"], st["scan"]
        drawn = choose_molecules(film, smp["molecules"], n=smp["n"], seed=smp["seed"])
        assert scan["molecule"] in drawn and scan["frame"] in smp["frames"]
        assert smp["radius"] in scan["radii"] and smp == {**smp, **DEMO_SAMPLE[quick]}
        assert st["model"]["response"] is True
        if not quick:
            assert len(scan["radii"]) >= 3 and scan["periodic_limit"] and len(smp["frames"]) == 2
