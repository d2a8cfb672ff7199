"""Every notebook in notebooks/ runs top to bottom without an error (nbclient).

They run the real library (demo film, radius scan, site sample) with tiny
settings, so they take minutes: marked slow. 03_doped_film's defaults are a
real study of hours; its own test sets small values in its parameter cell. Files they write go to a
scratch folder (``CLUSTERLAB_WORKDIR``).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))
#: notebooks whose defaults are a real study (hours): run with small settings by their own tests
OWN_TEST = {"03_doped_film.ipynb"}


def test_notebooks_are_there():
    names = {p.name for p in NOTEBOOKS}
    assert {"01_demo_walkthrough.ipynb", "02_your_film.ipynb", "03_doped_film.ipynb"} <= names


def test_committed_notebooks_are_small():
    """Committed without large outputs (no images or long tables kept)."""
    for p in NOTEBOOKS:
        assert p.stat().st_size < 60_000, f"{p.name}: strip its outputs before committing"


def _errors(nb) -> list[str]:
    out = []
    for cell in nb.cells:
        for o in cell.get("outputs", []):
            if o.get("output_type") == "error":
                out.append(f"{o.get('ename')}: {o.get('evalue')}")
    return out


@pytest.mark.slow
@pytest.mark.parametrize("path", [p for p in NOTEBOOKS if p.name not in OWN_TEST],
                         ids=[p.stem for p in NOTEBOOKS if p.name not in OWN_TEST])
def test_notebook_runs(path, tmp_path, monkeypatch):
    monkeypatch.setenv("CLUSTERLAB_WORKDIR", str(tmp_path / "out"))
    monkeypatch.setenv("OMP_NUM_THREADS", os.environ.get("OMP_NUM_THREADS", "2"))
    # the kernel must import this checkout's clusterlab even when it is not installed
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    nb = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=1800, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    assert _errors(nb) == []
    # the widgets were displayed (a widget view in the outputs of the explorer cell)
    views = [o for c in nb.cells for o in c.get("outputs", [])
             if "application/vnd.jupyter.widget-view+json" in o.get("data", {})]
    assert len(views) >= 3
    # the export really wrote the site energies
    csvs = list((tmp_path / "out").glob("*site_energies.csv"))
    assert csvs and csvs[0].stat().st_size > 0


def _set_parameters(source: str, **values: str) -> str:
    """Replace ``NAME = ...`` lines of the parameter cell."""
    lines = source.splitlines()
    for name, value in values.items():
        hits = [i for i, ln in enumerate(lines) if ln.split("=")[0].strip() == name]
        assert hits, f"parameter {name} not found in the first code cell"
        lines[hits[0]] = f"{name} = {value}"
    return "\n".join(lines)


@pytest.mark.slow
def test_your_film_notebook_on_another_film(tmp_path, monkeypatch):
    """02_your_film on a film that is not the demo: GRO + XTC of water, charges
    from a residue table (the user-facing path of a film without topology charges)."""
    import numpy as np
    from conftest import build_water_universe, lattice_centres

    rng = np.random.default_rng(5)
    u, _ = build_water_universe(lattice_centres(4, 0.15, rng), np.array([16.0, 16, 16, 90, 90, 90]),
                                seed=1, n_frames=2)
    gro, xtc = tmp_path / "water.gro", tmp_path / "water.xtc"
    u.atoms.write(str(gro))
    with __import__("MDAnalysis").Writer(str(xtc), u.atoms.n_atoms) as w:
        for _ in u.trajectory:
            w.write(u.atoms)
    monkeypatch.setenv("CLUSTERLAB_WORKDIR", str(tmp_path / "out"))
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    nb = nbformat.read(ROOT / "notebooks" / "02_your_film.ipynb", as_version=4)
    cell = next(c for c in nb.cells if c.cell_type == "code")
    cell.source = _set_parameters(
        cell.source, **{"TOPOLOGY, TRAJECTORY": f"{str(gro)!r}, {str(xtc)!r}",
                        "CHARGES": "{'WAT': [-0.834, 0.417, 0.417]}", "RADII_A": "'4, 6'",
                        "SAMPLE_RADII_A": "(4.0,)", "N_SITES": "3", "FRAMES": "'all'", "BASIS": "'sto-3g'",
                        "N_SINGLETS, N_TRIPLETS": "1, 1"})
    nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    assert _errors(nb) == []
    import pandas as pd

    sites = pd.read_csv(tmp_path / "out" / "site_energies.csv")
    assert len(sites) == 3 * 2 and set(sites.frame) == {0, 1}
    conv = pd.read_csv(tmp_path / "out" / "convergence.csv")
    assert sorted(conv.radius_A[conv.radius_A > 0]) == [4.0, 6.0]


#: small settings of 03_doped_film: minimal basis, plain sTDA, two radii, two guests, one frame
DOPED_SMALL = {"METHOD": "Method(basis='sto-3g', excited='stda', n_singlets=2, n_triplets=2, grid_level=0, "
                         "response_grid_level=0)",
               "RADII_A": "'4, 8'", "SAMPLE_SITES": "'1400, 1437'", "N_SITES": "None", "SAMPLE_RADIUS_A": "8.0",
               "MODEL_RADIUS_A": "12.0", "MODEL_FRAMES": "'0'"}


@pytest.mark.slow
def test_03_doped_film_notebook_with_small_settings(tmp_path, monkeypatch):
    """03_doped_film end to end on the committed doped film with small settings (minutes, not hours)."""
    import json

    import MDAnalysis as mda
    import numpy as np
    import pandas as pd
    from MDAnalysis.lib.distances import calc_dihedrals

    out = tmp_path / "out"
    monkeypatch.setenv("CLUSTERLAB_WORKDIR", str(out))
    monkeypatch.setenv("OMP_NUM_THREADS", os.environ.get("OMP_NUM_THREADS", "2"))
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    nb = nbformat.read(ROOT / "notebooks" / "03_doped_film.ipynb", as_version=4)
    cell = next(c for c in nb.cells if c.cell_type == "code")
    cell.source = _set_parameters(cell.source, **DOPED_SMALL)
    nbclient.NotebookClient(nb, timeout=3000, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    assert _errors(nb) == []
    views = [o for c in nb.cells for o in c.get("outputs", [])
             if "application/vnd.jupyter.widget-view+json" in o.get("data", {})]
    assert len(views) >= 1  # the explorer on the guest
    # a real convergence curve: the vacuum row and both radii, each with a finite shift
    conv = pd.read_csv(out / "guest_convergence.csv")
    radii = conv.radius_A[conv.radius_A > 0]
    assert sorted(radii) == [4.0, 8.0] and conv.loc[conv.radius_A > 0, "S1_shift_eV"].notna().all()
    # composition of the committed film (demo_traj/doped/README.md: 1400 HCZ + 100 GDA), pair classes present
    sites = pd.read_csv(out / "doped_site_energies.csv")
    assert sites.groupby("species").size().to_dict() == {"GDA": 100, "HCZ": 1400}
    pairs = pd.read_parquet(out / "doped_export" / "pairs.parquet")
    assert {"species_i", "species_j", "pair_class"} <= set(pairs.columns) and pairs.pair_class.nunique() >= 2
    # the notebook's guest torsions against MDAnalysis (an independent dihedral, minimum image across the
    # box: the atoms are wrapped one by one), frame 0, atoms C22 N4 C19 C18 of each guest
    tors = pd.read_csv(out / "guest_torsions.csv")
    assert len(tors) == 100 and set(tors.species) == {"GDA"}
    record = json.loads((ROOT / "demo_traj" / "doped" / "build_record.json").read_text())
    assert record["guest_torsions_atoms"]["donor"] == [25, 24, 21, 20]  # = C22 N4 C19 C18 in the atom order
    u = mda.Universe(str(ROOT / "demo_traj" / "doped" / "doped_film.psf"),
                     str(ROOT / "demo_traj" / "doped" / "doped_film.xtc"))
    first = np.array([r.atoms.indices[0] for r in u.residues])[tors.molecule.to_numpy()]
    q = first[:, None] + np.array(record["guest_torsions_atoms"]["donor"])[None, :]
    u.trajectory[0]
    x = u.atoms.positions
    ref = np.degrees(calc_dihedrals(x[q[:, 0]], x[q[:, 1]], x[q[:, 2]], x[q[:, 3]], box=u.dimensions))
    np.testing.assert_allclose(tors.torsion_deg, ref, atol=1e-2)
    # the build's recorded twist range over all frames (build_record.json) holds this frame's guests
    span = record["guest_twist_deg"]["donor"]
    twist = np.minimum(np.abs(ref), 180 - np.abs(ref))
    assert twist.min() >= span["min"] - 0.01 and twist.max() <= span["max"] + 0.01
