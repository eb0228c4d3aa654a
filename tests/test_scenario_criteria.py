"""Pass/fail criteria on hand-made results (the figures themselves are tested with the analysis)."""

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.scenario import parse_scenario
from mpcproto.analysis.criteria import evaluate_comparisons, evaluate_controller


def criteria(*entries):
    raw = {"scenario": {"sample_time": 1.0}, "plant": {"model": "blending_tank"},
           "controllers": {"mpc": {}, "pid": {}}, "criteria": list(entries)}
    return parse_scenario(raw, file="c.toml").data["criteria"]


BLOCK = {
    "kpi": {"cv": {"level": {"iae": 12.0, "max_abs_error": 0.05, "settling_time": None}},
            "mv": {"water_flow": {"total_travel": 3.0}}},
    "violations": [{"variable": "temperature", "side": "high", "start": 10.0, "end": 30.0,
                    "peak_excess": 0.7, "integral": 5.0}],
    "solver": {"failures": 0, "fallbacks": 2, "worst_fraction": 0.2},
    "run": {"status": "completed"},
}


def test_kpi_limits_and_missing_figures():
    cr = criteria({"check": "iae_below", "cv": "level", "limit": 15.0},
                  {"check": "iae_below", "cv": "level", "limit": 10.0, "name": "tight"},
                  {"check": "settling_time_below", "cv": "level", "limit": 100.0},
                  {"check": "travel_below", "mv": "water_flow", "limit": 2.0})
    v = {r["name"]: r for r in evaluate_controller(cr, "mpc", BLOCK)}
    assert v["iae_below:level"]["passed"] and v["iae_below:level"]["value"] == 12.0
    assert not v["tight"]["passed"]
    # a CV that never settles has no settling time: the criterion fails, value None
    assert v["settling_time_below:level"]["value"] is None
    assert not v["settling_time_below:level"]["passed"]
    assert not v["travel_below:water_flow"]["passed"]


def test_violation_solver_and_solve_time_checks():
    cr = criteria({"check": "no_limit_violation"},
                  {"check": "no_limit_violation", "variable": "level", "name": "level_only"},
                  {"check": "no_solver_failure"},
                  {"check": "solve_time_below", "fraction": 0.5})
    v = {r["name"]: r for r in evaluate_controller(cr, "mpc", BLOCK)}
    assert not v["no_limit_violation"]["passed"] and "temperature" in v["no_limit_violation"]["message"]
    assert v["level_only"]["passed"]
    assert not v["no_solver_failure"]["passed"] and v["no_solver_failure"]["value"] == 2.0
    assert v["solve_time_below"]["passed"]


def test_controller_filter_and_failed_run():
    cr = criteria({"check": "iae_below", "cv": "level", "limit": 15.0, "controller": "pid"})
    assert evaluate_controller(cr, "mpc", BLOCK) == []
    failed = dict(BLOCK, run={"status": "failed", "message": "integrator failed at t=5"})
    v = evaluate_controller(cr, "pid", failed)
    assert v[0]["name"] == "run_completed" and not v[0]["passed"]


def test_better_than_percent():
    cr = criteria({"check": "better_than", "controller": "mpc", "than": "pid", "kpi": "iae",
                   "cv": "level", "by_percent": 20.0})
    blocks = {"mpc": {"kpi": {"cv": {"level": {"iae": 6.0}}}},
              "pid": {"kpi": {"cv": {"level": {"iae": 10.0}}}}}
    (v,) = evaluate_comparisons(cr, blocks)
    assert v["value"] == pytest.approx(40.0) and v["passed"]
    blocks["mpc"]["kpi"]["cv"]["level"]["iae"] = 9.0
    (v,) = evaluate_comparisons(cr, blocks)
    assert v["value"] == pytest.approx(10.0) and not v["passed"]


def test_peak_and_low_read_true_values():
    t = np.arange(5.0)
    traj = mp.Trajectory(t=t, columns={"y.temperature": [70, 71, 79.5, 74, 72],
                                       "u.water_flow": [1, 1, 1.2, 1, 1]}, meta={"Ts": 1.0})
    cr = criteria({"check": "peak_below", "variable": "temperature", "limit": 80.0},
                  {"check": "low_above", "variable": "water_flow", "limit": 1.1})
    v = {r["name"]: r for r in evaluate_controller(cr, "mpc", BLOCK, traj)}
    assert v["peak_below:temperature"]["value"] == 79.5 and v["peak_below:temperature"]["passed"]
    assert v["low_above:water_flow"]["value"] == 1.0 and not v["low_above:water_flow"]["passed"]


# ----------------------------------------------------------------- the criteria table (CRITERIA)
def test_every_check_has_one_entry_in_the_criteria_table():
    from mpcproto.analysis.criteria import CRITERIA
    from mpcproto.scenario.schema import CRITERION_CHECKS

    added = {"run_completed", "within_valid_range", "mv_commands_within_limits"}
    assert set(CRITERIA) == set(CRITERION_CHECKS) | added
    for check, info in CRITERIA.items():
        assert info.better in ("lower", "higher"), check
        assert info.meaning and info.value, check


def test_table_direction_agrees_with_the_verdicts():
    # a value beyond the limit on the worse side fails, and uses more than all of its limit;
    # one on the better side passes and uses less (the evaluator and the table must agree)
    from mpcproto.analysis.criteria import CRITERIA, limit_is_upper, margin, utilisation

    kpi_checks = {"iae_below": "iae", "ise_below": "ise", "itae_below": "itae",
                  "max_error_below": "max_abs_error", "settling_time_below": "settling_time",
                  "overshoot_below": "overshoot"}
    for check, kpi in kpi_checks.items():
        for value, ok in ((6.0, False), (2.0, True)):
            block = {"kpi": {"cv": {"level": {kpi: value}}}, "run": {"status": "completed"}}
            (v,) = evaluate_controller(criteria({"check": check, "cv": "level", "limit": 4.0}),
                                       "mpc", block)
            assert v["passed"] is ok and limit_is_upper(v) is (CRITERIA[check].better == "lower")
            assert (utilisation(v) > 1.0) is (not ok) and (margin(v) > 0) is ok
    # better_than: the improvement in percent must reach by_percent (a lower bound)
    blocks = {"mpc": {"kpi": {"cv": {"level": {"iae": 6.0}}}},
              "pid": {"kpi": {"cv": {"level": {"iae": 10.0}}}}}
    (v,) = evaluate_comparisons(criteria({"check": "better_than", "controller": "mpc", "than": "pid",
                                          "kpi": "iae", "cv": "level", "by_percent": 20.0}), blocks)
    assert v["passed"] and v["value"] == pytest.approx(40.0)
    assert utilisation(v) == pytest.approx(0.5) and margin(v) == pytest.approx(20.0)


def test_level_checks_give_a_margin_not_a_ratio():
    from mpcproto.analysis.criteria import is_absolute, margin, utilisation

    low = {"check": "low_above", "value": 5.0, "limit": 3.0, "passed": True}
    peak = {"name": "peak_below:T", "value": 350.0, "limit": 340.0, "passed": False}  # no "check" key
    assert is_absolute(low) and is_absolute(peak)
    assert np.isnan(utilisation(low)) and utilisation(peak) == np.inf
    assert margin(low) == 2.0 and margin(peak) == -10.0
    # a check this version does not know: the direction is read from the verdict
    unknown = {"check": "something_new", "value": 3.0, "limit": 4.0, "passed": True}
    assert utilisation(unknown) == 0.75 and margin(unknown) == 1.0


def test_regression_rule_is_the_one_sided_allclose_test():
    # reference: numpy.isclose's rule |a - b| <= atol + rtol * |b| (numpy documentation),
    # one-sided: only a rise beyond it is worse, only a fall beyond it is better
    from mpcproto.analysis.criteria import regression_bounds

    rng = np.random.default_rng(11)
    for _ in range(2000):
        base = float(rng.choice([0.0, 1.0]) * rng.lognormal(0, 3))
        cur = base * float(rng.uniform(0.8, 1.2)) + float(rng.normal(0, 1e-9))
        rtol, atol = 0.05, 1e-9
        better_below, worse_above = regression_bounds(base, rtol, atol)
        close = bool(np.isclose(cur, base, rtol=rtol, atol=atol))
        assert (cur > worse_above) == (not close and cur > base)
        assert (cur < better_below) == (not close and cur < base)
    assert regression_bounds(2.0, 0.1, 0.0) == pytest.approx((1.8, 2.2))
