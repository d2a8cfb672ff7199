"""State-charge sets as plain data: JSON round trips, sets stored by earlier
versions, symmetrized charges."""

from __future__ import annotations

import json

import numpy as np
import pytest

from clusterlab.electrostatics.chargeset import ConformerCharges, StateChargeSet
from clusterlab.errors import InputError

from test_filmmodel import WATER_STATES

#: ``StateChargeSet.to_json()`` of a small made-up set (two conformer references, one with
#: Δα/Δμ of S1, transition charges, one reference fit, finite-field settings), written by
#: the code before the set moved to ``clusterlab.electrostatics.chargeset``; kept verbatim.
LEGACY_JSON = (
    '{"kind": "clusterlab.StateChargeSet", "version": 1, "method": "hf/sto-3g", "charges_e": {"WAT": '
    '{"S0": [-0.8, 0.4, 0.4], "S1": [-0.5, 0.25, 0.25], "cation": [0.0, 0.5, 0.5]}}, "transition_e": '
    '{"WAT": [0.0, 0.125, -0.125]}, "reference": {"WAT": {"frame": 0, "molecule": 2}}, "fits": {"WAT"'
    ': {"symbols": ["O", "H", "H"], "positions_A": [[0.0, 0.0, 0.0], [0.75, 0.0, 0.5], [-0.75, 0.0, 0'
    '.5]], "method": "hf/sto-3g", "states": ["S0", "S1", "cation"], "charges_e": {"S0": [-0.8, 0.4, 0'
    '.4], "S1": [-0.5, 0.25, 0.25], "cation": [0.0, 0.5, 0.5]}, "total_charge_e": {"S0": 0.0, "S1": 0'
    '.0, "cation": 1.0}, "dipole_fit_D": {"S0": [0.0, 0.0, 1.5], "S1": [0.0, 0.0, 1.5], "cation": [0.'
    '0, 0.0, 1.5]}, "dipole_qm_D": {"S0": [0.0, 0.0, 1.75], "S1": [0.0, 0.0, 1.75], "cation": [0.0, 0'
    '.0, 1.75]}, "rrms": {"S0": 0.125, "S1": 0.125, "cation": 0.125}, "energy_eV": {"S0": 0.0, "S1": '
    '8.5, "cation": 11.25}, "converged": {"S0": true, "S1": true, "cation": true}, "transition_charge'
    's_e": [0.0, 0.125, -0.125], "transition_dipole_fit_D": [0.5, 0.0, 0.0], "transition_dipole_qm_D"'
    ': [-0.5, 0.0, 0.0], "density_kind": "S1/T1: unrelaxed TDA difference density; ions: \\u0394SCF UK'
    'S", "n_points": 120, "versions": {"clusterlab": "0.1"}}}, "conformers": {"WAT": [{"positions_A":'
    ' [[0.0, 0.0, 0.0], [0.75, 0.0, 0.5], [-0.75, 0.0, 0.5]], "charges_e": {"S0": [-0.8, 0.4, 0.4], "'
    'S1": [-0.5, 0.25, 0.25], "cation": [0.0, 0.5, 0.5]}, "transition_e": [0.0, 0.125, -0.125], "dalp'
    'ha_A3": {"S1": [[1.5, 0.0, 0.0], [0.0, 0.5, 0.0], [0.0, 0.0, 0.25]]}, "dmu_D": {"S1": [0.0, 0.0,'
    ' 0.75]}, "frame": 0, "molecule": 2}, {"positions_A": [[0.0, 0.0, 0.0], [0.796875, 0.0, 0.53125],'
    ' [-0.796875, 0.0, 0.53125]], "charges_e": {"S0": [-0.4, 0.2, 0.2], "S1": [-0.25, 0.125, 0.125], '
    '"cation": [0.0, 0.25, 0.25]}, "transition_e": null, "dalpha_A3": {}, "dmu_D": {}, "frame": 1, "m'
    'olecule": 5}]}, "stark_method": {"xc": "hf", "basis": "sto-3g", "steps_V_A": [0.1, 0.2]}}'
)


@pytest.fixture(scope="module")
def water_set():
    return StateChargeSet.from_arrays({"WAT": WATER_STATES})


def test_json_round_trip(water_set, tmp_path):
    path = tmp_path / "set.json"
    water_set.save(str(path))
    back = StateChargeSet.load(str(path))
    assert back.resnames == ["WAT"]
    for st in WATER_STATES:
        assert np.array_equal(back.charges_e["WAT"][st], water_set.charges_e["WAT"][st])
    assert json.loads(path.read_text())["kind"] == "clusterlab.StateChargeSet"
    with pytest.raises(InputError, match="not a state-charge set"):
        StateChargeSet.from_json('{"kind": "other"}')


def test_set_stored_by_earlier_versions_loads_unchanged():
    """Every number of a stored set comes back, and writing it again gives the same JSON."""
    cset = StateChargeSet.from_json(LEGACY_JSON)
    assert cset.resnames == ["WAT"] and cset.method == "hf/sto-3g"
    assert cset.charges_e["WAT"]["cation"].tolist() == [0.0, 0.5, 0.5]
    assert cset.transition_e["WAT"].tolist() == [0.0, 0.125, -0.125]
    assert cset.reference == {"WAT": {"frame": 0, "molecule": 2}}
    refs = cset.conformers["WAT"]
    assert [(c.frame, c.molecule) for c in refs] == [(0, 2), (1, 5)]
    assert np.array_equal(refs[0].dalpha_A3["S1"], np.diag([1.5, 0.5, 0.25]))
    assert refs[0].dmu_D["S1"].tolist() == [0.0, 0.0, 0.75] and refs[1].transition_e is None
    assert refs[0].has_response(["S1"]) and not refs[1].has_response(["S1"]) and not cset.has_response(["S1"])
    assert refs[1].positions_A[1].tolist() == [0.796875, 0.0, 0.53125]
    fit = cset.fits["WAT"]
    assert fit["symbols"] == ["O", "H", "H"] and fit["energy_eV"]["S1"] == 8.5 and fit["n_points"] == 120
    assert cset.stark_method == {"xc": "hf", "basis": "sto-3g", "steps_V_A": [0.1, 0.2]}
    assert json.loads(cset.to_json()) == json.loads(LEGACY_JSON)
    assert cset.to_json() == LEGACY_JSON


def test_symmetrized_needs_classes_of_every_type(water_set):
    """Averaging over given classes keeps each state's total; a type without
    labels or with labels of the wrong length is an input error."""
    sym = water_set.symmetrized({"WAT": [0, 1, 1]})
    for s, q in sym.charges_e["WAT"].items():
        assert q[1] == q[2] and q.sum() == pytest.approx(np.sum(WATER_STATES[s]), abs=1e-12)
    assert np.array_equal(water_set.charges_e["WAT"]["S0"], np.asarray(WATER_STATES["S0"], float))  # a copy
    with pytest.raises(InputError, match="no equivalence classes for 'WAT'"):
        water_set.symmetrized({})
    with pytest.raises(InputError, match="2 equivalence labels"):
        water_set.symmetrized({"WAT": [0, 1]})


def test_summary_and_frame():
    ref = ConformerCharges(positions_A=np.zeros((3, 3)) + np.arange(3)[:, None], charges_e=dict(WATER_STATES),
                           dalpha_A3={"S1": np.eye(3)}, dmu_D={"S1": np.zeros(3)}, frame=0, molecule=4)
    cset = StateChargeSet.from_conformers({"WAT": [ref]}, method="made-up")
    s = cset.summary()
    assert s["method"] == "made-up" and s["WAT_n_conformers"] == 1 and s["WAT_field_response"] == "S1"
    t = cset.to_frame()
    assert len(t) == 3 * len(WATER_STATES) and set(t.state) == set(WATER_STATES)
