"""Scenario files: parsing, validation messages, key paths."""

import pickle

import pytest

import mpcproto as mp
from mpcproto.scenario import get_path, load_scenario, parse_scenario, set_path

MINIMAL = {
    "scenario": {"sample_time": 10.0, "duration": 600.0},
    "plant": {"model": "blending_tank"},
}


def _with(**sections):
    raw = {k: dict(v) for k, v in MINIMAL.items()}
    for k, v in sections.items():
        raw[k] = v
    return raw


def test_minimal_scenario_fills_defaults():
    scn = parse_scenario(MINIMAL, file="mini.toml", default_name="mini")
    assert scn.name == "mini"
    assert scn.sample_time == 10.0 and scn.duration == 600.0 and scn.seed == 0
    assert scn.data["operating_point"]["pick"] == "nearest"
    assert scn.data["controllers"] == {} and scn.data["criteria"] == []
    assert scn.data["study"] == {"draws": 0, "full_draws": 0, "sweep": [], "draw": []}
    # plain data: pickles and round-trips
    assert pickle.loads(pickle.dumps(scn)).data == scn.data


def test_demo_scenario_loads():
    scn = load_scenario("scenarios/caustic_blending.toml")
    assert scn.name == "caustic_blending"
    assert scn.data["plant"]["model"] == "blending_tank"


def test_unknown_key_has_did_you_mean():
    raw = _with(scenario={"sample_time": 10.0, "duraton": 600.0})
    with pytest.raises(mp.ScenarioError) as ei:
        parse_scenario(raw, file="x.toml")
    msg = str(ei.value)
    assert msg.startswith("x.toml: key 'scenario.duraton'")
    assert "did you mean 'duration'" in msg
    assert ei.value.key == "scenario.duraton" and ei.value.file == "x.toml"


def test_wrong_type_names_expected_and_found():
    raw = _with(scenario={"sample_time": "10 s"})
    with pytest.raises(mp.ScenarioError, match=r"key 'scenario.sample_time': expected a number, "
                                                 r"found a string \('10 s'\)\.$"):
        parse_scenario(raw, file="x.toml")


def test_criteria_key_path_has_index():
    raw = _with(criteria=[{"check": "no_limit_violation"}, {"check": "iae_below", "cv": "level"}])
    with pytest.raises(mp.ScenarioError, match=r"key 'criteria\[1\].limit'"):
        parse_scenario(raw, file="x.toml")


def test_get_and_set_path():
    data = {"a": {"b": [{"c": 1}, {"c": 2}]}}
    assert get_path(data, "a.b[1].c") == 2
    set_path(data, "a.b[0].c", 5)
    set_path(data, "a.new.x", 3.0)
    assert data["a"]["b"][0]["c"] == 5 and data["a"]["new"]["x"] == 3.0
    with pytest.raises(mp.ScenarioError, match="did you mean 'b'"):
        get_path(data, "a.bb")
    with pytest.raises(mp.ScenarioError, match="dotted key path"):
        get_path(data, "a..b")


def test_nothing_is_evaluated():
    # a string that looks like code stays a string (and fails as a number)
    raw = _with(scenario={"sample_time": "__import__('os').getpid()"})
    with pytest.raises(mp.ScenarioError, match="expected a number"):
        parse_scenario(raw, file="x.toml")
