"""Baseline comparison: a KPI is flagged when it got worse beyond atol + rtol*|baseline|.

Reference for the tolerance rule: numpy.isclose's documented test
``absolute(a - b) <= atol + rtol * absolute(b)`` (here one-sided: only getting worse counts).
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from mpcproto import SettingsError, compare_with_baseline


def _rec(cid, iae, *, passed=True, status="ok", travel=1.0, violations=0):
    return {"case_id": cid, "scenario": "s", "status": status, "passed": passed,
            "controllers": {"mpc": {"kpi": {"cv": {"level": {"iae": iae}},
                                            "mv": {"valve": {"total_travel": travel}}},
                                    "violations": [{"variable": "level", "integral": 0.1}] * violations,
                                    "solver": {"failures": 0, "p95_solve_ms": 3.0}}}}


def test_flags_exactly_what_numpy_isclose_would_not_accept_on_the_worse_side():
    rng = np.random.default_rng(5)
    base_vals = rng.uniform(0.0, 10.0, 200)
    cur_vals = base_vals * rng.uniform(0.8, 1.2, 200) + rng.uniform(-0.01, 0.01, 200)
    rtol, atol = 0.05, 0.002
    base = [_rec(f"c{i}", float(b)) for i, b in enumerate(base_vals)]
    cur = [_rec(f"c{i}", float(c)) for i, c in enumerate(cur_vals)]
    cmp = compare_with_baseline(cur, base, rtol=rtol, atol=atol)
    flagged = {r.case_id for r in cmp.regressions}
    expected = {f"c{i}" for i, (c, b) in enumerate(zip(cur_vals, base_vals))
                if c > b and not np.isclose(c, b, rtol=rtol, atol=atol)}
    assert flagged == expected and 10 < len(expected) < 190
    assert all(r.quantity == "kpi.cv.level.iae" for r in cmp.regressions)
    # worst relative change first
    changes = [r.change for r in cmp.regressions]
    assert changes == sorted(changes, reverse=True)
    assert cmp.cases_compared == 200 and not cmp.ok


def test_violations_and_verdicts_count_solve_times_do_not():
    base = [_rec("a", 1.0), _rec("b", 1.0), _rec("c", 1.0)]
    cur = copy.deepcopy(base)
    cur[0]["controllers"]["mpc"]["violations"] = [{"variable": "level", "integral": 0.4}]
    cur[1]["passed"] = False
    cur[2]["controllers"]["mpc"]["solver"]["p95_solve_ms"] = 300.0   # machine-dependent: ignored
    cmp = compare_with_baseline(cur, base)
    got = {(r.case_id, r.quantity) for r in cmp.regressions}
    assert got == {("a", "violations.count"), ("a", "violations.integral"), ("b", "verdict")}
    assert cmp.regressions[0].quantity == "verdict"
    assert "verdict went from passed to failed" in cmp.regressions[0].describe()


def test_missing_and_new_cases_are_listed_not_compared():
    cmp = compare_with_baseline([_rec("a", 1.0), _rec("new", 1.0)], [_rec("a", 1.0), _rec("gone", 1.0)])
    assert cmp.missing == ["gone"] and cmp.new == ["new"] and cmp.ok and cmp.cases_compared == 1


def test_improvements_are_counted_and_bad_tolerances_named(tmp_path):
    cmp = compare_with_baseline([_rec("a", 0.5, travel=0.2)], [_rec("a", 1.0)], rtol=0.1)
    assert cmp.ok and cmp.improved == 2
    with pytest.raises(SettingsError, match=r"key 'rtol': expected a finite number >= 0, found -0.1"):
        compare_with_baseline([], [], rtol=-0.1)
    with pytest.raises(SettingsError, match="does not exist"):
        compare_with_baseline([], tmp_path / "none.jsonl")
