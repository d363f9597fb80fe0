"""Declared constraints, the one table validator and the one "did you mean" hint.

Reference values are the constraints' own definitions (common practice: closed and open
interval ends, Python's ``difflib`` similarity for hints).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from quakefolio.core.errors import InputError, closest_name, did_you_mean
from quakefolio.core.validation import (
    REQUIRED, Boolean, Field, Integer, Interval, Invalid, ListOf, MaxMagnitude, OneOf, Pattern, Place, Real, Rule,
    Schema, Text, WholeNumber, check_value, toml_place, validate_table,
)


# --- constraint objects -------------------------------------------------------------------------

@pytest.mark.parametrize("constraint, good, bad", [
    (Real(), [0, 1.5, -3, math.inf], [True, "1", None, [1]]),
    (Real(finite=True), [0, 1.5, -3], [math.inf, math.nan, True, "x"]),
    (Integer(), [0, -4, 10**12], [1.0, True, "3"]),
    (Boolean(), [True, False], [0, 1, "true"]),
    (Text(), ["", "a"], [1, None]),
    (Text(non_empty=True), ["a", " b "], ["", "   ", 3]),
    (OneOf(("g", "m/s2")), ["g", "m/s2"], ["G", "cm/s2", None]),
    (Interval(0, None, closed="neither"), [1e-300, 5], [0, -1, math.nan]),
    (Interval(0, None), [0, 5], [-1e-300, math.nan]),
    (Interval(0, 1, closed="left"), [0, 0.999], [1, -0.1]),
    (Interval(-90.0, 90.0), [-90, 90, 0], [90.0001, -91]),
    (Pattern(r"^[a-z]+$"), ["abc"], ["Abc", "", 3]),
    (Pattern(r"^tcp://\S+$", allow_empty=True), ["", "tcp://h:1"], ["h:1"]),
    (ListOf(Real(), min_len=2, increasing=True), [[1, 2], [0.1, 0.5, 3]], [[1], [2, 1], [1, 1], "12", [1, "a"]]),
    (WholeNumber(), [3.0, 0, -2], [2.5]),
    (MaxMagnitude(1e15), [1e15, -1e15, math.nan], [1e16, -math.inf]),
])
def test_constraint_accepts_and_rejects(constraint, good, bad):
    for v in good:
        assert constraint.holds(v), v
        assert constraint.failure(v, v) is None
    for v in bad:
        assert not constraint.holds(v), v
        assert constraint.failure(v, v).startswith(constraint.describe())


@pytest.mark.parametrize("constraint, text", [
    (Interval(0, None, closed="neither"), "expected a positive number"),
    (Interval(0, None), "expected a non-negative number"),
    (Interval(0, 1), "expected a number in [0, 1]"),
    (Interval(-180.0, 180.0), "expected a number in [-180, 180]"),
    (Interval(0, 1, closed="neither"), "expected a number in (0, 1)"),
    (Interval(1, None, message="expected an integer >= 1"), "expected an integer >= 1"),
    (OneOf(("reject", "envelope")), "expected one of 'reject', 'envelope'"),
    (Real(), "expected a number"),
    (Real(finite=True), "expected a finite number"),
    (MaxMagnitude(1e15), "value out of range (|x| > 1e+15)"),
    (WholeNumber(), "expected an integer"),
])
def test_constraints_describe_themselves(constraint, text):
    assert constraint.describe() == text


def test_failure_shows_the_value_as_written_unless_told_not_to():
    assert Interval(0, None, closed="neither").failure(-3.0, -3) == "expected a positive number, got -3"
    quiet = ListOf(Real(finite=True), "expected finite numbers", show_value=False)
    assert quiet.failure([1, math.inf], [1, math.inf]) == "expected finite numbers"
    worded = Rule(lambda v: v != "x", lambda v: f"name {v!r} is taken", show_value=False)
    assert worded.failure("x", "x") == "name 'x' is taken"


def test_interval_rejects_bad_closed_argument():
    with pytest.raises(ValueError, match="closed must be"):
        Interval(0, 1, closed="open")


def test_column_violations_match_the_scalar_check():
    values = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, np.inf])
    for c in (Interval(0, None, closed="neither"), Interval(0, None), Interval(0, 1), Real(finite=True),
              WholeNumber(), MaxMagnitude(1.5)):
        expected = np.array([not c.holds(v) for v in values])
        np.testing.assert_array_equal(c.violations(values), expected)


def test_check_value_converts_in_order_and_stops_at_the_first_failure():
    rules = (ListOf(Real(), "expected a list of numbers"), ListOf(Interval(0, None, closed="neither"), "positive"))
    assert check_value(rules, [1, 2]) == ([1.0, 2.0], None)
    assert all(isinstance(v, float) for v in check_value(rules, [1, 2])[0])
    assert check_value(rules, [1, "a"])[1] == "expected a list of numbers, got [1, 'a']"
    assert check_value(rules, [1, -2])[1] == "positive, got [1, -2]"


def test_conversion_errors_become_messages():
    class Upper(Rule):
        def convert(self, value, context):
            if value == "bad":
                raise Invalid("cannot convert 'bad'")
            return value.upper() + context.get("suffix", "")

    rule = Upper(lambda v: isinstance(v, str), "expected a string")
    assert check_value((rule,), "ab", {"suffix": "!"}) == ("AB!", None)
    assert check_value((rule,), "bad")[1] == "cannot convert 'bad'"


# --- the validator: one error shape --------------------------------------------------------------

TEXT = """\
[model]
name = "x"
size = -2
colour = "red"
"""

SCHEMA = Schema({
    "name": Field((Text(non_empty=True),)),
    "size": Field((Real(finite=True), Interval(0, None, closed="neither")), 1.0, help="size [m]"),
    "colour": Field((Text(), OneOf(("red", "blue"))), "blue"),
    "tags": Field((ListOf(Text()),), []),
})


def _place(text=TEXT):
    return toml_place("model.toml", text, ("model",), "model")


def test_validator_reports_file_line_and_key():
    with pytest.raises(InputError) as info:
        validate_table({"name": "x", "size": -2, "colour": "red"}, SCHEMA, _place())
    err = info.value
    assert (err.path, err.row, err.column) == ("model.toml", 3, "model.size")
    assert err.message == "expected a positive number, got -2"
    assert str(err) == "model.toml:3: column 'model.size': expected a positive number, got -2"


def test_validator_fills_defaults_and_converts():
    out = validate_table({"name": "x", "size": 2}, SCHEMA, _place())
    assert out == {"name": "x", "size": 2.0, "colour": "blue", "tags": []}
    assert isinstance(out["size"], float)
    assert list(out) == list(SCHEMA.fields)


def test_unknown_key_gets_the_hint_or_the_valid_keys():
    text = "[model]\nname = \"x\"\ncolor = \"red\"\nzzz = 1\n"
    with pytest.raises(InputError) as info:
        validate_table({"name": "x", "color": "red"}, SCHEMA, _place(text))
    assert (info.value.row, info.value.column) == (3, "model.color")
    assert info.value.message == "unknown key; did you mean 'colour'?"
    with pytest.raises(InputError) as info:
        validate_table({"name": "x", "zzz": 1}, SCHEMA, _place(text))
    assert info.value.message == "unknown key; valid keys: name, size, colour, tags"


def test_missing_key_is_reported_at_the_table():
    with pytest.raises(InputError) as info:
        validate_table({"size": 1}, SCHEMA, _place())
    assert (info.value.row, info.value.column, info.value.message) == (1, "model.name", "missing required key 'name'")
    table_only = Schema(SCHEMA.fields, missing="needs '{key}'", missing_names_key=False)
    with pytest.raises(InputError) as info:
        validate_table({}, table_only, _place())
    assert (info.value.column, info.value.message) == ("model", "needs 'name'")


def test_missing_first_checks_presence_before_values():
    schema = Schema({"a": Field((Integer(),)), "b": Field((Integer(),))}, missing_first=True)
    with pytest.raises(InputError, match="missing required key 'b'"):
        validate_table({"a": "not an int"}, schema, Place("f"))
    interleaved = Schema(schema.fields)
    with pytest.raises(InputError, match="expected an integer, got 'not an int'"):
        validate_table({"a": "not an int"}, interleaved, Place("f"))


def test_place_without_text_gives_no_row():
    with pytest.raises(InputError) as info:
        validate_table({"name": ""}, SCHEMA, toml_place("m.toml", "", ("model",), "model"))
    assert info.value.row is None
    assert str(info.value) == "m.toml: column 'model.name': expected a non-empty string, got ''"


def test_field_required_flag():
    assert Field(()).required and Field((), REQUIRED).required
    assert not Field((), None).required


# --- one hint helper -------------------------------------------------------------------------------

def test_did_you_mean_formats_and_falls_back():
    valid = ["replacement_value", "asset_id"]
    assert did_you_mean("replacment_value", valid, cutoff=0.8) == "; did you mean 'replacement_value'?"
    assert did_you_mean("zzz", valid, cutoff=0.8) == ""
    assert did_you_mean("zzz", valid, cutoff=0.8, otherwise="; valid: x") == "; valid: x"
    assert did_you_mean("it's", ["its'", "it's!"], cutoff=0.5, quote="repr") == '; did you mean "it\'s!"?'


def test_did_you_mean_cutoff_is_honoured():
    # difflib ratio of "mod" and "mode" is 2 * 3 / 7 = 0.857
    assert closest_name("mod", ["mode"], cutoff=0.85) == "mode"
    assert closest_name("mod", ["mode"], cutoff=0.86) is None


def test_did_you_mean_skips_names_already_present():
    assert did_you_mean("lat2", ["lat", "lon"], cutoff=0.6, skip=["lat"]) == ""
    assert did_you_mean("lat2", ["lat", "lon"], cutoff=0.6, skip=["lon"]) == "; did you mean 'lat'?"
