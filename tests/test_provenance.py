"""A store never mixes films or methods (issue 18, "silently wrong" items).

Rules under test:
- a run into a store that holds another film's results is refused before any
  task runs, with both film ids named; ``claim_film(..., allow_another=True)``
  keeps a second film apart on purpose;
- the same film with moved atoms is another film (its content id differs);
- the readers (``site_table``, ``SiteSample.from_store``, the CLI ``report``
  and ``export``) read one film and one method, and list the choices when the
  store holds several;
- ``export_study`` refuses QM results of another film, and a table made of two
  methods; the sidecar names the sample's method.
"""

from __future__ import annotations

import json
import re
import warnings

import numpy as np
import pytest

from clusterlab import Method, ResultStore, film_from_universe
from clusterlab.cli import main as cli_main
from clusterlab.errors import ProvenanceError
from clusterlab.export import export_study
from clusterlab.runner import Task, run_tasks
from clusterlab.store import task_key
from clusterlab.study import SiteSample, site_table
from clusterlab.study.tasks import cluster_task, run_cluster_tasks

from conftest import build_water_universe, lattice_centres

BOX = np.array([9.0, 9.0, 9.0, 90.0, 90.0, 90.0])


def _film(seed: int = 0, shift_A: float = 0.0, name: str = "w8"):
    rng = np.random.default_rng(11)
    u, _ = build_water_universe(lattice_centres(2, 0.1, rng), BOX, seed=3, n_frames=1)
    if shift_A:
        pos = u.trajectory.coordinate_array
        pos[0, 0, 0] += shift_A  # one atom moved
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return film_from_universe(u, name=name)


@pytest.fixture(scope="module")
def film_a():
    return _film()


@pytest.fixture(scope="module")
def film_b():
    return _film(shift_A=0.05, name="w8-moved")


def _put_site(st: ResultStore, film, method: Method, molecule: int, s1: float) -> None:
    """A finished site record as the engine writes it (film spec and method in the payload)."""
    key = task_key(film_id=film.film_id, frame=0, molecule=molecule, radius_A=5.0, method_key=method.key(),
                   kind="excitations")
    payload = {"film": film.spec(), "frame": 0, "molecule": molecule, "radius_A": 5.0,
               "method": method.to_dict(), "kind": "excitations"}
    st.claim_film(film.film_id, topology=film.topology_path, allow_another=True)
    st.put(key, {"key": key, "kind": "excitations", "payload": payload}, "{}",
           {"frame": 0, "molecule": molecule, "radius_A": 5.0, "S1_eV": s1, "converged": True,
            "method_key": method.key(), "resname": "WAT"})


B3LYP = Method(xc="b3lyp", basis="sto-3g")
PBE0 = Method(xc="pbe0", basis="sto-3g")


def test_moved_atoms_give_another_film_id(film_a, film_b):
    assert film_a.film_id != film_b.film_id
    assert _film().film_id == film_a.film_id  # same content, same id


def test_run_into_a_store_of_another_film_is_refused_before_any_task(film_a, film_b, tmp_path):
    path = tmp_path / "s.sqlite"
    with ResultStore(path) as st:
        st.claim_film(film_a.film_id, topology=film_a.topology_path)
        tasks = [cluster_task(film_b, m, 4.0, B3LYP) for m in range(2)]
        with pytest.raises(ProvenanceError) as err:
            run_cluster_tasks(tasks, st, desc="x", runner="serial", progress=False)
        assert film_a.film_id in str(err.value) and film_b.film_id in str(err.value)
        assert st.counts()["total"] == 0  # nothing ran
        # the store's own film is accepted again (idempotent)
        st.claim_film(film_a.film_id)
        assert list(st.films()) == [film_a.film_id]


def test_records_of_an_unregistered_store_also_count(tmp_path):
    """A store written before films were registered: its records name the film."""
    path = tmp_path / "old.sqlite"
    with ResultStore(path) as st:
        st.put("k1", {"kind": "toy", "payload": {"film": {"film_id": "f-old", "topology": "old.pdb"}}}, "{}", {})
        assert st.film_ids() == {"f-old": 1}
        tasks = [Task.make("toy", {"x": 2.0, "film": {"film_id": "f-new", "topology": "new.pdb"}}, i=1)]
        with pytest.raises(ProvenanceError, match="f-old.*old.pdb.*f-new"):
            run_tasks(tasks, "clusterlab.runner:_echo_task", store=st, runner="serial", progress=False)
        # kept apart explicitly: then it runs
        st.claim_film("f-new", topology="new.pdb", allow_another=True)
        rep = run_tasks(tasks, "clusterlab.runner:_echo_task", store=st, runner="serial", progress=False)
        assert rep.done == 1 and st.film_ids() == {"f-new": 1, "f-old": 1}


def _two_method_store(path, film, methods=(B3LYP, PBE0)):
    """Three sites of ``film``, S1 = 3.0x eV with the first method and 3.2x eV with the second."""
    with ResultStore(path) as st:
        for m in range(3):
            for k, method in enumerate(methods):
                _put_site(st, film, method, m, 3.0 + 0.2 * k + 0.01 * m)
    return path


def test_readers_choose_one_film_and_one_method(film_a, film_b, tmp_path):
    path = _two_method_store(tmp_path / "mixed.sqlite", film_a)
    with ResultStore(path) as st:
        _put_site(st, film_b, B3LYP, 0, 9.0)
    # two films: the error lists both, with their topologies and counts
    with pytest.raises(ProvenanceError, match="2 films") as err:
        site_table(path)
    assert film_a.film_id in str(err.value) and film_b.film_id in str(err.value)
    # one film, two methods: the error lists both keys with xc/basis
    with pytest.raises(ProvenanceError, match="2 methods") as err:
        site_table(path, film=film_a)
    msg = str(err.value)
    assert B3LYP.key() in msg and PBE0.key() in msg and "b3lyp/sto-3g" in msg and "pbe0/sto-3g" in msg
    t = site_table(path, film=film_a, method_key=PBE0.key()[:10])
    assert sorted(t.molecule) == [0, 1, 2] and np.allclose(sorted(t.S1_eV), [3.2, 3.21, 3.22])
    assert set(t.method_key) == {PBE0.key()}
    # a film id (prefix) works without the film, and a wrong one names what the store holds
    t = site_table(path, film_id=film_b.film_id[:8])
    assert list(t.S1_eV) == [9.0]
    with pytest.raises(ProvenanceError, match="no records of the film 'zz'"):
        site_table(path, film_id="zz")
    with pytest.raises(ProvenanceError, match="no records of the method 'ffff'"):
        site_table(path, film=film_a, method_key="ffff")
    # the sample knows its film and rebuilds its method from the stored spec
    s = SiteSample.from_store(path, film=film_a, method_key=B3LYP.key())
    assert s.film_id == film_a.film_id and s.method == B3LYP and len(s.table) == 3


def test_export_refuses_another_film_and_names_the_method(film_a, film_b, tmp_path):
    path = _two_method_store(tmp_path / "a.sqlite", film_a, methods=(B3LYP,))
    # the topology given is another film: refused, both ids named
    with pytest.raises(ProvenanceError) as err:
        SiteSample.from_store(path, film=film_b)
    assert film_a.film_id in str(err.value) and film_b.film_id in str(err.value)
    sample = SiteSample.from_store(path, film=film_a)
    with pytest.raises(ProvenanceError, match=film_b.film_id):
        export_study(film_b, tmp_path / "x", sample=sample, cutoff_A=4.0)
    # a table of two methods is never one column
    mixed = sample.table.copy()
    mixed.loc[0, "method_key"] = PBE0.key()
    with pytest.raises(ProvenanceError, match="2 methods"):
        export_study(film_a, tmp_path / "y", sample=mixed, cutoff_A=4.0)
    # the sidecar names the sample's method (it was null before)
    paths = export_study(film_a, tmp_path / "ok", sample=sample, cutoff_A=4.0)
    meta = json.loads(open(paths["sidecar"], encoding="utf-8").read())
    assert meta["method"] is not None and json.dumps(meta["method"]).count(B3LYP.key()) >= 1


def test_cli_report_lists_methods_and_exits_nonzero(film_a, tmp_path, capsys):
    path = _two_method_store(tmp_path / "m.sqlite", film_a)
    assert cli_main(["report", str(path), "--out", str(tmp_path / "r"), "--quantity", "S1_eV"]) == 1
    err = capsys.readouterr().err
    assert "2 methods" in err and B3LYP.key() in err and PBE0.key() in err
    assert cli_main(["report", str(path), "--out", str(tmp_path / "r"), "--quantity", "S1_eV",
                     "--method-key", B3LYP.key()[:12]]) == 0
    out = capsys.readouterr().out
    assert re.search(r"^\s*S1\s+3\s+3\.01", out, re.M), out  # n = 3 sites of one method, mean of B3LYP's (S1_eV shown by its name)
