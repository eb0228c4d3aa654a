"""The validation layer (mpcproto/validation.py) and the structured errors it raises: interval
ends, options, NaN/inf, booleans refused as numbers, key-path composition, pickling.

The facts checked are IEEE-754 behaviour (NaN compares false, inf is not finite) and the layer's
own contract; no external reference is needed (common practice, no source)."""

import math
import pickle

import numpy as np
import pytest

from mpcproto.exceptions import ModelError, ScenarioError, SettingsError, join_key
from mpcproto.validation import (Boolean, Interval, Length, Names, Options, Table, Text, check,
                                 validate)


def refused(value, constraint, **kw):
    with pytest.raises(SettingsError) as ei:
        check(value, constraint, owner="Owner", key="k", **kw)
    return ei.value


@pytest.mark.parametrize("closed, low_ok, high_ok", [("both", True, True), ("left", True, False),
                                                      ("right", False, True),
                                                      ("neither", False, False)])
def test_interval_ends(closed, low_ok, high_ok):
    c = Interval(float, 0.0, 1.0, closed=closed)
    assert check(0.5, c, owner="o", key="k") == 0.5
    for v, ok in ((0.0, low_ok), (1.0, high_ok)):
        if ok:
            assert check(v, c, owner="o", key="k") == v
        else:
            assert refused(v, c).found == f"{v:g}"
    e = refused(-0.1, c)
    assert e.expected == f"a number in {'[' if low_ok else '('}0, 1{']' if high_ok else ')'}"


def test_half_intervals_and_integers():
    assert refused(0, Interval(int, 1, None)).expected == "an integer >= 1"
    assert refused(0.0, Interval(float, 0.0, None, closed="right")).expected == "a number > 0"
    assert refused(2, Interval(float, None, 1.0)).expected == "a number <= 1"
    assert check(np.int64(3), Interval(int, 1, None), owner="o", key="k") == 3
    assert isinstance(check(3, Interval(float, 1, None), owner="o", key="k"), float)
    assert refused(3.0, Interval(int, 1, None)).found == "3.0"     # a float is not an integer
    assert refused(10 ** 400, Interval(float)).found == "inf"      # too large for a float


@pytest.mark.parametrize("bad", [True, False, np.bool_(True), "1", None, [1.0]])
def test_booleans_strings_and_lists_are_not_numbers(bad):
    e = refused(bad, Interval(float, 0.0, None))
    assert e.expected == "a number >= 0"


def test_nan_and_inf():
    assert refused(math.nan, Interval(float)).found == "nan"
    assert refused(math.inf, Interval(float, 0, None)).found == "inf"
    assert check(math.inf, Interval(float, 0, None, allow_inf=True), owner="o", key="k") == math.inf
    assert refused(math.nan, Interval(float, allow_inf=True)).found == "nan"   # NaN never passes
    assert refused(-math.inf, Interval(float, 0, None, allow_inf=True)).found == "-inf"


def test_options_names_boolean_text():
    e = refused("stepp", Options(("step", "ramp"), noun="signal kind"))
    assert e.expected == "signal kind one of 'step', 'ramp'"
    assert "did you mean 'step'?" in e.found
    e = refused("levl", Names("CV", ("level", "temperature")))
    assert e.expected == "the name of a CV of this model (level, temperature)"
    assert "did you mean 'level'?" in e.found
    assert refused(1, Boolean()).found == "1"
    assert check(np.bool_(False), Boolean(), owner="o", key="k") is False
    assert refused("two\nlines", Text()).found == "'two\\nlines'"


def test_length_names_the_index():
    c = Length(length=3, item=Interval(float, 0, None))
    assert np.array_equal(check([1, 2, 3], c, owner="o", key="v"), [1.0, 2.0, 3.0])
    with pytest.raises(SettingsError) as ei:
        check([1, -2, 3], c, owner="o", key="v")
    assert ei.value.key == "v[1]" and ei.value.found == "-2"
    assert refused([1, 2], c).found == "2 items"
    assert refused("abc", c).found == "'abc'"


def test_table_and_validate():
    t = Table({"at": Interval(float, 0, None), "kind": Options(("step",))}, required=("at",))
    with pytest.raises(SettingsError) as ei:
        check({"kind": "step"}, t, owner="o", key="disturbances.feed")
    assert ei.value.key == "disturbances.feed.at" and ei.value.found == "nothing"
    with pytest.raises(SettingsError) as ei:
        validate({"at": 1.0, "sise": 2}, t.keys, owner="o")
    assert ei.value.key == "sise" and "the unknown key 'sise'" in ei.value.found
    assert validate({"at": 2, "x": "y"}, t.keys, owner="o", unknown="keep") == {"at": 2.0, "x": "y"}


def test_one_template():
    e = refused(-1, Interval(float, 0, None), fix="a weight cannot be negative")
    assert str(e) == "Owner: key 'k': expected a number >= 0, found -1; a weight cannot be negative."
    assert (e.owner, e.key, e.expected, e.found, e.file) == ("Owner", "k", "a number >= 0", "-1",
                                                             None)


def test_key_paths_compose_structurally():
    assert join_key("controllers.mpc", "cv.level.weight") == "controllers.mpc.cv.level.weight"
    assert join_key("disturbances.feed", "[1].interval") == "disturbances.feed[1].interval"
    assert join_key(None, "k") == "k" and join_key("a", None) == "a" and join_key(None, None) is None
    e = refused(0, Interval(int, 1, None))
    placed = e.at("controllers.mpc")
    assert placed.key == "controllers.mpc.k" and e.key == "k"          # a copy, not a change
    assert type(placed) is SettingsError
    s = placed.in_file("plant.toml")
    assert isinstance(s, ScenarioError) and s.file == "plant.toml" and s.key == "controllers.mpc.k"
    assert str(s) == "plant.toml: key 'controllers.mpc.k': expected an integer >= 1, found 0."
    assert SettingsError("free text", owner="o").at("x").key == "x"


def test_scenario_error_constructor_compatible_and_pickles():
    e = ScenarioError("expected a number; found 'a'.", file="f.toml", key="scenario.duration")
    assert str(e) == "f.toml: key 'scenario.duration': expected a number; found 'a'."
    assert ScenarioError("plain").key is None and str(ScenarioError("plain")) == "plain"
    for err in (e, SettingsError(owner="o", key="k", expected="x", found="y", code="c"),
                ModelError("m", key="parameters.area")):
        back = pickle.loads(pickle.dumps(err))
        assert type(back) is type(err) and str(back) == str(err)
        assert back.fields() == err.fields()
    n = e.replace(note="value set by case s001")
    assert str(n).endswith("found 'a'. (value set by case s001)")
