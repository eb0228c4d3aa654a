"""Hard MV limits are hard: no command outside them, whatever happens in the loop.

The rule under test (mpcproto.control.limits, common practice, no source): a command is first
held to the rate limit from the previous MV, then to the hard limits, which win when both cannot
hold.  The hand-computed cases below follow from that rule; the property test runs the real
controllers (cvxpy/OSQP MPC, PID loops) on the real closed loop (CasADi plant) over random valid
set-ups: limits that step past the MV, runs that start outside a limit, forced solver failures
(OSQP's own ``max_iter`` setting), stuck and saturated valves, dropped readings, rate limits.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.analysis import mv_violations
from mpcproto.cli import main
from mpcproto.control.limits import limit_activity, project_command
from mpcproto.analysis.criteria import evaluate_controller
from _plants import first_order, op0

INF = math.inf


# ------------------------------------------------------------------ the projection by hand
@pytest.mark.parametrize("u, p, lo, hi, r, want", [
    (0.9, 0.5, 0.0, 1.4, 0.1, 0.6),        # inside: the rate limit holds (0.5 + 0.1)
    (0.55, 0.5, 0.0, 1.4, 0.1, 0.55),      # a small move passes unchanged
    (-3.0, 0.5, 0.0, 1.4, INF, 0.0),       # no rate limit: clipped to the low limit
    (3.0, 3.0, 0.0, 1.4, 0.1, 1.4),        # a hold outside the limits goes to the limit (the case)
    (3.0, 3.0, 0.0, 1.4, INF, 1.4),
    (1.0, 1.45, 0.0, 1.4, 0.1, 1.35),      # just outside: the rate step lands inside
    (2.0, 1.45, 0.0, 1.4, 0.1, 1.4),       # asks outwards from just outside: the limit
    (-1.0, -2.0, 0.0, 1.4, 0.5, 0.0),      # 2.0 below with rate 0.5: hard limits win, move 2.0
    (math.nan, 0.7, 0.0, 1.4, 0.1, 0.7),   # no request: hold
    (math.nan, 2.0, 0.0, 1.4, 0.1, 1.4),   # no request, previous outside: the limit
    (0.2, math.nan, 0.5, 1.4, 0.1, 0.5),   # previous unknown: only the hard limits
    (0.2, 0.5, -INF, INF, math.nan, 0.2),  # no limits at all
    (0.2, 0.5, 0.3, 0.3, 0.01, 0.3),       # a limit range of one point
])
def test_project_command_hand_computed(u, p, lo, hi, r, want):
    got = project_command([u], [p], [lo], [hi], [r])
    assert got.tolist() == [want] or got[0] == pytest.approx(want, abs=1e-15)


def test_project_command_vector_activity_and_bad_input():
    u = project_command([3.0, 0.9, -1.0], [3.0, 0.5, -2.0], [0.0, 0.0, 0.0], [1.4, 1.4, 1.4],
                        [0.1, 0.1, 0.5])
    assert u.tolist() == [1.4, 0.6, 0.0]
    at_limit, at_rate, over = limit_activity(u, [3.0, 0.5, -2.0], [0.0] * 3, [1.4] * 3,
                                             [0.1, 0.1, 0.5])
    assert at_limit.tolist() == [True, False, True]
    assert at_rate.tolist() == [False, True, False]
    assert over.tolist() == [True, False, True]        # the hard limits won over the rate
    assert np.isnan(project_command([math.nan], [math.nan], [0.0], [1.0], [0.1])[0])
    with pytest.raises(mp.SettingsError, match=r"\(MV 1\): key 'low': expected a low limit <= the high limit \(1\), found 2"):
        project_command([0.0, 0.0], [0.0, 0.0], [0.0, 2.0], [1.0, 1.0], [1.0, 1.0])
    with pytest.raises(mp.SettingsError, match=r"\(MV 0\): key 'rate': expected a rate limit >= 0, found -1"):
        project_command([0.0], [0.0], [0.0], [1.0], [-1.0])


# ------------------------------------------------------------------ the reproduction
def test_fallback_hold_outside_the_limits_goes_to_the_limit_and_is_reported():
    # The reported case: a run starting at u = 3.0 with limits [0, 1.4] whose solves all fail
    # (OSQP stopped after one iteration, no backup) used to hold ucmd = 3.0 for the whole run.
    m = first_order()
    op = mp.OperatingPoint.at(m, [3.0], [3.0], [])
    dm = mp.linearize(m, op).discretize(1.0)
    ctl = mp.PredictiveController.from_settings(dm, {
        "horizon": 10, "fallback": "hold", "backup_solver": "none", "solver": "osqp",
        "solver_options": {"max_iter": 1}}).build()
    tr = mp.simulate(m, ctl, op=op, Ts=1.0, duration=20.0,
                     mv_limits={"u": {"low": 0.0, "high": 1.4, "rate": 0.1}})
    assert set(tr.text["status"]) == {"fallback_hold"}       # the solves really failed
    assert np.all(tr.series("ucmd", "u") == 1.4)
    assert mp.summarize(tr)["violations"] == []


class _Fixed:
    """A user's controller that sends a fixed command whatever the limits (no projection)."""

    name = "fixed"

    def __init__(self, value):
        self.value = value

    def reset(self, op, t0=0.0):
        pass

    def step(self, t, meas, dv, targets, dv_forecast=None):
        return mp.ControlOutput(u=np.array([self.value]))


def test_mv_events_commanded_and_applied_fail_the_run():
    # A command of 3.0 against the operating limit 1.4: a commanded event (and an applied one,
    # the actuator only knows the physical travel [-5, 5]) over the whole run; the run fails
    # even without a no_limit_violation criterion.
    m = first_order()
    tr = mp.simulate(m, _Fixed(3.0), op=op0(m), Ts=1.0, duration=10.0,
                     mv_limits={"u": {"high": 1.4}})
    ev = mv_violations(tr)
    assert [(e["signal"], e["side"]) for e in ev] == [("applied", "high"), ("commanded", "high")]
    for e in ev:
        assert e["start"] == 0.0 and e["end"] == 10.0
        assert e["peak_excess"] == pytest.approx(1.6)
        assert e["integral"] == pytest.approx(16.0)            # 1.6 x 10 samples x Ts 1
    block = mp.summarize(tr)
    assert [e["signal"] for e in block["violations"]] == ["applied", "commanded"]
    verdicts = evaluate_controller([], "fixed", block, tr)
    assert [(v["name"], v["passed"]) for v in verdicts] == [("mv_commands_within_limits", False)]
    nlv = evaluate_controller([{"name": "nlv", "check": "no_limit_violation"}], "fixed", block, tr)
    assert [v["passed"] for v in nlv] == [False, False]
    # beyond the physical travel too (hard limits = run-time limits within the physical bounds)
    tr2 = mp.simulate(m, _Fixed(7.0), op=op0(m), Ts=1.0, duration=5.0)
    sides = {(e["signal"], e["side"], round(e["peak_excess"], 9)) for e in mv_violations(tr2)}
    assert sides == {("commanded", "high", 2.0)}               # the valve stops at 5


def test_limits_beyond_the_physical_range_are_refused_and_intersected():
    m = first_order()
    with pytest.raises(mp.SettingsError, match=r"key 'mv_limits\.u\.low': expected a limit within "
                                               r"the physical range \[-5, 5\], found 6"):
        mp.simulate(m, _Fixed(0.0), op=op0(m), Ts=1.0, duration=5.0, mv_limits={"u": {"low": 6.0}})
    tr = mp.simulate(m, _Fixed(0.0), op=op0(m), Ts=1.0, duration=5.0,
                     mv_limits={"u": {"low": -9.0, "high": 2.0}})
    assert np.all(tr.series("mvlo", "u") == -5.0) and np.all(tr.series("mvhi", "u") == 2.0)


def test_mv_events_appear_in_summary_json(tmp_path):
    # The water valve sticks shut (0 kg/s) while the operating limit asks for at least 0.5:
    # the applied MV is below its hard limit (an applied event in summary.json), the commands
    # never are, and the MPC's status shows that the valve did not follow.
    text = """
[scenario]
name = "stuck_below_limit"
sample_time = 10.0
duration = 400.0
seed = 4

[plant]
model = "blending_tank"

[operating_point]
dvs = { draw_off = 1.5 }
targets = { level = 1.2, concentration = 2.0, temperature = 75.0 }

[faults.water_shut]
kind = "valve_stuck"
variable = "water_flow"
position = 0.0
at = 100.0

[limits]
water_flow = { low = 0.5 }

[controllers.mpc]
horizon = 15
control_horizon = 3
mv = { caustic_flow = { scale = 0.01 }, water_flow = { scale = 0.1 }, heater_duty = { scale = 20.0 } }

[controllers.pid]
rule = "simc"
pairs = { level = "water_flow", concentration = "caustic_flow", temperature = "heater_duty" }
tau_c = 120.0
"""
    p = tmp_path / "stuck.toml"
    p.write_text(text)
    rc = main(["run", str(p), "--out", str(tmp_path / "out"), "--no-plots"])
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    for label in ("mpc", "pid"):
        block = summary["controllers"][label]
        ev = [e for e in block["violations"] if e["variable"] == "water_flow"]
        assert ev and all(e["signal"] == "applied" and e["side"] == "low" for e in ev)
        assert ev[0]["start"] == 100.0 and ev[0]["peak_excess"] == pytest.approx(0.5)
        assert not [e for e in block["violations"] if e["signal"] == "commanded"]
        assert block["solver"]["mvs_not_following"] > 0
    assert summary["controllers"]["mpc"]["solver"]["degraded_steps"] > 0
    assert rc == 0                  # no criterion asks for it and no command left its limits


# ------------------------------------------------------------------ the property over random set-ups
def _two_by_two():
    """Two coupled first-order lags; u1 in [0, 10], u2 in [-2, 2] (our own little unit)."""
    m = mp.Model("lag2x2", time_unit="s")
    x1 = m.state("x1", nominal=5.0)
    x2 = m.state("x2", nominal=1.5)
    u1 = m.mv("u1", nominal=5.0, low=0.0, high=10.0)
    u2 = m.mv("u2", nominal=0.0, low=-2.0, high=2.0)
    m.derivative(x1, (u1 + 0.5 * u2 - x1) / 8.0)
    m.derivative(x2, (0.3 * u1 - u2 - x2) / 5.0)
    m.cv("y1", x1)
    m.cv("y2", x2)
    return m.build()


def _steady(m, u):
    if m.name == "lag1":
        x = np.array([u[0]])
    else:
        x = np.array([u[0] + 0.5 * u[1], 0.3 * u[0] - u[1]])
    return mp.OperatingPoint.at(m, x, np.asarray(u, float), np.zeros(0))


def _random_limit(rng, lo, hi, duration):
    """A low/high pair within [lo, hi] (absolute), constant or stepping during the run, often
    past the MV; it need not contain the starting MV (a run that starts outside a limit)."""
    a, b = sorted(rng.uniform(lo, hi, 2))
    spec: dict = {}
    if rng.random() < 0.8:
        spec["low"] = float(a)
    if rng.random() < 0.8:
        spec["high"] = float(b)
    if rng.random() < 0.5:
        # one limit steps towards the other one during the run
        at = float(rng.integers(1, duration))
        size = float(rng.uniform(0, b - a))
        if "low" in spec and rng.random() < 0.5:
            spec["low"] = {"kind": "step", "at": at, "size": size, "base": float(a)}
        elif "high" in spec:
            spec["high"] = {"kind": "step", "at": at, "size": -size, "base": float(b)}
    if rng.random() < 0.5:
        spec["rate"] = float(rng.choice([0.02, 0.1, 0.5]) * (hi - lo) / 10)
    return spec


def _random_case(rng, m, duration):
    plo, phi = m.bounds("mv")
    u0 = rng.uniform(plo, phi)
    op = _steady(m, u0)
    kw: dict = {"mv_limits": {}, "faults": [], "actuators": {}, "setpoints": {}}
    for j, n in enumerate(m.mv_names):
        if rng.random() < 0.9:
            kw["mv_limits"][n] = _random_limit(rng, plo[j], phi[j], duration)
        r = rng.random()
        at = float(rng.integers(0, duration // 2))
        if r < 0.25:
            pos = float(rng.uniform(plo[j], phi[j])) if rng.random() < 0.7 else None
            f = {"kind": "valve_stuck", "variable": n, "at": at}
            if pos is not None:
                f["position"] = pos
            if rng.random() < 0.5:
                f["until"] = at + float(rng.integers(5, duration))
            kw["faults"].append(f)
        elif r < 0.4:
            c = float(rng.uniform(plo[j], phi[j]))
            kw["faults"].append({"kind": "valve_saturation", "variable": n, "at": at,
                                 "high" if rng.random() < 0.5 else "low": c})
        if rng.random() < 0.2:
            kw["actuators"][n] = {"rate": float(rng.uniform(0.05, 1.0))}
    for n in m.cv_names:
        if rng.random() < 0.6:
            kw["setpoints"][n] = {"kind": "step", "at": float(rng.integers(0, duration)),
                                  "size": float(rng.normal(0, 2.0))}
        if rng.random() < 0.15:
            kw["faults"].append({"kind": "sensor_nan", "variable": n,
                                 "at": float(rng.integers(0, duration)),
                                 "until": float(duration + 1)})
    kw["readback"] = bool(rng.random() < 0.7)
    return op, kw


def _mpc_pool(m):
    """A few built controllers per model (built once; every run resets them at its own point):
    solvers that work, that fail now and then (max_iter small) and always (max_iter 1), shifted
    plans and holds, with and without a move limit of their own."""
    dm = mp.linearize(m, _steady(m, m.nominal("mv"))).discretize(1.0)
    pool = []
    # OSQP stopped after a few iterations fails now and then or always; DAQP stopped after one
    # iteration fails whenever a constraint must become active; the default solver works
    for solver, fallback, opts, move in (
            ("osqp", "hold", {"max_iter": 1}, INF), ("osqp", "shift", {"max_iter": 1}, 0.3),
            ("osqp", "shift", {"max_iter": 4}, INF), ("osqp", "hold", {"max_iter": 4}, 0.3),
            ("daqp", "shift", {"iter_limit": 1}, 0.3), ("auto", "shift", {}, INF)):
        pool.append(mp.PredictiveController.from_settings(dm, {
            "horizon": 8, "control_horizon": 3, "fallback": fallback, "backup_solver": "none",
            "solver": solver, "solver_options": opts, "steady_target": not opts,
            "mv": {n: {"max_move": move} for n in m.mv_names}}).build())
    return pool


def _check_run(tr, m, op, rates, max_move, readback_mpc):
    """Every command inside its hard limits; the rate limit held wherever the previous MV was
    inside them.  Returns the number of steps checked.

    *rates*: per MV the run's rate limit per sample (Ts = 1); *max_move*: the controller's own
    (MPC) or inf; *readback_mpc*: the previous MV is the applied one (MPC with readback), else
    the last command."""
    plo, phi = m.bounds("mv")
    n = len(tr)
    assert n > 0
    for j, name in enumerate(m.mv_names):
        lo = np.maximum(tr.series("mvlo", name), plo[j])
        hi = np.minimum(tr.series("mvhi", name), phi[j])
        cmd = tr.series("ucmd", name)
        assert np.all(np.isfinite(cmd))
        bad = np.flatnonzero((cmd < lo) | (cmd > hi))
        assert bad.size == 0, (name, tr.t[bad[:3]], cmd[bad[:3]], lo[bad[:3]], hi[bad[:3]])
        rate = min(rates.get(name, INF), max_move[j])
        before = tr.series("u", name) if readback_mpc else cmd
        prev = np.concatenate([[op.u[j]], before[:-1]])
        inside = (prev >= lo) & (prev <= hi)
        move = np.abs(cmd - prev)
        over = inside & (move > rate + 1e-9 * np.maximum(1.0, np.abs(prev)))
        assert not over.any(), (name, tr.t[over][:3], move[over][:3], rate)
    assert not [e for e in mp.summarize(tr)["violations"] if e["signal"] == "commanded"]
    return n


def test_no_command_outside_a_hard_limit_over_random_setups():
    rng = np.random.default_rng(20261203)
    steps = 0
    statuses: set[str] = set()
    for m in (first_order(), _two_by_two()):
        pool = _mpc_pool(m)
        for case in range(30 if m.nu == 1 else 22):
            duration = 100
            op, kw = _random_case(rng, m, duration)
            for kind in ("mpc", "pid"):
                if kind == "mpc":
                    ctl = pool[int(rng.integers(len(pool)))]
                else:
                    loops = [mp.PIDLoop(c, u, gain=float(rng.uniform(0.2, 3.0)),
                                        integral_time=float(rng.uniform(3.0, 30.0)))
                             for c, u in zip(m.cv_names, m.mv_names)]
                    ctl = mp.PIDController.for_model(m, loops)
                tr = mp.simulate(m, ctl, op=op, Ts=1.0, duration=float(duration),
                                 rng=int(rng.integers(1 << 30)), **kw)
                assert tr.success, tr.message
                rates = {n: s["rate"] for n, s in kw["mv_limits"].items() if "rate" in s}
                mpc = kind == "mpc"
                max_move = ctl._resolved["max_move"] if mpc else np.full(m.nu, INF)
                steps += _check_run(tr, m, op, rates, max_move, mpc and kw["readback"])
                statuses.update(tr.text["status"])
    assert steps >= 10_000
    # the set-ups really exercised the hard cases: failed solves, holds and faults seen
    assert {"fallback_hold", "fallback_shifted_plan", "ok"} <= statuses
    assert statuses & {"mv_not_following", "measurement_rejected"}


def test_faults_show_in_the_status_and_the_health_block():
    # A transmitter that drops out for 10 samples and a valve stuck for 20: the predictive
    # controller's status says so at those samples (it used to stay "ok"), and summarize()'s
    # solver block counts them; the PID loop holds on the dropped reading and sees its valve
    # not following.  (Common practice, no source: a bad reading is rejected, not used.)
    m = first_order()
    dm = mp.linearize(m, op0(m)).discretize(1.0)
    mpc = mp.PredictiveController.from_settings(dm, {"horizon": 10, "control_horizon": 3}).build()
    pid = mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=1.0, integral_time=10.0)])
    faults = [{"kind": "sensor_nan", "variable": "y", "at": 20.0, "until": 30.0},
              {"kind": "valve_stuck", "variable": "u", "at": 50.0, "until": 70.0}]
    sp = {"y": [{"kind": "step", "at": 5.0, "size": 1.0}, {"kind": "step", "at": 45.0, "size": 1.0}]}
    for ctl in (mpc, pid):
        tr = mp.simulate(m, ctl, op=op0(m), Ts=1.0, duration=90.0, faults=faults, setpoints=sp)
        status = np.array(tr.text["status"])
        health = mp.summarize(tr)["solver"]
        dropped = (tr.t >= 20) & (tr.t < 30)
        stuck = (tr.t > 50) & (tr.t < 70)
        if ctl is mpc:
            assert np.all(status[dropped] == "measurement_rejected")
            assert health["rejected_measurements"] == 10
            assert np.all(tr.series("diag", "n_rejected_measurements")[dropped] == 1)
        else:
            assert np.all(status[dropped] == "fallback_hold")
            assert health["held_loops"] == 10
        assert "mv_not_following" in set(status[stuck])
        assert health["mvs_not_following"] > 0
        assert health["degraded_steps"] == int(np.isin(status, ["measurement_rejected",
                                                                 "mv_not_following"]).sum()) > 0
        assert {"ok"} == set(status[tr.t < 20])
