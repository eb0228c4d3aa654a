"""Figures that used to mislead, each reproduced first and then checked in its honest form.

Each test builds the situation in which the old figure misled (the old figure is computed the old
way, with the arguments that reproduce it, so the test shows the difference), then checks the
figure the package now reports.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.scenario import load_scenario, run_case
from mpcproto.analysis.criteria import LIMIT_TOLERANCE, evaluate_controller
from mpcproto.analysis import run_flags

from test_analysis import traj
from test_mpc_closed_loop import SCALES, TS


# ------------------------------------------------------------------ 1. settling band and the unit's zero
def _upset(offset):
    """The same regulatory upset of a temperature in degC (offset 0) or K (offset 273.15)."""
    e = np.zeros(200)
    e[20:] = 5.4 * np.exp(-np.arange(180) / 30.0)        # a 5.4 K upset, time constant 300 s
    sp = 60.0 + offset
    return traj(sp - e, sp=sp, Ts=10.0, cv_bounds=(0.0 + offset, 150.0 + offset))


def test_settling_of_an_upset_does_not_depend_on_the_unit_zero():
    c, k = _upset(0.0), _upset(273.15)
    # the old band, 2 % of |setpoint|: 1.2 degC in degC but 6.6 K in K -- 5.4 K never leaves it
    old_c = mp.cv_performance(c, "c", band=0.02 * 60.0)["settling_time"]
    old_k = mp.cv_performance(k, "c", band=0.02 * 333.15)["settling_time"]
    assert old_c > 0 and old_k == 0.0          # the misleading pair: same run, "settles in 0 s"
    # now: 2 % of the CV's physical range (150 K = 150 degC), the same in both units
    pc, pk = mp.cv_performance(c, "c"), mp.cv_performance(k, "c")
    assert pc["settling_band"] == pytest.approx(3.0) == pk["settling_band"]
    assert pc["settling_band_basis"] == "0.02 x CV range"
    assert pc["settling_time"] == pk["settling_time"] > 0
    # closed form: 5.4 exp(-s/300) <= 3.0 from s = 300 ln(1.8) = 176 s -> the sample at s = 180 s
    assert pc["settling_time"] == 180.0
    # a CV with no finite range and no band given has no settling time (never "0")
    free = traj(c.series("y", "c"), sp=60.0, Ts=10.0)
    pf = mp.cv_performance(free, "c")
    assert pf["settling_time"] is None and pf["settling_band"] is None
    # an operating zone of 55-65 degC, narrower than the range: 2 % of 10 = 0.2 degC;
    # 5.4 exp(-s/300) <= 0.2 from s = 300 ln(27) = 989 s -> the sample at 990 s
    zoned = traj(c.series("y", "c"), sp=60.0, lo=55.0, hi=65.0, Ts=10.0, cv_bounds=(0.0, 150.0))
    pz = mp.cv_performance(zoned, "c")
    assert pz["settling_band"] == pytest.approx(0.2) and pz["settling_band_basis"] == "0.02 x CV limit zone"
    assert pz["settling_time"] == 990.0
    # a criterion states its own band (CV units): 5.4 exp(-s/300) <= 1.0 from s = 506 s -> 510 s
    block = mp.summarize(c)
    crit = [{"check": "settling_time_below", "cv": "c", "limit": 600.0, "band": 1.0, "name": "st"}]
    (v,) = evaluate_controller(crit, "hand", block, c)
    assert v["value"] == 510.0 and v["passed"] and v["band"] == 1.0
    (v,) = evaluate_controller(crit, "hand", block, None)      # no trajectory: no figure, a failure
    assert v["value"] is None and not v["passed"]


# ------------------------------------------------------------------ 2. overshoot versus interaction
def _two_cv_run():
    """CV a steps by 1 at t=10 and settles with no overshoot; CV b steps at t=60, and a bumps by
    0.861 in response (interaction)."""
    t = np.arange(120.0)
    sp_a = np.where(t >= 10, 1.0, 0.0)
    sp_b = np.where(t >= 60, 2.0, 0.0)
    ya = np.where(t >= 10, 1 - np.exp(-(t - 10) / 5), 0.0)
    ya = ya + np.where(t >= 60, 0.861 * np.exp(-(t - 60) / 8) * (1 - np.exp(-(t - 60) / 2)) / 0.6, 0.0)
    yb = np.where(t >= 60, 2 * (1 - np.exp(-(t - 60) / 5)), 0.0)
    cols = {"y.a": ya, "sp.a": sp_a, "y.b": yb, "sp.b": sp_b}
    return mp.Trajectory(t, cols, {}, {"Ts": 1.0, "cv_bounds": {"a": [-5, 5], "b": [-5, 5]}})


def test_overshoot_is_per_setpoint_change_and_interaction_is_separate():
    tr = _two_cv_run()
    bump = float(np.max(tr.series("y", "a") - 1.0))
    # the old figure: the excess over the rest of the run after a's step counts b's effect
    only_a = mp.Trajectory(tr.t, {"y.a": tr.series("y", "a"), "sp.a": tr.series("sp", "a")}, {},
                           dict(tr.meta))
    assert mp.cv_performance(only_a, "a")["overshoot"] == pytest.approx(bump)
    assert bump > 0.5
    k = mp.kpis(tr)["cv"]["a"]
    # own step: first-order rise, no overshoot within its window [10, 60)
    assert k["overshoot"] == pytest.approx(0.0, abs=1e-12)
    (step,) = k["steps"]
    assert step["at"] == 10.0 and step["window_end"] == 60.0 and step["size"] == 1.0
    # settling of 1 - exp(-s/5) into 2 %: s >= 5 ln(50) = 19.56 -> 20 s (closed form)
    assert step["settling_time"] == 20.0 == k["settling_time"]
    assert k["interaction"]["caused_by"] == "b" and k["interaction"]["at"] == 60.0
    assert k["interaction"]["max_deviation"] == pytest.approx(bump)


# ------------------------------------------------------------------ 3. limit tolerance
def _riding_block(excess):
    y = np.full(50, 3.0)
    y[20:30] = 3.0 + excess                   # on a 3.0 mol% high limit, by a solver's tolerance
    tr = traj(y, hi=3.0, cv_bounds=(0.0, 100.0))
    return mp.summarize(tr)


def test_riding_a_soft_limit_is_no_violation_but_a_real_excess_is_named():
    block = _riding_block(7.2e-6)
    assert block["violations"] and block["violations"][0]["peak_excess"] == pytest.approx(7.2e-6)
    strict = [{"check": "no_limit_violation", "name": "strict", "tolerance": 0.0}]
    (v,) = evaluate_controller(strict, "hand", block)
    assert not v["passed"] and "7.2e-06" in v["message"]          # the old verdict: a CI failure
    (v,) = evaluate_controller([{"check": "no_limit_violation", "name": "nl"}], "hand", block)
    assert v["passed"] and v["tolerance"] == LIMIT_TOLERANCE == 1e-4
    (v,) = evaluate_controller([{"check": "no_limit_violation", "name": "nl"}], "hand",
                               _riding_block(0.25))
    assert not v["passed"] and "by 0.25" in v["message"] and "0.0025 of 100" in v["message"]


def test_criterion_tolerance_is_validated(tmp_path):
    base = ('[scenario]\nname = "x"\nsample_time = 1.0\nduration = 10.0\n[plant]\nmodel = '
            '"blending_tank"\n[controllers.pid]\nrule = "simc"\n[[criteria]]\n')
    p = tmp_path / "t.toml"
    p.write_text(base + 'check = "no_limit_violation"\ntolerance = 0.001\n')
    assert load_scenario(p).data["criteria"][0]["tolerance"] == 0.001
    p.write_text(base + 'check = "iae_below"\ncv = "level"\nlimit = 1.0\ntolerance = 0.1\n')
    with pytest.raises(mp.ScenarioError, match=r"criteria\[0\]\.tolerance.*no_limit_violation"):
        load_scenario(p)
    p.write_text(base + 'check = "settling_time_below"\ncv = "level"\nlimit = 1.0\nband = 0.0\n')
    with pytest.raises(mp.ScenarioError, match=r"criteria\[0\]\.band"):
        load_scenario(p)


# ------------------------------------------------------------------ 4. the real-time audit
def test_solve_time_audit_reads_the_whole_controller_step():
    n = 10
    tr = traj(np.zeros(n), status=["ok"] * n, Ts=1.0,
              diag={"solve_ms": np.full(n, 89.3), "step_ms": np.full(n, 108.5)})
    block = mp.summarize(tr)
    assert block["solver"]["worst_qp_fraction"] == pytest.approx(0.0893)    # the old figure
    assert block["solver"]["worst_fraction"] == pytest.approx(0.1085)       # the whole step
    assert block["solver"]["median_step_ms"] == 108.5 and block["solver"]["median_solve_ms"] == 89.3
    (v,) = evaluate_controller([{"check": "solve_time_below", "name": "rt", "fraction": 0.1}],
                               "hand", block)
    assert not v["passed"] and v["value"] == pytest.approx(0.1085)


# ------------------------------------------------------------------ 5. impossible states
class _FixedValve:
    """An open-loop controller: the valve stays where it is put (a real controller object)."""
    name = "fixed"

    def __init__(self, u):
        self.u = np.array([u])

    def reset(self, op, t0=0.0):
        pass

    def step(self, t, meas, dv, targets, dv_forecast=None):
        return mp.ControlOutput(u=self.u.copy(), status="ok", diagnostics={})


def _drain_tank():
    """A 1.8 m tank of 2 m2, level 1 m, outflow 0.02 m3/s, inflow valve 0..0.05 m3/s."""
    m = mp.Model("drain", time_unit="s")
    h = m.state("h", nominal=1.0, unit="m", low=0.0, high=1.8)
    q = m.mv("q", nominal=0.02, unit="m3/s", low=0.0, high=0.05)
    m.derivative(h, (q - 0.02) / 2.0)
    m.cv("level", h, unit="m", low=0.0, high=1.8)
    return m.build()


def test_a_plant_that_leaves_its_physical_range_is_not_a_completed_run():
    m = _drain_tank()
    op = mp.OperatingPoint.at(m, [1.0], [0.02], [])
    # valve shut: dh/dt = -0.01 m/s, the level crosses 0 at t = 100 s and reaches -1 m at 200 s
    tr = mp.simulate(m, _FixedValve(0.0), op=op, Ts=1.0, duration=200.0)
    assert tr.status == "completed"                           # what the old run reported, alone
    assert len(tr) == 200                                     # the trajectory is kept
    assert tr.outcome == "left_valid_range"
    ev = {(e["kind"], e["variable"]): e for e in tr.meta["range_events"]}
    lv = ev[("cv", "level")]
    assert lv["side"] == "low" and lv["bound"] == 0.0
    assert lv["time"] == 101.0                              # first sample below 0 (h = 1 - 0.01 t)
    assert lv["value"] == pytest.approx(1.0 - 0.01 * 199)   # the last recorded sample
    block = mp.summarize(tr)
    assert block["run"]["outcome"] == "left_valid_range"
    verdicts = evaluate_controller([], "fixed", block, tr)
    (v,) = [x for x in verdicts if x["check"] == "within_valid_range"]
    assert not v["passed"] and "state h at t=101" in v["message"]
    assert any(f["kind"] == "left_valid_range" for f in block["flags"])
    # the valve at the outflow: the level stays put, nothing to report
    ok = mp.simulate(m, _FixedValve(0.02), op=op, Ts=1.0, duration=50.0)
    assert ok.outcome == "completed" and ok.meta["range_events"] == []


# ------------------------------------------------------------------ 6. readings dropped by the estimator
def _caustic_mpc(history):
    tank = mp.make_model("blending_tank", options={"outflow": "dv"})
    op = mp.steady_state(tank)
    dm = mp.linearize(tank, op).discretize(TS)
    ctl = mp.PredictiveController.from_settings(dm, {
        "horizon": 30, "control_horizon": 4, "steady_target": False, "mv": SCALES,
        "history": history}).build()
    tr = mp.simulate(tank, ctl, op=op, Ts=TS, duration=600.0, rng=7,
                     instruments={"concentration": {"period": 60.0, "dead_time": 180.0}})
    return tr


def test_readings_dropped_by_a_short_history_are_counted_and_shown():
    tr = _caustic_mpc(history=5)                # 18-sample analyzer delay, 5 samples kept
    block = mp.summarize(tr)
    assert block["solver"]["dropped_measurements"] > 0
    assert "measurement_rejected" in tr.text["status"]      # no longer "ok" on every step
    assert tr["diag.dropped_measurements.concentration"].max() == 1.0
    assert tr["diag.dropped_measurements.level"].max() == 0.0
    assert any(f["kind"] == "dropped_measurements" for f in block["flags"])
    good = mp.summarize(_caustic_mpc(history=30))
    assert good["solver"]["dropped_measurements"] == 0
    assert not any(f["kind"] == "dropped_measurements" for f in good["flags"])


def test_a_history_shorter_than_an_instrument_dead_time_is_refused(tmp_path):
    text = """
[scenario]
name = "short_history"
sample_time = 10.0
duration = 100.0
[plant]
model = "blending_tank"
[instruments]
concentration = { period = 60.0, dead_time = 180.0 }
[controllers.mpc]
horizon = 20
control_horizon = 4
history = 5
"""
    p = tmp_path / "h.toml"
    p.write_text(text)
    rec = run_case(load_scenario(p))
    assert rec["status"] == "error"
    assert "controllers.mpc.history" in rec["message"] and "18 samples" in rec["message"]
    assert "found history = 5" in rec["message"]


# ------------------------------------------------------------------ 7. diagnostics kept
def test_mpc_diagnostics_reach_the_trajectory_and_the_summary():
    tr = _caustic_mpc(history=30)
    # relaxed CVs as 0/1 flags per step, the solver's word per step
    for cv in tr.meta["cvs"]:
        assert set(np.unique(tr["diag.relaxed_cvs." + cv])) <= {0.0, 1.0}
    assert len(tr.text["diag.solver_status"]) == len(tr) and all(tr.text["diag.solver_status"])
    counts = tr.meta["controller_counts"]
    assert counts["steps"] == len(tr)
    block = mp.summarize(tr)
    assert block["solver"]["controller_counts"]["steps"] == len(tr)
    assert block["solver"]["backup_solver_rescues"] == counts["backup_solves"]
    assert block["solver"]["relaxed_cv_steps"] == {
        cv: int(tr["diag.relaxed_cvs." + cv].sum()) for cv in tr.meta["cvs"]}


def test_backup_solver_rescues_are_counted_not_hidden_behind_ok():
    n = 100
    rescued = np.zeros(n)
    rescued[10:70] = 1.0                              # sixty rescues, every status "ok"
    tr = traj(np.zeros(n), status=["ok"] * n, diag={"backup_solves": rescued, "step_ms": np.ones(n)})
    block = mp.summarize(tr)
    assert block["solver"]["fallbacks"] == 0          # the old, only, figure
    assert block["solver"]["backup_solver_rescues"] == 60
    assert any(f["kind"] == "backup_solver" and f["value"] == 60 for f in block["flags"])


def test_mpc_with_steady_target_records_the_target_per_step():
    tank = mp.make_model("blending_tank", options={"outflow": "dv"})
    op = mp.steady_state(tank)
    dm = mp.linearize(tank, op).discretize(TS)
    ctl = mp.PredictiveController.from_settings(dm, {
        "horizon": 30, "control_horizon": 4, "mv": SCALES}).build()
    tr = mp.simulate(tank, ctl, op=op, Ts=TS, duration=200.0, rng=1,
                     setpoints={"level": {"kind": "step", "at": 50.0, "size": 0.05}})
    for mv in tr.meta["mvs"]:
        assert np.isfinite(tr["diag.target_u." + mv]).all()
    ty = tr["diag.target_y.level"]
    # the steady target follows the setpoint step (within the target's own tolerance)
    assert ty[-1] == pytest.approx(tr["sp.level"][-1], abs=1e-3)
    assert "diag.target_status" in tr.text


# ------------------------------------------------------------------ 8. silent bad fits
def test_a_record_with_two_steps_warns_that_the_fit_does_not_explain_it():
    rng = np.random.default_rng(3)
    t = np.arange(0.0, 400.0, 1.0)
    one = np.where(t >= 10, 1 - np.exp(-np.clip(t - 10 - 5, 0, None) / 20), 0.0) * (t >= 15)
    clean = 2.0 * one
    noisy = clean + rng.normal(0, 0.02, t.size)
    with warnings.catch_warnings():
        warnings.simplefilter("error")                # one FOPDT step: no warning
        f = mp.fit_step_response(t, noisy, size=1.0, t_step=10.0)
    assert f.explains_record and f.noise_level == pytest.approx(0.02, rel=0.3)
    # a second, opposite step at t = 200 in the same record (what the old fit took silently)
    second = noisy - 3.0 * np.where(t >= 205, 1 - np.exp(-(t - 205) / 20), 0.0)
    with pytest.warns(UserWarning, match="does not explain the record"):
        g = mp.fit_step_response(t, second, size=1.0, t_step=10.0)
    assert not g.explains_record and g.rmse > 3 * g.noise_level


def test_ziegler_nichols_warns_outside_its_range_of_dead_time_ratio():
    with pytest.warns(UserWarning, match="outside the range 0.1-1"):
        mp.ziegler_nichols(mp.ProcessFit.fopdt(1.0, 100.0, dead_time=1.0))     # ratio 0.01
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        mp.ziegler_nichols(mp.ProcessFit.fopdt(1.0, 10.0, dead_time=3.0))      # ratio 0.3


# ------------------------------------------------------------------ 9. MV chatter and travel
def test_chattering_mv_and_a_cv_left_off_setpoint_are_flagged():
    n = 200
    heater = np.where(np.arange(n) % 2 == 0, 100.0, 600.0)       # 100 <-> 600 kW every sample
    t = np.arange(n) * 10.0
    cols = {"u.heater": heater, "y.temp": np.full(n, 70.0), "sp.temp": np.full(n, 72.0),
            "y.level": np.full(n, 1.0), "sp.level": np.full(n, 1.0)}
    meta = {"Ts": 10.0, "mv_bounds": {"heater": [0.0, 800.0]},
            "cv_bounds": {"temp": [0.0, 30.0], "level": [0.0, 2.0]}, "units": {"heater": "kW"}}
    tr = mp.Trajectory(t, cols, {}, meta)
    travel = mp.mv_usage(tr, "heater")["total_travel"]
    assert travel == 500.0 * (n - 1)                 # the figure was there, but nobody was told
    kinds = {(f["kind"], f["variable"]) for f in run_flags(tr)}
    assert ("mv_chatter", "heater") in kinds and ("mv_travel", "heater") in kinds
    assert ("cv_off_setpoint", "temp") in kinds      # 2 degC off over a 30 degC range
    assert ("cv_off_setpoint", "level") not in kinds
    # the criteria compared only the level: the temperature is flagged as not checked
    (f,) = [f for f in run_flags(tr, compared={"level"}) if f["kind"] == "cv_off_setpoint"]
    assert "no criterion checks it" in f["message"]
    # a smooth move to a new value: no flag
    smooth = dict(cols, **{"u.heater": 100.0 + 500.0 * (1 - np.exp(-np.arange(n) / 20.0)),
                           "y.temp": np.full(n, 72.0)})
    assert run_flags(mp.Trajectory(t, smooth, {}, meta)) == []


def _hot_wash() -> str:
    """The short tank scenario of test_scenario_run with the PID only, its criteria on the level
    only, and a +20 degC temperature setpoint step with the draw-off step."""
    from test_scenario_run import SHORT

    text = SHORT.replace("LEVEL_LIMIT", "100.0")
    text = text[:text.index("[controllers.mpc]")] + text[text.index("[controllers.pid]"):]
    text = text[:text.index("[[criteria]]")] + (
        '[[criteria]]\ncheck = "iae_below"\ncv = "level"\nlimit = 100.0\n')
    return text.replace("[instruments]", '[setpoints]\ntemperature = { kind = "step", at = 100.0, '
                                         'size = 20.0 }\n\n[instruments]')


def test_a_cv_left_off_setpoint_is_noted_in_console_summary_and_report(tmp_path, capsys):
    """The draw-off rises by 0.3 kg/s and the temperature setpoint by 20 degC: the heater saturates
    (it sits at its high limit) and the temperature cannot follow within the run; the criteria only look at the level, so the run passes -- and says so."""
    import json

    from mpcproto.cli import main
    from mpcproto.report.html import write_html_report

    p = tmp_path / "hot.toml"
    p.write_text(_hot_wash())
    code = main(["run", str(p), "--out", str(tmp_path / "out"), "--no-plots"])
    out = capsys.readouterr().out
    assert code == 0                                          # every verdict passed
    assert "note  pid: CV temperature ends" in out and "(no criterion checks it)" in out
    rec = json.loads((tmp_path / "out" / "summary.json").read_text())
    (flag,) = [f for f in rec["controllers"]["pid"]["flags"] if f["kind"] == "cv_off_setpoint"]
    # threshold: 5 % of the temperature CV's range 0-100 degC (the model's bounds)
    assert flag["variable"] == "temperature" and flag["value"] > 5.0
    assert rec["controllers"]["pid"]["kpi"]["mv"]["heater_duty"]["time_at_high"] > 0
    html = tmp_path / "r.html"
    write_html_report([rec], html)
    assert "To notice" in html.read_text() and "CV temperature ends" in html.read_text()
