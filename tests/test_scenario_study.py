"""Studies: sweep expansion, stable case ids, seeded Monte Carlo draws."""

import copy
import pickle

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.scenario import (Case, case_scenario, count_cases, draw_values, expand, iter_cases,
                               parse_scenario)

STUDY = {
    "scenario": {"name": "st", "sample_time": 10.0, "duration": 100.0, "seed": 7},
    "plant": {"model": "blending_tank", "parameters": {"area": 1.1}},
    "disturbances": {"draw_off": {"kind": "step", "at": 50.0, "size": 0.2}},
    "study": {
        "draws": 3, "full_draws": 10,
        "sweep": [
            {"key": "disturbances.draw_off.size", "values": [0.1, 0.2], "full_values": [0.1, 0.2, 0.3]},
            {"key": ["plant.parameters.area", "controller_model.parameters.area"], "values": [1.0, 1.2]},
        ],
        "draw": [
            {"key": "plant.parameters.loss_coefficient", "distribution": "lognormal",
             "median": 0.03, "sigma": 0.2},
            {"key": "plant.parameters.density", "distribution": "normal", "mean": 1.0, "std": 0.01,
             "relative": True},
            {"key": "plant.parameters.heat_capacity", "distribution": "uniform", "low": 3.9, "high": 4.1},
        ],
    },
}


def scn(raw=STUDY):
    return parse_scenario(copy.deepcopy(raw), file="study.toml")


def test_counts_grid_times_draws():
    s = scn()
    assert count_cases(s) == 2 * 2 * 3
    assert count_cases(s, full=True) == 3 * 2 * 10
    assert len(expand(s)) == 12 and len(expand(s, full=True)) == 60


def test_ids_are_unique_stable_and_ordered():
    a = [c.case_id for c in expand(scn())]
    b = [c.case_id for c in expand(scn())]
    assert a == b and len(set(a)) == len(a)
    assert a[0] == "st-s000-d0000" and a[-1] == "st-s003-d0002"
    # grid-major, draws inner; the first sweep varies slowest
    cases = expand(scn())
    assert [c.params["disturbances.draw_off.size"] for c in cases[:6]] == [0.1] * 6
    assert [c.params["plant.parameters.area"] for c in cases[:6:3]] == [1.0, 1.2]


def test_sweep_moves_several_keys_together():
    for c in expand(scn()):
        assert c.params["plant.parameters.area"] == c.params["controller_model.parameters.area"]
        sc = case_scenario(c)
        assert sc.data["plant"]["parameters"]["area"] == c.params["plant.parameters.area"]
        assert sc.data["disturbances"]["draw_off"]["size"] == c.params["disturbances.draw_off.size"]


def test_monte_carlo_reproducible_and_order_independent():
    s = scn()
    full = expand(s, full=True)
    # the same draw index gives the same values however it is reached
    assert draw_values(s, 5) == draw_values(s, 5)
    by_id = {c.case_id: c for c in full}
    again = list(iter_cases(scn(), full=True))[::-1]       # another order of expansion
    for c in again:
        assert by_id[c.case_id].params == c.params and by_id[c.case_id].seed == c.seed
    # CI draws are the first draws of the full study (same ids, same values)
    for c in expand(s):
        f = by_id[c.case_id]
        assert f.params == c.params and f.seed == c.seed
    # common random numbers: draw j has the same values and seed at every grid point
    d3 = [c for c in full if c.draw_index == 3]
    assert len({c.seed for c in d3}) == 1
    assert len({c.params["plant.parameters.loss_coefficient"] for c in d3}) == 1
    # different draws differ
    assert len({c.seed for c in full if c.grid_index == 0}) == 10


def test_draw_values_follow_numpy_seedsequence():
    # the documented streams: SeedSequence(seed, spawn_key=(j, 0)) for values, (j, 1) for the seed
    s = scn()
    j = 4
    rng = np.random.default_rng(np.random.SeedSequence(7, spawn_key=(j, 0)))
    ln = 0.03 * np.exp(0.2 * rng.standard_normal())
    rel = rng.normal(1.0, 0.01)
    cp = rng.uniform(3.9, 4.1)
    v = draw_values(s, j)
    assert v["plant.parameters.loss_coefficient"] == pytest.approx(ln, rel=1e-15)
    # relative draw multiplies the model's default (density is not in the file)
    dens = mp.models.make("blending_tank").parameters["density"]
    assert v["plant.parameters.density"] == pytest.approx(dens * rel, rel=1e-15)
    assert v["plant.parameters.heat_capacity"] == pytest.approx(cp, rel=1e-15)
    seed = int(np.random.SeedSequence(7, spawn_key=(j, 1)).generate_state(1, dtype=np.uint32)[0])
    assert next(c for c in expand(s, full=True) if c.draw_index == j).seed == seed


def test_draw_statistics_match_the_distribution():
    raw = copy.deepcopy(STUDY)
    raw["study"] = {"draws": 400, "draw": [
        {"key": "plant.parameters.area", "distribution": "normal", "mean": 1.1, "std": 0.05}]}
    vals = np.array([c.params["plant.parameters.area"] for c in expand(scn(raw), check=False)])
    # standard error of the mean 0.05/sqrt(400) = 0.0025: 4 standard errors
    assert abs(vals.mean() - 1.1) < 0.01
    assert 0.04 < vals.std() < 0.06


def test_cases_are_plain_picklable_data():
    c = expand(scn())[3]
    assert isinstance(c, Case)
    c2 = pickle.loads(pickle.dumps(c))
    assert c2 == c and c2.describe()["case_id"] == c.case_id


def test_no_study_gives_one_nominal_case():
    raw = {k: v for k, v in STUDY.items() if k != "study"}
    cases = expand(scn(raw))
    assert [c.case_id for c in cases] == ["st"] and cases[0].params == {}


def test_clip_keeps_draws_in_range():
    raw = copy.deepcopy(STUDY)
    raw["study"] = {"draws": 50, "draw": [
        {"key": "plant.parameters.area", "distribution": "normal", "mean": 1.1, "std": 1.0,
         "clip_low": 0.5, "clip_high": 1.5}]}
    vals = [c.params["plant.parameters.area"] for c in expand(scn(raw))]
    assert min(vals) >= 0.5 and max(vals) <= 1.5


def test_bad_sweep_value_names_key_and_case():
    raw = copy.deepcopy(STUDY)
    raw["study"]["sweep"][0]["values"] = [0.1, "big"]
    # the simulator's signal factory refuses the string; the message names the key and the case
    with pytest.raises(mp.ScenarioError, match=r"key 'disturbances.draw_off.size'.*case st-s006-d0000"):
        expand(scn(raw))
    raw2 = copy.deepcopy(STUDY)
    raw2["study"]["sweep"] = [{"key": "scenario.duration", "values": [100.0, 0.0]}]
    with pytest.raises(mp.ScenarioError, match=r"key 'scenario.duration'.*value set by case st-s001"):
        expand(scn(raw2))


def test_ci_ids_name_the_same_grid_points_as_full_ids():
    raw = copy.deepcopy(STUDY)
    raw["study"]["sweep"][0]["values"] = [0.3]          # CI: only the last full value
    s = scn(raw)
    full = {c.case_id: c.params for c in expand(s, full=True)}
    for c in expand(s):
        assert full[c.case_id] == c.params
