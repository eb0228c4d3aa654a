"""KPIs, violation events and controller health on hand-made trajectories with known answers."""

from __future__ import annotations

import json

import numpy as np
import pytest

import mpcproto as mp


def traj(y, sp=None, lo=None, hi=None, Ts=1.0, status=None, diag=None, u=None, mvlo=None,
         mvhi=None, time_unit="s", cv_bounds=None):
    n = len(y)
    t = np.arange(n) * Ts
    cols = {"y.c": np.asarray(y, float)}
    if sp is not None:
        cols["sp.c"] = np.broadcast_to(np.asarray(sp, float), (n,)).copy()
    if lo is not None:
        cols["lo.c"] = np.broadcast_to(np.asarray(lo, float), (n,)).copy()
    if hi is not None:
        cols["hi.c"] = np.broadcast_to(np.asarray(hi, float), (n,)).copy()
    if u is not None:
        cols["u.m"] = np.asarray(u, float)
        cols["mvlo.m"] = np.full(n, mvlo)
        cols["mvhi.m"] = np.full(n, mvhi)
    for k, v in (diag or {}).items():
        cols[f"diag.{k}"] = np.asarray(v, float)
    text = {"status": status} if status is not None else {}
    meta = {"Ts": Ts, "time_unit": time_unit, "controller": "hand"}
    if cv_bounds is not None:
        meta["cv_bounds"] = {"c": list(cv_bounds)}
    return mp.Trajectory(t, cols, text, meta)


def test_violation_events_on_a_hand_made_trajectory():
    # known events: high side on samples 3-5 (excess 1, 3, 2), low side on sample 8 (excess 0.5)
    y = [0, 0, 0, 6, 8, 7, 0, 0, -5.5, 0, 6]
    tr = traj(y, lo=-5.0, hi=5.0, Ts=2.0)
    ev = mp.violations(tr)
    assert ev == [
        {"variable": "c", "side": "high", "signal": "true", "start": 6.0, "end": 12.0, "peak_excess": 3.0, "integral": 12.0, "scale": 5.0},
        {"variable": "c", "side": "low", "signal": "true", "start": 16.0, "end": 18.0, "peak_excess": 0.5, "integral": 1.0, "scale": 5.0},
        {"variable": "c", "side": "high", "signal": "true", "start": 20.0, "end": 22.0, "peak_excess": 1.0, "integral": 2.0, "scale": 5.0},
    ]
    # a tolerance hides the small ones
    assert [e["peak_excess"] for e in mp.violations(tr, tolerance=1.0)] == [3.0]
    # no limits, no events; infinite limits, no events
    assert mp.violations(traj(y)) == []
    assert mp.violations(traj(y, lo=-np.inf, hi=np.inf)) == []


def test_error_integrals_of_a_known_error():
    # e = sp - y = 1 on every sample of length Ts = 0.5: IAE = ISE = n Ts, ITAE = sum t Ts
    n, Ts = 10, 0.5
    tr = traj(np.zeros(n), sp=1.0, Ts=Ts)
    k = mp.cv_performance(tr, "c")
    assert k["iae"] == pytest.approx(n * Ts) and k["ise"] == pytest.approx(n * Ts)
    assert k["itae"] == pytest.approx(sum(i * Ts for i in range(n)) * Ts)
    assert k["max_abs_error"] == 1.0 and k["overshoot"] is None and k["settling_time"] is None


def test_overshoot_and_settling_after_a_setpoint_step():
    # Reference: textbook definitions (percent overshoot, 2 % settling band), common practice
    Ts = 0.01
    t = np.arange(6000) * Ts
    sp = np.where(t >= 10, 2.0, 0.0)
    s = np.clip(t - 10, 0, None)
    zeta, wn = 0.3, 0.5
    wd = wn * np.sqrt(1 - zeta ** 2)
    y = np.where(t >= 10, 2.0 * (1 - np.exp(-zeta * wn * s) * (np.cos(wd * s) + zeta / np.sqrt(1 - zeta ** 2) * np.sin(wd * s))), 0.0)
    tr = traj(y, sp=sp, Ts=Ts)
    k = mp.cv_performance(tr, "c")
    # peak overshoot of a second-order step response: exp(-zeta pi / sqrt(1 - zeta^2)) (Ogata)
    assert k["overshoot"] == pytest.approx(np.exp(-zeta * np.pi / np.sqrt(1 - zeta ** 2)), rel=1e-4)
    band = 0.02 * 2.0
    outside = np.flatnonzero(np.abs(sp - y) > band)
    assert k["settling_time"] == pytest.approx(t[outside[-1] + 1] - 10.0)
    # a band given explicitly replaces the default
    assert mp.cv_performance(tr, "c", band=10.0)["settling_time"] == 0.0


def test_settling_after_an_upset_counts_from_the_upset():
    e = np.zeros(40)
    e[10:20] = [1.0, 0.8, 0.6, 0.4, 0.2, 0.1, 0.05, 0.03, 0.01, 0.0]
    tr = traj(1.0 - e, sp=1.0, Ts=2.0, cv_bounds=(0.0, 1.0))
    # band 2 % of the CV's range = 0.02: out from sample 10 to 17, in for good from sample 18
    assert mp.cv_performance(tr, "c")["settling_time"] == (18 - 10) * 2.0


def test_ramped_setpoint_counts_as_one_move():
    sp = np.concatenate([np.zeros(5), np.linspace(0.5, 2.0, 4), np.full(11, 2.0)])
    tr = traj(sp.copy(), sp=sp)
    k = mp.cv_performance(tr, "c")
    assert k["overshoot"] == 0.0 and k["settling_time"] == 0.0 and k["iae"] == 0.0


def test_mv_travel_and_time_at_limit():
    u = [0, 1, 1, 3, 3, 3, 2, 0]
    tr = traj(np.zeros(8), u=u, mvlo=0.0, mvhi=3.0, Ts=10.0)
    k = mp.mv_usage(tr, "m")
    assert k["total_travel"] == 1 + 2 + 1 + 2
    assert k["time_at_high"] == 30.0 and k["time_at_low"] == 20.0 and k["time_at_limit"] == 50.0


def test_controller_health_counts_and_timing():
    status = ["ok", "ok", "fallback_hold", "fallback_hold", "ok", "failed", "ok", "inaccurate"]
    ms = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 700.0, 8.0]
    tr = traj(np.zeros(8), status=status, diag={"step_ms": ms}, Ts=1.0)
    h = mp.controller_health(tr, slow_fraction=0.5)
    assert h["steps"] == 8 and h["failures"] == 1 and h["fallbacks"] == 3
    assert h["median_solve_ms"] == pytest.approx(4.5)
    assert h["p95_solve_ms"] == pytest.approx(np.percentile(ms, 95))
    assert h["worst_fraction"] == pytest.approx(0.7) and h["slow_steps"] == 1
    assert {"kind": "fallback", "start": 2.0, "end": 4.0, "steps": 2} in h["events"]
    assert {"kind": "slow_solve", "start": 6.0, "end": 7.0, "steps": 1} in h["events"]
    # minutes: a 700 ms step is a tiny fraction of a 1-minute sample
    trm = traj(np.zeros(8), status=status, diag={"step_ms": ms}, Ts=1.0, time_unit="min")
    assert mp.controller_health(trm)["worst_fraction"] == pytest.approx(0.7 / 60)
    # the QP time (diag.solve_ms) is its own figure; the audit (worst_fraction) reads the whole step
    tr2 = traj(np.zeros(8), status=status, diag={"step_ms": ms, "solve_ms": np.full(8, 0.25)})
    assert mp.controller_health(tr2)["median_solve_ms"] == 0.25
    assert mp.controller_health(tr2)["worst_fraction"] == pytest.approx(0.7)


def test_summary_matches_the_summary_json_contract():
    tr = traj([0, 0, 6, 0, np.nan], sp=0.0, hi=5.0, status=["ok"] * 5, diag={"step_ms": [1] * 5},
              u=[0, 1, 2, 3, 3], mvlo=0.0, mvhi=3.0)
    s = mp.summarize(tr)
    assert set(s) >= {"kpi", "violations", "solver"}
    assert set(s["kpi"]["cv"]["c"]) == {"iae", "ise", "itae", "settling_time", "overshoot", "max_abs_error",
                                        "settling_band", "settling_band_basis", "steps", "interaction"}
    assert "total_travel" in s["kpi"]["mv"]["m"]
    assert set(s["violations"][0]) == {"variable", "side", "signal", "start", "end", "peak_excess",
                                       "integral", "scale"}
    assert {"steps", "failures", "fallbacks", "median_solve_ms", "p95_solve_ms", "worst_fraction"} <= set(s["solver"])
    json.dumps(s, allow_nan=False)      # plain JSON, no NaN/inf


def test_bad_arguments_are_named():
    tr = traj([0, 1, 2], sp=1.0)
    with pytest.raises(mp.SettingsError, match="key 'y.x': expected one of the 'y' series: c, found no series 'y.x'"):
        mp.cv_performance(tr, "x")
    with pytest.raises(mp.SettingsError, match="band_fraction"):
        mp.cv_performance(tr, "c", band_fraction=2.0)
    with pytest.raises(mp.SettingsError, match="key 'bands.cc': expected a CV of the trajectory .*found bands names 'cc'"):
        mp.kpis(tr, bands={"cc": 1.0})
    with pytest.raises(mp.SettingsError, match=r"key 'columns.y.c': expected 2 values \(one per time\), found 3"):
        mp.Trajectory([0, 1], {"y.c": [1, 2, 3]})
