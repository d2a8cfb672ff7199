"""Unit tests of clusterlab.qm.method.Method (no quantum chemistry runs)."""

import json
import re
import subprocess
import sys

import numpy as np
import pytest

from clusterlab.errors import InputError
from clusterlab.qm.method import DEFAULT_SMEARING_A, Method


def test_key_is_sha256_of_canonical_json():
    import hashlib

    m = Method.preset("draft")
    assert m.key() == hashlib.sha256(m.canonical_json().encode()).hexdigest()
    assert len(m.key()) == 64


def test_same_fields_same_key_and_any_change_changes_it():
    a = Method(xc="b3lyp", basis="6-31g", n_singlets=2)
    b = Method(basis="6-31G", xc="B3LYP", n_singlets=2)  # case is normalised
    assert a == b and a.key() == b.key()
    keys = {a.key(), a.replace(n_singlets=3).key(), a.replace(charge_smearing_A=0.5).key(),
            a.replace(response_grid_level=None).key(), a.replace(density_fit=False).key()}
    assert len(keys) == 5


def test_key_stable_in_a_fresh_process():
    """Python's hash() of strings is salted per process; the key must not be."""
    m = Method.preset("balanced", n_triplets=1)
    code = ("from clusterlab.qm.method import Method;"
            "print(Method.preset('balanced', n_triplets=1).key())")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={"PYTHONHASHSEED": "12345", "PATH": "/usr/bin:/bin"}, cwd=".")
    assert out.stdout.strip() == m.key()


def test_presets_listed_and_distinct():
    names = Method.presets()
    assert len(names) >= 3
    assert all(isinstance(v, str) and v for v in names.values())
    methods = [Method.preset(n) for n in names]
    assert len({m.key() for m in methods}) == len(methods)
    assert Method.preset("ct-rsh").xc == "camb3lyp"
    assert Method.preset("balanced").basis == "def2-svp"


def test_unknown_preset_lists_valid_ones():
    with pytest.raises(InputError, match=r"'nope' is not a method preset.*'draft'"):
        Method.preset("nope")


@pytest.mark.parametrize("kw, pattern", [
    ({"excited": "cis"}, r"excited='cis'.*'tda', 'tddft', 'stda'"),
    ({"n_singlets": -1}, r"n_singlets=-1 must be a non-negative integer"),
    ({"n_triplets": 1.5}, r"n_triplets=1.5"),
    ({"grid_level": 12}, r"grid_level=12 must be an integer PySCF grid level from 0 to 9"),
    ({"conv_tol": 0}, r"conv_tol=0 must be a finite positive"),
    ({"charge_smearing_A": -0.1}, r"charge_smearing_A=-0.1"),
    ({"max_cycle": 0}, r"max_cycle=0 must be a positive integer"),
    ({"threads": 0}, r"threads=0"),
    ({"density_fit": "yes"}, r"density_fit='yes' must be True or False"),
])
def test_validation_messages(kw, pattern):
    with pytest.raises(InputError, match=pattern):
        Method(**kw)


def test_dict_round_trip_and_unknown_field():
    m = Method.preset("ct-rsh", threads=2)
    d = json.loads(json.dumps(m.to_dict()))
    assert Method.from_dict(d) == m and Method.from_dict(d).key() == m.key()
    with pytest.raises(InputError, match=r"Unknown Method field.*'functional'"):
        Method.from_dict({**d, "functional": "pbe"})
    with pytest.raises(InputError, match="Unknown Method field"):
        m.replace(bogus=1)


def test_frozen_and_default_smearing_documented():
    m = Method()
    assert m.charge_smearing_A == DEFAULT_SMEARING_A == 1.0
    with pytest.raises(Exception):
        m.xc = "pbe"  # type: ignore[misc]


@pytest.mark.parametrize("fields, named", [
    ({"n_singlets": "abc"}, "n_singlets='abc'"),
    ({"n_singlets": None}, "n_singlets=None"),
    ({"n_triplets": float("nan")}, "n_triplets=nan"),
    ({"n_singlets": 2.5}, "n_singlets=2.5"),
    ({"conv_tol": "tight"}, "conv_tol='tight'"),
    ({"max_cycle": "many"}, "max_cycle='many'"),
    ({"grid_level": True}, "grid_level=True"),
    ({"threads": 0}, "threads=0"),
])
def test_wrong_field_types_are_named_input_errors(fields, named):
    with pytest.raises(InputError, match=re.escape(named)):
        Method(**fields)


def test_numpy_numbers_are_accepted_as_fields():
    m = Method(n_singlets=np.int64(2), conv_tol=np.float64(1e-8))
    assert m.n_singlets == 2 and isinstance(m.n_singlets, int) and m.conv_tol == 1e-8


def test_preset_and_from_dict_refuse_bad_input_by_name():
    with pytest.raises(InputError, match=r"\['n_singlet'\].*preset\('draft'"):
        Method.preset("draft", n_singlet=2)
    with pytest.raises(InputError, match="needs a dict of fields; got list"):
        Method.from_dict([1, 2])


def test_unknown_basis_or_functional_fails_before_any_calculation():
    """PySCF's own KeyError for a misspelt basis or functional becomes an
    InputError naming the value, before any SCF runs."""
    from clusterlab.qm.calc import check_method

    with pytest.raises(InputError, match="basis='6-31x'.*\\['C', 'H'\\]"):
        check_method(Method(basis="6-31x"), ["C", "H", "H"])
    with pytest.raises(InputError, match="xc='b3lpy'"):
        check_method(Method(xc="b3lpy"), ["C"])
    with pytest.raises(InputError, match="for element\\(s\\) \\['I'\\]"):
        check_method(Method(basis="6-31g"), ["C", "I"])
    check_method(Method(xc="hf", basis="sto-3g"), ["C", "H"])  # fine: no error
