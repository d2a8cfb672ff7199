"""The one grammar for molecule ids, frames and radii (clusterlab.ranges).

References: the expected lists are written out by hand from the grammar
("a-b" includes both ends, ":s" steps from a) and compared with Python's own
``range``/``numpy.arange`` where a formula exists.
"""

from __future__ import annotations

import doctest
import warnings

import numpy as np
import pytest

import clusterlab.ranges as ranges
from clusterlab.errors import InputError
from clusterlab.ranges import RepeatedValueWarning, is_id_text, parse_frames, parse_ids, parse_radii


def test_module_examples_run():
    result = doctest.testmod(ranges)
    assert result.attempted >= 10 and result.failed == 0


# ------------------------------------------------------------------- ids
@pytest.mark.parametrize("text, expected", [
    ("3", [3]),
    ("5-12", [5, 6, 7, 8, 9, 10, 11, 12]),          # both ends included
    ("0-10:2", [0, 2, 4, 6, 8, 10]),
    ("0-9:2", [0, 2, 4, 6, 8]),                      # the end is not on the step grid
    ("1,4,9-12", [1, 4, 9, 10, 11, 12]),
    (" 1, 4  9-12 ", [1, 4, 9, 10, 11, 12]),         # spaces separate too
    ("12, 3", [12, 3]),                              # the order given is kept
    ("all", list(range(20))),
    ("ALL", list(range(20))),
    ("19", [19]),
])
def test_ids_text(text, expected):
    out = parse_ids(text, 20)
    assert out.dtype == np.int64
    assert out.tolist() == expected


def test_ids_ranges_match_python_range():
    for a, b, s in [(0, 19, 1), (3, 17, 4), (2, 2, 5)]:
        assert parse_ids(f"{a}-{b}:{s}", 20).tolist() == list(range(a, b + 1, s))


def test_ids_already_parsed():
    assert parse_ids(7, 20).tolist() == [7]
    assert parse_ids(np.int32(7), 20).tolist() == [7]
    assert parse_ids([3, 1, 2], 20).tolist() == [3, 1, 2]
    assert parse_ids(np.array([4, 5]), 20).tolist() == [4, 5]
    assert parse_ids(range(3), 20).tolist() == [0, 1, 2]
    assert parse_ids(None, 4).tolist() == [0, 1, 2, 3]


@pytest.mark.parametrize("value, match", [
    ("20", r"molecule id 20 is out of range; valid molecule ids are 0..19"),
    ("18-21", r"molecule id 21 in '18-21' is out of range; valid molecule ids are 0..19"),
    ("-1", r"molecule id -1 is negative"),
    ("3-x", r"'3-x' is not a molecule id, a range or 'all'; valid molecule ids are 0..19"),
    ("1.5", r"'1.5' is not a molecule id"),
    ("9-3", r"'9-3' starts after it ends"),
    ("0-10:0", r"the step of '0-10:0' must be at least 1"),
    ("0:10:2", r"a range is start-end:step with both ends included, e.g. '0-19:5'"),
    ("", r"no molecule ids given"),
    ([1, 2.5], r"2.5 is not an integer molecule id"),
    ([True], r"True is not an integer molecule id"),
    (2.0, r"give a text, an integer or a list of integers, not float"),
])
def test_ids_errors_name_the_token_range_and_grammar(value, match):
    with pytest.raises(InputError, match=match) as info:
        parse_ids(value, 20)
    assert ranges.ID_GRAMMAR in str(info.value)


def test_ids_without_a_count_are_checked_but_not_bounded():
    assert parse_ids("0-3, 500", None).tolist() == [0, 1, 2, 3, 500]
    with pytest.raises(InputError, match="'all' needs the number of molecule ids"):
        parse_ids("all", None)
    with pytest.raises(InputError, match="is negative"):
        parse_ids("-2", None)


def test_is_id_text_tells_ids_from_selections():
    for text in ("7", "3-9, 12", "0-10:2", "all", " 1 2 "):
        assert is_id_text(text), text
    for text in ("resname WAT", "index 0:5", "", "name C1", "all and resid 3"):
        assert not is_id_text(text), text


# ---------------------------------------------------------------- frames
@pytest.mark.parametrize("text, expected", [
    ("0", [0]),
    ("0, 5, 10", [0, 5, 10]),
    ("0-19:5", [0, 5, 10, 15]),        # what the old slice '0:20:5' meant, written with its end included
    ("5-12", list(range(5, 13))),
    ("-1", [19]),
    ("-3--1", [17, 18, 19]),
    ("15--1", [15, 16, 17, 18, 19]),   # from frame 15 to the last one
    ("-20", [0]),
    ("all", list(range(20))),
])
def test_frames_text(text, expected):
    assert parse_frames(text, 20) == expected


def test_frames_already_parsed():
    assert parse_frames(3, 20) == [3]
    assert parse_frames(-1, 20) == [19]
    assert parse_frames([0, -1], 20) == [0, 19]
    assert parse_frames(None, 3) == [0, 1, 2]
    assert parse_frames(slice(0, 20, 5), 20) == list(range(20))[0:20:5]   # a slice keeps Python's rules
    assert parse_frames(np.array([2, 4]), 20) == [2, 4]


def test_frames_errors():
    with pytest.raises(InputError, match=r"frame 7 is out of range; the film has frames 0..2 \(-3..-1 counted"):
        parse_frames("7", 3)
    with pytest.raises(InputError, match=r"frame -4 is out of range; the film has frames 0..2"):
        parse_frames("-4", 3)
    with pytest.raises(InputError, match=r"'0:20:5' is not a frame.*e.g. '0-19:5'.*Frames are written"):
        parse_frames("0:20:5", 20)
    with pytest.raises(InputError, match="there are no frames"):
        parse_frames("0", 0)


def test_frames_without_a_count_keep_negative_frames():
    assert parse_frames("-3--1", None) == [-3, -2, -1]
    assert parse_frames("0-10:5, -1", None) == [0, 5, 10, -1]
    with pytest.raises(InputError, match="runs from a negative to a non-negative frame"):
        parse_frames("3--1", None)
    with pytest.raises(InputError, match="'all' needs the number of frames"):
        parse_frames("all", None)


def test_repeated_frames_are_used_once_with_a_warning():
    with pytest.warns(RepeatedValueWarning, match=r"frames '0-5, 3, -1' name 3, 5 more than once"):
        out = parse_frames("0-5, 3, -1", 6)
    assert out == [0, 1, 2, 3, 4, 5]
    with pytest.warns(RepeatedValueWarning, match="molecule ids"):
        assert parse_ids([4, 4, 1], 10).tolist() == [4, 1]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert parse_frames("0-5", 6) == list(range(6))   # no warning without repeats


# ----------------------------------------------------------------- radii
@pytest.mark.parametrize("text, expected", [
    ("5,8,12", [5.0, 8.0, 12.0]),
    ("12, 6 9", [6.0, 9.0, 12.0]),                 # ascending whatever the order given
    ("6-15:3", [6.0, 9.0, 12.0, 15.0]),            # the end on the grid is included
    ("6-14:3", [6.0, 9.0, 12.0]),                  # the end off the grid is not
    ("5-12:1", [5.0, 6.0, 7.0, 8.0, 9.0, 10.0, 11.0, 12.0]),
    ("0.1-0.3:0.1", [0.1, 0.2, 0.3]),              # 0.1 + 2 * 0.1 = 0.30000000000000004: end kept
    ("4.5", [4.5]),
    ("3-4.5:0.5, 10", [3.0, 3.5, 4.0, 4.5, 10.0]),
])
def test_radii_text(text, expected):
    assert parse_radii(text) == expected


def test_radii_grid_matches_numpy():
    out = parse_radii("2.5-20:0.7")
    ref = np.arange(2.5, 20.0 + 1e-9, 0.7)
    np.testing.assert_allclose(out, ref, atol=1e-6)
    assert len(out) == int(np.floor((20 - 2.5) / 0.7)) + 1


def test_radii_already_parsed():
    assert parse_radii(12) == [12.0]
    assert parse_radii(np.float32(4.5)) == [4.5]
    assert parse_radii([9, 6.0]) == [6.0, 9.0]
    assert parse_radii(np.array([3.0, 4.0])) == [3.0, 4.0]


@pytest.mark.parametrize("value, match", [
    ("-3, 6", r"-3 is not allowed; radii must be positive numbers of Å"),
    ("0", r"radii must be positive numbers"),
    ("6, nine", r"radii '6, nine' are not valid: 'nine' is not a number or a range start-end:step"),
    ("6:15:3", r"write a range as start-end:step, e.g. '6-15:3'"),
    ("6-12", r"the range '6-12' needs a step, e.g. '6-12:1'"),
    ("12-6:1", r"'12-6:1' starts after it ends"),
    ("6-12:0", r"the step of '6-12:0' must be positive"),
    ("", r"no radii given"),
    ([6, float("inf")], r"inf is not allowed"),
    ([6, "9"], r"'9' is not a number"),
])
def test_radii_errors(value, match):
    with pytest.raises(InputError, match=match) as info:
        parse_radii(value)
    assert ranges.RADIUS_GRAMMAR in str(info.value)


def test_repeated_radii_are_used_once_with_a_warning():
    with pytest.warns(RepeatedValueWarning, match="radii '6-12:3, 9' name 9 more than once"):
        assert parse_radii("6-12:3, 9") == [6.0, 9.0, 12.0]
    with pytest.warns(RepeatedValueWarning):
        assert parse_radii([6.0, 6.0000000001]) == [6.0]   # the same radius to 1e-6 Å
