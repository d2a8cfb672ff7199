"""Widget behaviour at the Python level (no browser, dummy comms).

The widgets hold no science, so the references here are the library calls
themselves (``Film.carve``, ``disorder_stats``) and numpy: each test checks
that a state change drives the right library call with the right settings
and that its output reaches the right widget.
"""

from __future__ import annotations

import html
import re
import threading
import time

import numpy as np
import pandas as pd
import pytest

from clusterlab import film_from_universe
from clusterlab.store import ResultStore, task_key
from clusterlab.widgets import DisorderPanel, FilmExplorer, ShiftScanPanel
from clusterlab.widgets import calc, disorder
from clusterlab.widgets._style import cluster_scene_pdb

from conftest import build_water_universe, lattice_centres

BOX = np.array([16.0, 16.0, 16.0, 90.0, 90.0, 90.0])


@pytest.fixture
def film():
    rng = np.random.default_rng(7)
    u, _ = build_water_universe(lattice_centres(4, 0.15, rng), BOX, seed=3, n_frames=2)
    return film_from_universe(u)


def _cell(html: str, key: str) -> str:
    m = re.search(rf'class="clusterlab-{key}">([^<]*)<', html)
    assert m is not None, f"readout has no {key!r} cell: {html[:400]}"
    return m.group(1)


# ------------------------------------------------------------------ explorer
def test_radius_slider_recarves_and_updates_readout(film):
    ex = FilmExplorer(film, molecule=5, radius_A=4.0)
    small = film.carve(5, 4.0)
    assert int(_cell(ex.readout.value, "environment-molecules")) == small.n_env_molecules
    ex.radius_slider.value = 7.5
    ref = film.carve(5, 7.5)
    assert ref.n_env_molecules > small.n_env_molecules  # the check below can fail
    assert ex.cluster.n_env_molecules == ref.n_env_molecules
    assert int(_cell(ex.readout.value, "environment-molecules")) == ref.n_env_molecules
    assert int(_cell(ex.readout.value, "point-charges")) == ref.n_charges
    assert _cell(ex.readout.value, "net-environment-charge") == f"{ref.net_env_charge:+.3f} e"
    # the 3D scene (a PDB copy) holds exactly the QM atoms and the charges
    n_atoms = sum(1 for line in ex.scene_pdb.splitlines() if line.startswith("HETATM"))
    assert n_atoms == len(ref.qm_symbols) + ref.n_charges


def test_other_controls_drive_carve_settings(film, monkeypatch):
    calls = []
    ex = FilmExplorer(film, molecule=2, radius_A=5.0, show_view=False)
    real = film.carve

    def recording(molecule, radius, **kw):
        calls.append((molecule, radius, kw))
        return real(molecule, radius, **kw)

    monkeypatch.setattr(film, "carve", recording)
    ex.shell_slider.value = 3.0
    ex.rule_toggle.value = "centroid"
    ex.frame_slider.value = 1
    assert calls[-1] == (2, 5.0, {"frame": 1, "qm_shell": 3.0, "rule": "centroid", "periodic": True})
    ref = film.carve(2, 5.0, frame=1, qm_shell=3.0, rule="centroid")
    assert ex.cluster.qm_molecules == ref.qm_molecules
    assert len(ref.qm_molecules) > 1  # the QM shell really took neighbours in


def test_picking_in_the_view_changes_the_centre(film):
    ex = FilmExplorer(film, molecule=0, radius_A=6.0)
    film_comp = ex.view._ngl_component_ids.index(ex._film_comp.id)
    atom = int(film.molecule_atoms(9)[1])
    ex.view.picked = {"atom1": {"index": atom, "resno": 9, "name": "[WAT]9:F.HW1"}, "component": film_comp}
    assert ex.molecule == 9
    assert ex.cluster.center == 9
    # an atom of the cluster scene: a point charge of some environment molecule
    clus_comp = ex.view._ngl_component_ids.index(ex._cluster_comp.id)
    n_qm = len(ex.cluster.qm_symbols)
    target = int(ex.cluster.env_molecules[4])
    ex.view.picked = {"atom1": {"index": n_qm + 4}, "component": clus_comp}
    assert ex.molecule == target
    assert ex.cluster.center == target
    # clicking is ignored when switched off
    ex.click_box.value = False
    ex.view.picked = {"atom1": {"index": int(film.molecule_atoms(3)[0])}, "component": film_comp}
    assert ex.molecule == target


def _record_view_calls(view, monkeypatch):
    """Replace the view's messages to the browser by a list of (method, args, kwargs)."""
    calls = []
    monkeypatch.setattr(view, "_remote_call",
                        lambda name, target="Widget", args=None, kwargs=None, **kw: calls.append((name, args, kwargs)))
    return calls


def test_pick_label_names_the_molecule_id_and_clears_when_the_centre_moves(film, monkeypatch):
    ex = FilmExplorer(film, molecule=0, radius_A=6.0)
    calls = _record_view_calls(ex.view, monkeypatch)
    # the film scene's residue numbers are molecule ids: nglview's own atom name reads "[RES]<id>"
    from clusterlab.widgets._style import film_scene_pdb
    text = film_scene_pdb(film.symbols, film.frame_geometry(0).positions_A, film.molecule_of_atom,
                          film.molecule_resnames)
    first_of_9 = int(film.molecule_atoms(9)[0])
    line = [ln for ln in text.splitlines() if ln.startswith("HETATM")][first_of_9]
    assert int(line[22:26]) == 9  # was 10 (molecule id + 1)
    # a pick in the film scene: the label names molecule 9 and the view's label box gets that text
    film_comp = ex.view._ngl_component_ids.index(ex._film_comp.id)
    ex.view.picked = {"atom1": {"index": first_of_9, "resno": 9}, "component": film_comp}
    assert ex.molecule == 9
    assert ex.pick_label.startswith("molecule 9 · ")
    js = [a[0] for name, a, _ in calls if name == "executeCode"]
    assert js and '"molecule 9 ' in js[-1] and "toggle(true)" in js[-1]
    # a pick on a point charge says which charge it is
    clus_comp = ex.view._ngl_component_ids.index(ex._cluster_comp.id)
    n_qm = len(ex.cluster.qm_symbols)
    q = float(ex.cluster.env_charges[2])
    target = int(ex.cluster.env_molecules[2])
    ex.view.picked = {"atom1": {"index": n_qm + 2}, "component": clus_comp}
    assert ex.molecule == target
    assert ex.pick_label == f"molecule {target} · WAT · point charge {q:+.3f} e"
    # the centre changed another way (the dropdown): the label goes away in Python and in the view
    n_js = len([1 for name, _, _ in calls if name == "executeCode"])
    ex.molecule_picker.value = 3
    assert ex.molecule == 3 and ex.pick_label == ""
    js = [a[0] for name, a, _ in calls if name == "executeCode"]
    assert len(js) == n_js + 1 and "toggle(false)" in js[-1]


def test_camera_refits_to_the_cluster_when_radius_or_centre_changes(film, monkeypatch):
    ex = FilmExplorer(film, molecule=0, radius_A=4.0)
    calls = _record_view_calls(ex.view, monkeypatch)
    ex.view.loaded = True
    fits = lambda: [a for name, a, _ in calls if name == "autoView"]  # noqa: E731
    n0 = len(fits())
    ex.radius_A = 7.0  # the cluster grows: the camera must zoom out to hold it
    assert len(fits()) == n0 + 1
    ex.molecule = 5
    assert len(fits()) == n0 + 2
    ex.click_box.value = False  # not a carve setting: no re-fit
    assert len(fits()) == n0 + 2


def test_scene_colours_are_visible_on_the_dark_background():
    """WCAG 2.1 contrast ratio (W3C, Web Content Accessibility Guidelines 2.1, 2018, definitions of
    relative luminance and contrast ratio; 3:1 is its threshold for graphical objects, SC 1.4.11)."""
    from clusterlab.widgets import _style

    # the formula against its fixed points: black on white is 21:1, a colour on itself 1:1
    assert _style.contrast_ratio("#000000", "#FFFFFF") == pytest.approx(21.0)
    assert _style.contrast_ratio("#1F2630", "#1F2630") == pytest.approx(1.0)
    # mid grey #777777 on white: 4.48:1 (from memory; the classic "just fails AA" example)
    assert _style.contrast_ratio("#777777", "#FFFFFF") == pytest.approx(4.48, abs=0.01)
    # the lowest site-energy colour (it was 2.83:1) and every colour of the scales
    assert _style.contrast_ratio(_style.ENERGY_SCALE[0], _style.BACKGROUND) >= 3.0
    for c in (*_style.ENERGY_SCALE, *_style.CHARGE_NEG_SCALE, *_style.CHARGE_POS_SCALE, _style.QM_CENTRAL,
              _style.QM_SHELL):
        assert _style.contrast_ratio(c, _style.BACKGROUND) >= 3.0, c
    # the smallest charges keep a saturated colour (the film's grey lines have HSV saturation 0.15)
    import colorsys

    def saturation(c):
        return colorsys.rgb_to_hsv(*(int(c[i:i + 2], 16) / 255 for i in (1, 3, 5)))[1]

    assert saturation(_style.FILM_REST) < 0.2
    assert saturation(_style.CHARGE_NEG_SCALE[0]) > 0.5 and saturation(_style.CHARGE_POS_SCALE[0]) > 0.5
    # sign by hue: negative and positive floors lie far apart on the colour wheel
    hue = lambda c: colorsys.rgb_to_hsv(*(int(c[i:i + 2], 16) / 255 for i in (1, 3, 5)))[0]  # noqa: E731
    d = abs(hue(_style.CHARGE_NEG_SCALE[0]) - hue(_style.CHARGE_POS_SCALE[0]))
    assert min(d, 1 - d) > 0.3


def test_charges_are_drawn_by_sign_with_a_floor_colour(film, monkeypatch):
    from clusterlab.widgets import _style

    ex = FilmExplorer(film, molecule=0, radius_A=4.0)
    calls = _record_view_calls(ex.view, monkeypatch)
    ex.radius_A = 6.0
    by_sele = {kw["sele"]: kw for name, _, kw in calls if name == "addRepresentation" and "sele" in (kw or {})}
    neg, pos = by_sele[f":{_style.CHAIN_ENV_NEG}"], by_sele[f":{_style.CHAIN_ENV_POS}"]
    q = 100 * float(np.max(np.abs(ex.cluster.env_charges)))
    # zero maps to the floor colour of each sign, the largest |q| to the deep end
    assert neg["colorScale"] == [_style.CHARGE_NEG_SCALE[1], _style.CHARGE_NEG_SCALE[0]]
    assert neg["colorDomain"] == pytest.approx([-q, 0.0])
    assert pos["colorScale"] == list(_style.CHARGE_POS_SCALE) and pos["colorDomain"] == pytest.approx([0.0, q])


def test_warning_for_radius_beyond_half_box(film):
    ex = FilmExplorer(film, molecule=1, radius_A=5.0, show_view=False)
    assert "clusterlab-warning" not in ex.readout.value
    ex.radius_A = 9.0  # half of the 16 Å box is 8 Å
    assert "exceeds half the smallest box width" in ex.readout.value
    assert film.radius_warnings(9.0, 0)[0].split(":")[0] in ex.readout.value


def test_non_neutral_environment_is_flagged(film):
    u = film.universe
    q = np.asarray(u.atoms.charges).copy()
    q[film.molecule_atoms(6)] += 1.0 / 3.0  # molecule 6 becomes a +1 ion
    u.atoms.charges = q
    charged = film_from_universe(u)
    ex = FilmExplorer(charged, molecule=5, radius_A=7.0, show_view=False)
    ref = charged.carve(5, 7.0)
    assert 6 in set(ref.env_molecules.tolist())
    assert ref.net_env_charge == pytest.approx(1.0, abs=1e-9)
    assert "not neutral: net +1.000 e" in ex.readout.value


def test_search_by_ids_residue_name_and_bad_selection(film):
    ex = FilmExplorer(film, molecule=0, radius_A=4.0, show_view=False)
    ex.search.value = "7-9"
    assert [v for _, v in ex.molecule_picker.options] == [7, 8, 9]
    assert ex.molecule == 7 and ex.cluster.center == 7
    ex.search.value = "wat"
    assert len(ex.molecule_picker.options) == film.n_molecules
    ex.search.value = "resname NOPE"
    assert "clusterlab-error" in ex.readout.value and "matches no atoms" in ex.readout.value


def test_explorer_settings_are_traits_linked_to_controls(film):
    from clusterlab.errors import CarvingError, InputError

    ex = FilmExplorer(film, molecule=0, radius_A=4.0, show_view=False)
    seen = []
    ex.observe(lambda ch: seen.append((ch["name"], ch["new"])), names=["molecule", "radius_A", "frame"])
    ex.molecule = 5                      # assigning the trait moves the dropdown and re-carves
    assert ex.molecule_picker.value == 5 and ex.cluster.center == 5
    ex.molecule_picker.value = 6         # and the other way round
    assert ex.molecule == 6 and ex.cluster.center == 6
    ex.radius_A = 55.0                   # beyond the slider's end: the slider grows
    assert ex.radius_slider.max == 55.0 and ex.radius_slider.value == 55.0
    ex.frame = -1                        # negative frames count from the end, as in the library
    assert ex.frame == 1 and ex.frame_slider.value == 1 and ex.cluster is not None
    assert seen == [("molecule", 5), ("molecule", 6), ("radius_A", 55.0), ("frame", 1)]
    ex.shell_slider.value = 2.0
    ex.rule_toggle.value = "centroid"
    assert (ex.qm_shell_A, ex.rule) == (2.0, "centroid")
    assert ex.settings() == {"molecule": 6, "radius": 55.0, "frame": 1, "qm_shell": 2.0, "rule": "centroid",
                             "periodic": True}
    with pytest.raises(CarvingError, match="molecule 999 does not exist"):
        ex.molecule = 999
    with pytest.raises(InputError, match="radius_A=-1 Å is not valid"):
        ex.radius_A = -1.0
    assert ex.molecule == 6 and ex.radius_A == 55.0


def test_search_reads_the_id_grammar(film):
    ex = FilmExplorer(film, molecule=0, radius_A=4.0, show_view=False)
    ex.search.value = "2-10:4, 20"
    assert [v for _, v in ex.molecule_picker.options] == [2, 6, 10, 20]
    ex.search.value = "60-70"
    assert "molecule id 70 in '60-70' is out of range; valid molecule ids are 0..63" in html.unescape(ex.readout.value)


def test_scan_panel_traits_follow_controls_and_explorer(film):
    ex = FilmExplorer(film, molecule=3, radius_A=6.0, show_view=False)
    panel = ShiftScanPanel(film, explorer=ex, radii_A=(6, 9))
    assert panel.radii_A == [6.0, 9.0] and panel.radii.value == "6, 9"
    panel.radii.value = "4-10:3"                     # text in the range grammar sets the trait
    assert panel.radii_A == [4.0, 7.0, 10.0]
    panel.radii_A = [12, 5]                          # and the trait rewrites the text
    assert panel.radii.value == "5, 12" and panel.radii_A == [5.0, 12.0]
    panel.radii.value = "5, twelve"                  # text that does not parse leaves the trait alone
    assert panel.radii_A == [5.0, 12.0]
    ex.molecule = 7
    ex.qm_shell_A = 1.5
    ex.frame = 1
    ex.rule = "centroid"
    assert (panel.molecule_id, panel.frame_index, panel.cut_rule, panel.qm_shell_A) == (7, 1, "centroid", 1.5)
    assert (panel.molecule.value, panel.frame.value, panel.rule.value, panel.qm_shell.value) == (7, 1, "centroid",
                                                                                                  1.5)
    panel.tol_meV = 4.0
    panel.periodic_limit.value = True
    assert panel.tol.value == 4.0 and panel.with_periodic_limit is True
    panel.radii.value = "5-6:1"
    s = panel.settings()
    assert (s["molecule"], s["frame"], s["rule"], s["qm_shell"], s["radii"]) == (7, 1, "centroid", 1.5, [5.0, 6.0])
    assert s["tol_eV"] == pytest.approx(0.004) and s["periodic_limit"] is True


def test_cluster_scene_marks_qm_and_charges(film):
    c = film.carve(4, 6.0, qm_shell=3.0)
    text, atom_mol = cluster_scene_pdb(c, 4)
    lines = [ln for ln in text.splitlines() if ln.startswith("HETATM")]
    chains = np.array([ln[21] for ln in lines])
    b = np.array([float(ln[60:66]) for ln in lines])
    resno = np.array([int(ln[22:26]) for ln in lines])
    n_qm = len(c.qm_symbols)
    assert set(chains[:n_qm]) <= {"Q", "S"}
    assert (chains == "Q").sum() == np.sum(c.qm_atom_molecules == 4)
    # charges: chain N for negative, P for positive (or zero), in the cluster's order
    env = chains[n_qm:]
    assert len(env) == c.n_charges
    np.testing.assert_array_equal(env == "N", np.asarray(c.env_charges) < 0)
    assert (env == "N").any() and (env == "P").any()  # water: O negative, H positive
    # B-factor = 100 x charge (2 decimals in PDB)
    np.testing.assert_allclose(b[n_qm:], 100 * c.env_charges, atol=0.006)
    np.testing.assert_array_equal(atom_mol, np.r_[c.qm_atom_molecules, c.env_molecules])
    # the residue number is the molecule id itself (the viewer's own labels show it)
    np.testing.assert_array_equal(resno, atom_mol)


# -------------------------------------------------------------- scan panel
class FakeScan:
    """Records its arguments; reports rows one by one when told to."""

    def __init__(self, rows, *, fail=None, wait_for_cancel=False):
        self.rows = rows
        self.fail = fail
        self.wait_for_cancel = wait_for_cancel
        self.calls = []
        self.step = threading.Semaphore(0)
        self.reported = threading.Semaphore(0)
        self.saw_cancel = False

    def __call__(self, film, molecule, radii, method, **kw):
        self.calls.append({"film": film, "molecule": molecule, "radii": radii, "method": method, **kw})
        if self.fail is not None:
            raise self.fail
        if self.wait_for_cancel:
            self.saw_cancel = kw["cancel"].wait(10.0)
            return None
        for row in self.rows:
            assert self.step.acquire(timeout=10.0)
            kw["on_result"](row)
            self.reported.release()

        class Result:
            table = pd.DataFrame(self.rows)

            class verdict:  # noqa: N801
                message = "S1 converged at 9 Å (fake)"
                converged = True
                radius_A = 9.0

        return Result()


SCAN_ROWS = [
    {"radius_A": 6.0, "n_env_molecules": 10, "n_charges": 30, "S1_shift_eV": -0.080, "T1_shift_eV": -0.050},
    {"radius_A": 9.0, "n_env_molecules": 30, "n_charges": 90, "S1_shift_eV": -0.101, "T1_shift_eV": -0.062},
    {"radius_A": 12.0, "n_env_molecules": 60, "n_charges": 180, "S1_shift_eV": -0.104, "T1_shift_eV": -0.064},
]


def test_run_button_calls_scan_with_settings_and_fills_outputs(film, monkeypatch):
    ex = FilmExplorer(film, molecule=3, radius_A=6.0, show_view=False)
    panel = ShiftScanPanel(film, explorer=ex, radii_A=(6, 9, 12), basis="sto-3g", n_singlets=2, n_triplets=1)
    fake = FakeScan(SCAN_ROWS)
    monkeypatch.setattr(calc, "radius_scan", fake)
    ex.shell_slider.value = 1.0
    ex.frame_slider.value = 1
    panel.tol.value = 5.0
    panel.run_button.click()
    assert panel.running
    call = fake.calls[0]
    assert call["film"] is film and call["molecule"] == 3 and call["radii"] == [6.0, 9.0, 12.0]
    assert call["frame"] == 1 and call["qm_shell"] == 1.0 and call["rule"] == "atom"
    assert call["tol_eV"] == pytest.approx(0.005)
    assert call["runner"] == "serial" and call["progress"] is False
    assert call["cancel"] is panel.cancel_event and callable(call["on_result"])
    m = call["method"]
    assert (m.basis, m.n_singlets, m.n_triplets) == ("sto-3g", 2, 1)
    assert panel.plot.value == b"" and "no results yet" in panel.table_html.value
    for k, row in enumerate(SCAN_ROWS, start=1):
        fake.step.release()
        assert fake.reported.acquire(timeout=10.0)
        assert panel.progress.value == k
        # shifts are shown in meV under a human header (they used to be eV with 4 decimals)
        assert f"<td>{1e3 * row['S1_shift_eV']:.1f}</td>" in panel.table_html.value
        assert "S1 shift (meV)" in panel.table_html.value
        assert panel.plot.value[:8] == b"\x89PNG\r\n\x1a\n"
        assert panel.n_plots == k
    assert panel.wait(10.0)
    assert "S1 converged at 9 Å (fake)" in panel.status.value
    assert panel.progress.value == panel.progress.max == 3
    assert not panel.run_button.disabled and panel.cancel_button.disabled
    pd.testing.assert_frame_equal(panel.table, pd.DataFrame(SCAN_ROWS))


def test_cancel_sets_the_event(film, monkeypatch):
    panel = ShiftScanPanel(film, radii_A=(6, 9))
    fake = FakeScan([], wait_for_cancel=True)
    monkeypatch.setattr(calc, "radius_scan", fake)
    panel.run()
    time.sleep(0.05)
    assert panel.running and not panel.cancel_event.is_set()
    panel.cancel_button.click()
    assert panel.cancel_event.is_set()
    assert panel.wait(10.0)
    assert fake.saw_cancel
    assert "cancelled" in panel.status.value


def _run_then_cancel(panel, started):
    """Start the panel's job, press cancel once ``started`` is set, and return the status text."""
    panel.run()
    assert started.wait(10.0)
    panel.cancel_button.click()
    assert panel.wait(10.0)
    return html.unescape(panel.status.value)


def test_scan_narration_reaches_the_status_line(film, monkeypatch):
    seen = threading.Event()
    go = threading.Event()

    def scan(film_, molecule, radii, method, **kw):
        kw["on_step"]("radius 8 Å: 33 molecules, 528 charges (1 of 2; elapsed 40 s, about 40 s left)")
        seen.set()
        assert go.wait(10.0)
        return None

    panel = ShiftScanPanel(film, radii_A=(5, 8))
    monkeypatch.setattr(calc, "radius_scan", scan)
    panel.run()
    assert seen.wait(10.0)
    assert "radius 8 Å: 33 molecules, 528 charges (1 of 2; elapsed 40 s, about 40 s left)" in \
        html.unescape(panel.status.value)
    go.set()
    assert panel.wait(10.0) and len(panel.narration) == 1


def test_cancel_after_the_first_radius_is_not_a_failure(film, monkeypatch):
    """Cancelling after one finished radius keeps and shows it, in the cancel's words, whatever the
    scan raises on its way out (it used to be an InputError from the convergence verdict)."""
    from clusterlab.errors import InputError

    first = threading.Event()

    def scan(film_, molecule, radii, method, **kw):
        kw["on_result"](dict(SCAN_ROWS[0]))
        first.set()
        assert kw["cancel"].wait(10.0)
        raise InputError("quantity 'S1_shift_eV' has 1 finite values; convergence needs at least 2")

    panel = ShiftScanPanel(film, radii_A=(6, 9))
    monkeypatch.setattr(calc, "radius_scan", scan)
    status = _run_then_cancel(panel, first)
    assert "cancelled after 1 radius" in status and "failed" not in status and "#a00" not in status
    assert panel.error == "" and panel.exception is None and panel.errors.outputs == ()
    assert panel.progress.bar_style == "warning"
    assert panel.plot.value[:4] == b"\x89PNG" and "<td>-80.0</td>" in panel.table_html.value


def test_cancelled_scan_with_a_result_shows_its_verdict(film, monkeypatch):
    panel = ShiftScanPanel(film, radii_A=(6, 9, 12))
    fake = FakeScan(SCAN_ROWS[:1])
    monkeypatch.setattr(calc, "radius_scan", fake)
    panel.run()
    fake.step.release()
    assert fake.reported.acquire(timeout=10.0)
    panel.cancel_event.set()
    assert panel.wait(10.0)
    status = html.unescape(panel.status.value)
    assert "cancelled after 1 radius" in status and "(fake)" in status and "failed" not in status


def test_bad_input_from_the_scan_is_one_line(film, monkeypatch):
    from clusterlab.errors import InputError

    panel = ShiftScanPanel(film, radii_A=(6,))
    monkeypatch.setattr(calc, "radius_scan", FakeScan([], fail=InputError("radius 0 Å is not positive")))
    panel.run_button.click()
    assert panel.wait(10.0)
    assert "radius 0 Å is not positive" in html.unescape(panel.status.value)
    assert "Traceback" not in "".join(o.get("text", "") for o in panel.errors.outputs)
    assert panel.error == "InputError: radius 0 Å is not positive"


def test_plot_is_hidden_until_there_is_one(film, monkeypatch):
    panel = ShiftScanPanel(film, radii_A=(6, 9))
    assert panel.plot.value == b"" and panel.plot.layout.display == "none"
    fake = FakeScan(SCAN_ROWS)
    for _ in SCAN_ROWS:
        fake.step.release()
    monkeypatch.setattr(calc, "radius_scan", fake)
    panel.run_button.click()
    assert panel.wait(10.0)
    assert panel.plot.value[:4] == b"\x89PNG" and panel.plot.layout.display == ""


def test_button_input_errors_are_one_line_not_a_traceback(film, tmp_path):
    dp = DisorderPanel(film, store=str(tmp_path / "s.sqlite"), show_view=False)
    for button in (dp.transport_button, dp.export_button):
        dp.errors.clear_output()
        button.click()  # nothing to export yet: an input problem
        assert "nothing to export yet" in html.unescape(dp.status.value)
        assert "\n" not in html.unescape(dp.status.value)
        assert dp.errors.outputs == ()
    panel = ShiftScanPanel(film, radii_A=(6,))
    panel.radii.value = "abc"
    panel.run_button.click()
    assert "check the settings: radii 'abc' are not valid" in html.unescape(panel.status.value)
    assert panel.errors.outputs == () and not panel.running


def test_scan_exception_reaches_the_error_output(film, monkeypatch):
    from clusterlab.errors import ConvergenceError

    panel = ShiftScanPanel(film, radii_A=(6,))
    monkeypatch.setattr(calc, "radius_scan", FakeScan([], fail=ConvergenceError("SCF did not converge at radius 6 Å")))
    panel.run_button.click()
    assert panel.wait(10.0)
    text = "".join(o.get("text", "") for o in panel.errors.outputs)
    assert "ConvergenceError: SCF did not converge at radius 6 Å" in text
    assert "Traceback" in text
    assert "failed" in panel.status.value and not panel.run_button.disabled


def test_bad_radii_are_reported_and_scan_not_called(film, monkeypatch):
    panel = ShiftScanPanel(film)
    fake = FakeScan(SCAN_ROWS)
    monkeypatch.setattr(calc, "radius_scan", fake)
    panel.radii.value = "6, nine"
    panel.run_button.click()
    assert fake.calls == []
    assert "radii '6, nine' are not valid" in html.unescape(panel.status.value)
    assert "radii '6, nine' are not valid" in panel.error


def test_defaults_are_the_library_functions(film):
    from clusterlab.qm.method import Method
    from clusterlab.stats import disorder_stats, spatial_correlation
    from clusterlab.study.plots import plot_convergence
    from clusterlab.study.sample import SiteSample, sample_sites, site_table
    from clusterlab.study.scan import radius_scan

    panel = ShiftScanPanel(film, preset="draft")
    assert calc.plot_convergence is plot_convergence and calc.radius_scan is radius_scan
    assert list(panel.preset.options) == list(Method.presets())
    assert panel.build_method() == Method.preset("draft")
    DisorderPanel(film, show_view=False)
    assert disorder.disorder_stats is disorder_stats and disorder.spatial_correlation is spatial_correlation
    from clusterlab.study.sample import site_correlation

    assert disorder.site_correlation is site_correlation
    assert disorder.sample_sites is sample_sites and disorder.site_table is site_table
    assert disorder.SiteSample is SiteSample


# ------------------------------------------------------------ disorder panel
def _fake_sample_factory(film, seed=11):
    rng = np.random.default_rng(seed)
    calls = []

    def fake(film_, molecules, frames, radius, method, *, store, runner, seed, progress, on_result, cancel,
               on_step=None):
        calls.append({"molecules": list(molecules), "frames": list(frames), "radius": radius,
                      "method": method, "store": store, "runner": runner, "seed": seed})
        rows = []
        radii = [float(r) for r in np.atleast_1d(radius)]
        for f, r in ((f, r) for f in frames for r in radii):
            cent = film.frame_geometry(f).centroids_A
            for m in molecules:
                shift = rng.normal(-0.1 * r / 10, 0.03)
                row = {"frame": f, "molecule": int(m), "resname": "WAT", "radius_A": r,
                       "centroid_x_A": cent[m, 0], "centroid_y_A": cent[m, 1], "centroid_z_A": cent[m, 2],
                       "S1_eV": 7.0 + shift, "S1_shift_eV": shift, "converged": True}
                on_result(row)
                rows.append(row)

        class Result:
            table = pd.DataFrame(rows)

        return Result()

    return fake, calls


def test_disorder_run_histogram_growth_scene_and_export(film, tmp_path, monkeypatch):
    dp = DisorderPanel(film, molecules="0-39", n_molecules=12, frames="0, 1", radii_A=(6, 9), seed=4,
                       store=str(tmp_path / "sites.sqlite"), basis="sto-3g")
    fake, calls = _fake_sample_factory(film)
    monkeypatch.setattr(disorder, "sample_sites", fake)
    dp.run_button.click()
    assert dp.wait(20.0), dp.status.value
    assert dp.error == ""
    expected_ids = np.sort(np.random.default_rng(4).choice(np.arange(40), size=12, replace=False)).tolist()
    assert [c["molecules"] for c in calls] == [expected_ids]
    assert calls[0]["radius"] == [6.0, 9.0] and calls[0]["frames"] == [0, 1]
    assert isinstance(calls[0]["store"], ResultStore) and calls[0]["method"].basis == "sto-3g"
    assert len(dp.data) == 48 and dp.progress.value == 48
    # histogram of the chosen radius (largest by default), stats from the library, checked with numpy
    assert dp.radius_pick.value == 9.0 and dp.quantity.value == "S1_eV"
    vals = dp.data.loc[dp.data.radius_A == 9.0, "S1_eV"].to_numpy()
    assert dp.stats["n"] == 24
    assert dp.stats["mean"] == pytest.approx(np.mean(vals), rel=1e-12)
    assert dp.stats["sigma"] == pytest.approx(np.std(vals, ddof=1), rel=1e-12)
    assert dp.hist_plot.value[:4] == b"\x89PNG"
    # σ and mean shift vs radius: one row per radius, σ = numpy's ddof=1 std of the shifts
    g = dp.growth.set_index("radius_A")
    for r in (6.0, 9.0):
        s = dp.data.loc[dp.data.radius_A == r, "S1_shift_eV"].to_numpy()
        assert g.loc[r, "sigma"] == pytest.approx(np.std(s, ddof=1), rel=1e-12)
    assert dp.growth_plot.value[:4] == b"\x89PNG"
    # 24 sites give at most a few tens of pairs per distance bin: C(r) would be noise, so the panel says
    # why in words (it used to draw it; see test_correlation_is_drawn_with_intervals_when_pairs_allow)
    assert dp.corr_plot.value == b"" and not dp.correlation.shown.any()
    # an Image with no picture is hidden (a browser draws an empty one as a broken-image icon)
    assert dp.corr_plot.layout.display == "none" and dp.hist_plot.layout.display == ""
    assert "C(r) is not drawn: 24 sites give" in html.unescape(dp.corr_note.value)
    # site energies on the film: sampled molecules in chain M, B-factor normalised 0..100
    sub = dp.data[(dp.data.radius_A == 9.0) & (dp.data.frame == 0)].set_index("molecule")["S1_eV"]
    lines = [ln for ln in dp.scene_pdb.splitlines() if ln.startswith("HETATM")]
    lo, hi = sub.min(), sub.max()
    for m in (expected_ids[0], expected_ids[-1]):
        ln = lines[int(film.molecule_atoms(m)[0])]
        assert ln[21] == "M"
        assert float(ln[60:66]) == pytest.approx(100 * (sub[m] - lo) / (hi - lo), abs=0.006)
    assert sum(ln[21] == "M" for ln in lines) == 3 * 12
    assert f"{lo:.3f}" in dp.colourbar.value and f"{hi:.3f}" in dp.colourbar.value
    # names, not columns: the quantity list, the colour bar and the notes (the value stays the column)
    assert ("S1", "S1_eV") in dp.quantity.options and ("S1 shift", "S1_shift_eV") in dp.quantity.options
    assert "S1 (eV), frame 0" in html.unescape(dp.colourbar.value) and "S1_eV" not in dp.colourbar.value
    assert "S1 shift per radius" in dp.growth_note.value
    # switching quantity redraws from the other column
    dp.quantity.value = "S1_shift_eV"
    assert dp.stats["mean"] == pytest.approx(dp.data.loc[dp.data.radius_A == 9.0, "S1_shift_eV"].mean())
    # export: CSV read back equals the table
    dp.export_path.value = str(tmp_path / "out" / "sites.csv")
    dp.export_button.click()
    back = pd.read_csv(tmp_path / "out" / "sites.csv")
    pd.testing.assert_frame_equal(back, dp.data, check_dtype=False)
    assert "wrote 48 rows" in dp.status.value
    # transport export: site table read back with pandas has every frame x molecule, S1 from QM
    dp.transport_path.value = str(tmp_path / "transport")
    dp.transport_button.click()
    assert dp.error == "", dp.errors.outputs
    sites = pd.read_parquet(tmp_path / "transport" / "sites.parquet")
    assert len(sites) == 2 * film.n_molecules
    qm = sites.dropna(subset=["S1_qm_eV"])
    assert len(qm) == 24  # 12 molecules x 2 frames at the largest radius
    assert set(qm.source_S1.str.startswith("qm:R=9A")) == {True}
    assert (tmp_path / "transport" / "export.json").exists()


def test_disorder_load_from_store(film, tmp_path):
    path = tmp_path / "s.sqlite"
    rng = np.random.default_rng(2)
    energies = {}
    with ResultStore(path) as st:
        for m in range(8):
            e = float(3.0 + rng.normal(0, 0.05))
            energies[m] = e
            k = task_key(film_id=film.film_id, frame=1, molecule=m, radius_A=8.0, kind="excitations")
            st.put(k, {"kind": "excitations"}, "{}", {"frame": 1, "molecule": m, "radius_A": 8.0, "S1_eV": e})
    dp = DisorderPanel(film, show_view=False)
    df = dp.load(path)
    assert dp.error == "" and len(df) == 8
    np.testing.assert_allclose(df.set_index("molecule")["S1_eV"].sort_index(), [energies[m] for m in range(8)])
    cent = film.frame_geometry(1).centroids_A
    row = df[df.molecule == 5].iloc[0]
    np.testing.assert_allclose([row.centroid_x_A, row.centroid_y_A, row.centroid_z_A], cent[5])
    assert dp.stats["n"] == 8
    assert dp.frame_pick.value == 1 and set(dp.site_values) == set(range(8))
    # what is drawn is panel state in traits linked to the dropdowns
    assert (dp.shown_quantity, dp.shown_radius_A, dp.shown_frame) == ("S1_eV", 8.0, 1)
    dp.radii.value = "6-12:3"
    assert dp.radii_A == [6.0, 9.0, 12.0]
    dp.radii_A = [10]
    assert dp.radii.value == "10"


def test_cancelled_sample_shows_its_sites_and_is_not_a_failure(film, tmp_path, monkeypatch):
    from clusterlab.errors import InputError

    dp = DisorderPanel(film, molecules="0-5", frames="0", radii_A=(6,), store=str(tmp_path / "c.sqlite"),
                       show_view=False)
    started = threading.Event()

    def sample(film_, molecules, frames, radius, method, *, store, runner, seed, progress, on_result, cancel,
               on_step=None):
        for m in (0, 1, 2, 3):
            on_result({"frame": 0, "molecule": m, "radius_A": 6.0, "S1_eV": 7.0 + 0.01 * m,
                       "S1_shift_eV": -0.1 + 0.01 * m, "converged": True})
        started.set()
        assert cancel.wait(10.0)
        raise InputError("no site finished")  # whatever the library raises on the way out

    monkeypatch.setattr(disorder, "sample_sites", sample)
    status = _run_then_cancel(dp, started)
    assert "cancelled after 4 sites" in status and "failed" not in status
    assert dp.error == "" and dp.exception is None and dp.errors.outputs == ()
    assert sorted(dp.data.molecule) == [0, 1, 2, 3]


def test_disorder_side_table_shows_the_one_sigma_and_interval(film):
    """3 sites: the side table shows σ (meV) with the chi-square interval of disorder_stats, the
    interval the histogram's text shows, and says why; not the bootstrap one."""
    dp = DisorderPanel(film, show_view=False)
    cent = film.frame_geometry(0).centroids_A
    dp.load(pd.DataFrame({"frame": 0, "molecule": [0, 1, 2], "radius_A": 6.0, "S1_eV": [3.00, 3.10, 3.12],
                          "centroid_x_A": cent[:3, 0], "centroid_y_A": cent[:3, 1], "centroid_z_A": cent[:3, 2]}))
    st = dp.stats
    assert st["sigma_ci_method"] == "chi-square"
    table = html.unescape(dp.stats_html.value)
    assert (f"<td>σ (meV)</td><td>{1e3 * st['sigma']:.1f} [{1e3 * st['sigma_chi2_lo']:.1f}, "
            f"{1e3 * st['sigma_chi2_hi']:.1f}]</td>") in table
    assert "chi-square interval of a normal sample (n = 3 is below 30" in table
    assert f"{1e3 * st['sigma_lo']:.1f}," not in table


def _lattice_sites(film, frames=(0, 1), seed=3):
    rng = np.random.default_rng(seed)
    rows = []
    for f in frames:
        cent = film.frame_geometry(f).centroids_A
        for m in range(film.n_molecules):
            rows.append({"frame": f, "molecule": m, "radius_A": 6.0, "S1_eV": 3.0 + rng.normal(0, 0.05),
                         "centroid_x_A": cent[m, 0], "centroid_y_A": cent[m, 1], "centroid_z_A": cent[m, 2]})
    return pd.DataFrame(rows)


def test_correlation_is_drawn_with_intervals_when_pairs_allow(film):
    from clusterlab.stats import MIN_PAIRS_PER_BIN
    from clusterlab.study.sample import site_correlation

    dp = DisorderPanel(film, show_view=False)
    data = _lattice_sites(film)
    dp.load(data)
    c = dp.correlation
    # the library's table of the same sites, with the same bootstrap seed
    ref = site_correlation(data, "S1_eV", film=film, n_bins=10, n_boot=dp.correlation_boot, seed=int(dp.seed.value))
    pd.testing.assert_frame_equal(c, ref)
    assert c.shown.any() and (c.n_pairs[c.shown] >= MIN_PAIRS_PER_BIN).all()
    assert (c.n_pairs[~c.shown] < MIN_PAIRS_PER_BIN).all() or not np.isfinite(c.C[~c.shown]).all()
    drawn = c[c.shown]
    assert np.all((drawn.C_lo <= drawn.C) & (drawn.C <= drawn.C_hi))
    assert dp.corr_plot.value[:4] == b"\x89PNG" and f"at least {MIN_PAIRS_PER_BIN} pairs" in dp.corr_note.value
    # three sites: words, not empty axes
    dp.load(data.head(3))
    assert dp.corr_plot.value == b"" and "C(r) is not drawn: 3 sites give" in html.unescape(dp.corr_note.value)


def test_disorder_errors_reach_the_output(film, tmp_path, monkeypatch):
    dp = DisorderPanel(film, show_view=False, store=str(tmp_path / "x.sqlite"))

    def broken(*a, **k):
        raise RuntimeError("worker pool died")

    monkeypatch.setattr(disorder, "sample_sites", broken)
    dp.run()
    assert dp.wait(10.0)
    text = "".join(o.get("text", "") for o in dp.errors.outputs)
    assert "RuntimeError: worker pool died" in text and "failed" in dp.status.value
    dp.load(tmp_path / "missing.sqlite")
    assert "does not exist" in dp.status.value
    with pytest.raises(ValueError, match="nothing to export"):
        DisorderPanel(film, show_view=False).export(tmp_path / "e.csv")


def _host_guest_film(guests=(0, 21)):
    """The 4x4x4 water lattice (4 Å spacing) with resname GST at ``guests`` and HST elsewhere."""
    u, _ = build_water_universe(lattice_centres(4, 0.0, np.random.default_rng(0)), BOX, seed=1)
    names = np.array(["HST"] * 64, dtype=object)
    names[list(guests)] = "GST"
    u.residues.resnames = names
    return film_from_universe(u)


def test_disorder_host_guest_tab_shows_the_library_overview(tmp_path):
    from clusterlab.study.doped import host_guest_overview

    film2 = _host_guest_film()
    guest = film2.molecules["species"].to_numpy() == "GST"
    rng = np.random.default_rng(8)
    t1 = np.full(64, 3.0)
    t1[48], t1[0], t1[21] = 2.70, 2.75, 2.80  # guest 0 sees 48 across the box face; guest 21 is confined
    df = pd.DataFrame({"frame": 0, "molecule": np.arange(64), "radius_A": 8.0, "converged": True,
                       "S1_eV": 3.2 + rng.normal(0, 0.03, 64), "T1_eV": t1,
                       "IP_eV": np.where(guest, 5.7, 6.0), "EA_eV": np.where(guest, 2.6, 2.5)})
    dp = DisorderPanel(film2, show_view=False, neighbour_cutoff_A=4.5)
    assert dp.tabs.get_title(5) == "host:guest" and len(dp.tabs.children) == 6
    dp.load(df)
    assert dp.error == "", dp.errors.outputs
    # what the tab shows is the library's overview of the shown sites
    ref = host_guest_overview(film2, df, cutoff_A=4.5, seed=0)
    assert dp.overview.to_json() == ref.to_json()
    assert dp.overview.species.trap_depth_eV("hole") == pytest.approx(0.3, abs=1e-12)
    assert dp.overview.confinement.fraction == 0.5
    assert "trap depths" in dp.doped_html.value and "50.0 % of 2 guest sites" in dp.doped_html.value
    assert dp.torsion_plot.value == b""  # no torsion atoms given


def test_disorder_one_species_film_has_no_host_guest_tab(film):
    dp = DisorderPanel(film, show_view=False)
    assert len(dp.tabs.children) == 5 and dp.doped_html is None
    dp.load(pd.DataFrame({"frame": 0, "molecule": np.arange(8), "radius_A": 8.0, "S1_eV": np.linspace(3, 3.1, 8)}))
    assert dp.error == "" and dp.overview is None


# ------------------------------------------------------- the real library
def test_panels_run_the_real_library(film, tmp_path):
    """Default scan/sample functions on a tiny water film (B3LYP/STO-3G, 1+1 states)."""
    from clusterlab.qm.method import Method

    ex = FilmExplorer(film, molecule=0, radius_A=4.0, show_view=False)
    scan = ShiftScanPanel(film, explorer=ex, radii_A=(4.0, 6.0), basis="sto-3g", n_singlets=1, n_triplets=1)
    assert scan.build_method() == Method.preset("draft", basis="sto-3g", n_singlets=1, n_triplets=1)
    scan.run().wait(120.0, raise_error=True)
    t = scan.table
    assert scan.error == "" and scan.n_plots >= 2 and scan.plot.value[:4] == b"\x89PNG"
    # the scan's environment counts are those of the explorer's carve (same library call)
    for r in (4.0, 6.0):
        row = t[t.radius_A == r].iloc[0]
        assert row.n_env_molecules == film.carve(0, r).n_env_molecules
    assert "finished" in scan.status.value and scan.result.verdict.message in html.unescape(scan.status.value)
    # the panel got the library's narration line by line
    assert scan.narration == scan.result.log and len(scan.narration) == 3
    assert scan.narration[2].startswith("radius 6 Å: ")
    dp = DisorderPanel(film, molecules="0-2", frames="1", radii_A=(4.0,), basis="sto-3g", n_singlets=1,
                       n_triplets=1, store=str(tmp_path / "s.sqlite"), show_view=False)
    dp.run().wait(120.0, raise_error=True)
    assert sorted(dp.data.molecule) == [0, 1, 2] and set(dp.data.frame) == {1}
    assert dp.stats["n"] == 3
    assert dp.narration == dp.result.log and len(dp.narration) == 4 and "(3 of 3; elapsed" in dp.narration[-1]
    back = DisorderPanel(film, show_view=False)
    back.load(tmp_path / "s.sqlite")
    np.testing.assert_allclose(back.data.sort_values("molecule").S1_eV, dp.data.sort_values("molecule").S1_eV)


def test_preset_choice_fills_method_boxes(film):
    from clusterlab.qm.method import Method

    panel = ShiftScanPanel(film, preset="draft")
    panel.preset.value = "balanced"
    ref = Method.preset("balanced")
    assert (panel.basis.value, panel.singlets.value, panel.triplets.value) == (ref.basis, ref.n_singlets,
                                                                              ref.n_triplets)
    panel.basis.value = "sto-3g"
    assert panel.build_method() == Method.preset("balanced", basis="sto-3g")


def test_panel_tables_show_at_most_eight_named_columns_and_say_what_they_leave_out():
    import re

    from clusterlab.labels import MAX_COLUMNS

    # a scan table as wide as the engine's (14 columns once the bookkeeping ones are hidden)
    rows = pd.DataFrame({"frame": 0, "molecule": 3, "radius_A": [0.0, 6.0, 9.0], "kind": ["vacuum", "cluster", "cluster"],
                         "n_env_molecules": [0, 8, 24], "n_charges": [0, 40, 120], "net_env_charge": 0.0,
                         "S1_eV": [3.1, 3.02, 3.01], "S1_shift_eV": [0.0, -0.08, -0.09], "S1_osc": [0.1, 0.11, 0.12],
                         "T1_eV": [2.5, 2.49, 2.48], "T1_shift_eV": [0.0, -0.01, -0.02], "dEST_eV": [0.6, 0.53, 0.53],
                         "IP_eV": [7.0, 6.8, 6.75], "IP_shift_eV": [0.0, -0.2, -0.25], "converged": True,
                         "wall_s": [1.0, 2.0, 3.0]})
    page = calc.frame_html(rows)
    headers = [html.unescape(h) for h in re.findall(r"<th>(.*?)</th>", page)]
    assert len(headers) == MAX_COLUMNS
    assert headers[:3] == ["molecule", "frame", "radius (Å)"]  # who and where first
    assert "S1 shift (meV)" in headers and "ΔEST (eV)" in headers
    assert not any("_" in h for h in headers)
    note = html.unescape(page.split('class="clusterlab-hidden-columns"', 1)[1])
    assert "every SCF converged" in note and "wall time (s)" in note
    # the vacuum row: "vacuum" in the radius column, never "converged yes" beside it
    assert "<td>vacuum</td>" in page and "SCF converged" not in headers
    # a failed SCF keeps its column (a warning is never cut); the vacuum row's cell stays blank
    failed = calc.frame_html(rows.assign(converged=[True, True, False]))
    headers = [html.unescape(h) for h in re.findall(r"<th>(.*?)</th>", failed)]
    assert "SCF converged" in headers and len(headers) == MAX_COLUMNS
    cells = re.findall(r"<tr>\s*(.*?)</tr>", failed, flags=re.S)
    first = re.findall(r"<td>(.*?)</td>", cells[0])  # the first body row (the header row has a style)
    assert first[headers.index("radius (Å)")] == "vacuum" and first[headers.index("SCF converged")] == ""
