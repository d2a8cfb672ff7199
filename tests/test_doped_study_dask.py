"""The doped-film study file (``studies/doped_film.toml``) at the ``--small``
settings of ``bench/doped_study.py``: the QM sample run by the serial runner and
by the Dask runner on a LocalCluster of two worker processes gives the same rows
and the same site energies (each cluster is one deterministic calculation,
wherever it runs; the refined and plain sTDA models use no warm starts)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))

from doped_study import small_study  # noqa: E402
from clusterlab.pipeline import run_study  # noqa: E402

COLUMNS = ["S1_eV", "T1_eV", "S1_shift_eV", "T1_shift_eV", "dEST_eV", "IP_eV", "EA_eV"]


@pytest.mark.slow
def test_small_doped_study_serial_and_dask_agree(tmp_path):
    from distributed import LocalCluster

    tables = {}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=":0", silence_logs=40) as lc:
        for kind in ("serial", "dask"):
            study = small_study(str(tmp_path / f"{kind}.sqlite"), str(tmp_path / f"rep_{kind}"), kind,
                                sections=["sample"])
            study["sample"]["radius"] = 4.0  # the small scan's converged radius is not needed here
            if kind == "dask":
                study["runner"]["scheduler"] = lc.scheduler_address
            out = run_study(study, progress=False, echo=lambda *_: None)
            assert out.sample.report.failed == 0 and out.sample.report.executed == 2
            tables[kind] = out.sample.table.sort_values(["frame", "molecule"]).reset_index(drop=True)
    a, b = tables["serial"], tables["dask"]
    assert a[["frame", "molecule", "species", "radius_A"]].equals(b[["frame", "molecule", "species", "radius_A"]])
    assert set(a.species) == {"GDA"} and len(a) == 2
    for c in COLUMNS:
        assert np.isfinite(a[c]).all(), c
        np.testing.assert_allclose(b[c].to_numpy(float), a[c].to_numpy(float), rtol=0, atol=1e-8, err_msg=c)
