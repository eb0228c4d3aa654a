"""Comparison runs: same disturbances and noise for every controller; scorecard; PNG plots."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import mpcproto as mp


@pytest.fixture(scope="module")
def comparison():
    tank = mp.make_model("blending_tank")
    op = mp.OperatingPoint.at(tank, tank.nominal("state"), tank.nominal("mv"), tank.nominal("dv"))
    tight = mp.pid_from_settings(tank, op, 10.0, {"tau_c": {"level": 120, "concentration": 300,
                                                            "temperature": 200}})
    loose = mp.pid_from_settings(tank, op, 10.0, {"tau_c": 600.0})
    return mp.compare(
        tank, {"tight": tight, "loose": loose}, op=op, Ts=10.0, duration=2400.0, rng=21,
        dvs={"draw_off": [{"kind": "step", "at": 300, "size": 0.3},
                          {"kind": "random_walk", "step_std": 0.02, "interval": 60}],
             "caustic_strength": {"kind": "step", "at": 1200, "size": -0.04}},
        setpoints={"temperature": {"kind": "step", "at": 1800, "size": 2.0}},
        cv_limits={"concentration": {"low": 1.9, "high": 2.1}},
        instruments={"concentration": {"noise_std": 0.005, "dead_time": 60, "period": 120},
                     "temperature": {"noise_std": 0.05}},
        faults=[{"kind": "sensor_frozen", "variable": "level", "at": 2000, "until": 2100}])


def test_every_controller_sees_the_same_disturbances_and_noise(comparison):
    a, b = comparison.trajectories["tight"], comparison.trajectories["loose"]
    for name in a.names("d"):
        assert np.array_equal(a.series("d", name), b.series("d", name))
    # temperature has noise only (no lag): measured - true is the noise sequence itself
    na = a.series("ym", "temperature") - a.series("y", "temperature")
    nb = b.series("ym", "temperature") - b.series("y", "temperature")
    assert np.allclose(na, nb, atol=1e-9) and np.std(na) > 0.03
    # ... while the controllers really did different things
    assert not np.allclose(a.series("u", "heater_duty"), b.series("u", "heater_duty"))


def test_scorecard_side_by_side(comparison):
    rows = comparison.scorecard()
    iae = {r["variable"]: r for r in rows if r["group"] == "cv" and r["metric"] == "iae"}
    assert set(iae) == {"level", "concentration", "temperature"}
    # the tighter tuning has the smaller integrated error on the level (lower is better)
    assert iae["level"]["tight"] < iae["level"]["loose"]
    assert comparison.summaries["tight"]["kpi"]["cv"]["level"]["iae"] == iae["level"]["tight"]
    text = comparison.scorecard_text()
    assert "tight" in text.splitlines()[0] and "concentration" in text
    json.dumps(comparison.to_dict(), allow_nan=False)


def test_plots_are_written_as_png(comparison, tmp_path):
    paths = comparison.plot(tmp_path, stem="tank")
    assert [p.name for p in paths] == ["tank_cvs.png", "tank_mvs.png"]
    for p in paths:
        data = p.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    csvs = comparison.save_csv(tmp_path)
    back = mp.Trajectory.from_csv(csvs[0])
    assert back.meta["controller"] == "tight"


def test_compare_refuses_a_generator_and_duplicate_names():
    tank = mp.make_model("blending_tank")
    op = mp.OperatingPoint.at(tank, tank.nominal("state"), tank.nominal("mv"), tank.nominal("dv"))
    ol = mp.OpenLoop(tank.mv_names)
    with pytest.raises(mp.SettingsError, match="same noise"):
        mp.compare(tank, {"a": ol}, op=op, Ts=10.0, duration=100.0, rng=np.random.default_rng(1))
    with pytest.raises(mp.SettingsError, match="key 'controllers': expected controllers with distinct names, found two controllers named 'open_loop'"):
        mp.compare(tank, [ol, mp.OpenLoop(tank.mv_names)], op=op, Ts=10.0, duration=100.0)


def test_mpc_and_pid_on_the_same_upsets():
    # The MPC (mpcproto.control.mpc) and the SIMC-tuned PID loops through the same simulator, seed
    # and upsets: a draw-off surge and a weaker caustic delivery with a slow, late analyzer.
    from mpcproto.control.mpc import PredictiveController

    tank = mp.make_model("blending_tank")
    op = mp.steady_state(tank)
    Ts = 10.0
    dmodel = mp.linearize(tank, op).discretize(Ts)
    mpc = PredictiveController.from_settings(dmodel, {
        "horizon": 40, "control_horizon": 6, "steady_target": False,
        "mv": {"caustic_flow": {"scale": 0.01}, "water_flow": {"scale": 0.1},
               "heater_duty": {"scale": 20.0}}}).build()
    pid = mp.pid_from_settings(tank, op, Ts, {"tau_c": {"level": 120.0, "concentration": 900.0,
                                                        "temperature": 120.0}})
    cmp_ = mp.compare(tank, {"mpc": mpc, "pid": pid}, op=op, Ts=Ts, duration=1800.0, rng=5,
                      dvs={"draw_off": {"kind": "pulse", "at": 200.0, "duration": 600.0, "size": 0.5},
                           "caustic_strength": {"kind": "step", "at": 900.0, "size": -0.04}},
                      instruments={"concentration": {"noise_std": 0.005, "period": 120.0,
                                                     "dead_time": 180.0}})
    for label in ("mpc", "pid"):
        assert cmp_.trajectories[label].success
        assert cmp_.summaries[label]["solver"]["failures"] == 0
    # both saw identical disturbances
    assert np.array_equal(cmp_.trajectories["mpc"].series("d", "draw_off"),
                          cmp_.trajectories["pid"].series("d", "draw_off"))
    iae = {r["variable"]: r for r in cmp_.scorecard() if r["metric"] == "iae"}
    # feedforward of the measured draw-off lets the MPC hold the concentration better
    assert iae["concentration"]["mpc"] < iae["concentration"]["pid"]
    # the scorecard says what each controller had, and that only the MPC saw the draw-off
    text = cmp_.scorecard_text()
    assert "mpc: one multivariable predictive controller" in text
    assert "measured DVs used: draw_off" in text and "pid: 3 single loop(s)" in text
    assert "not like for like: mpc used the measured DV 'draw_off'; pid did not." in text
    assert cmp_.to_dict()["inputs"]["pid"]["measured_dvs_used"] == []
    # ... and which tuning: every loop's gain and integral time as the loops hold them
    for lp in pid.loops:
        assert f"{lp.cv}<-{lp.mv} K={lp.gain:.4g} Ti={lp.integral_time:.4g}" in mp.tuning_text(
            cmp_.meta["inputs"]["pid"])


def test_fairness_notes_only_where_the_dvs_used_differ():
    # a DV used by every controller, or by none, gives no note; one used by some does
    same = {"a": {"measured_dvs_used": ["d1"]}, "b": {"measured_dvs_used": ["d1"]}}
    assert mp.fairness_notes(same) == []
    diff = {"a": {"measured_dvs_used": ["d1", "d2"]}, "b": {"measured_dvs_used": ["d1"]},
            "c": {"measured_dvs_used": []}}
    assert mp.fairness_notes(diff) == [
        "not like for like: a, b used the measured DV 'd1'; c did not.",
        "not like for like: a used the measured DV 'd2'; b, c did not."]


def test_demo_summary_records_what_each_controller_had(tmp_path):
    # the shipped demo: the conventional scheme (ratio + feedforward) and the MPC both use the
    # measured draw-off; the plain loops do not -- summary.json says so per controller
    from mpcproto.scenario import load_scenario, run_scenario

    summary = run_scenario(load_scenario("scenarios/caustic_blending.toml"), tmp_path, plots=False,
                           ci=True)
    inp = {lb: c["inputs"] for lb, c in summary["controllers"].items()}
    assert inp["mpc"]["measured_dvs_used"] == ["draw_off"]
    assert inp["pid"]["measured_dvs_used"] == ["draw_off"]
    assert "ratio caustic_flow/water_flow trimmed by concentration" in inp["pid"]["structure"]
    assert inp["pid_loops"]["measured_dvs_used"] == []
    # the level feedforward designed from the model: both channels integrate, slopes -1 and +1
    # per kg/s (the mass balance dh/dt = (w1 + w2 - w)/(rho A)): static gain exactly 1
    (lvl,) = [f for f in inp["pid"]["tuning"]["feedforward"] if f["cv"] == "level"]
    assert lvl["gain"] == pytest.approx(1.0, rel=1e-6)
    assert summary["fairness"] == ["not like for like: mpc, pid used the measured DV 'draw_off'; "
                                   "pid_loops did not."]
    # ... and the HTML report shows it beside the KPIs
    text = Path(mp.write_html_report([summary], tmp_path / "report.html")).read_text()
    assert "measured DVs used" in text
    assert "ratio caustic_flow/water_flow trimmed by concentration" in text
    assert "not like for like: mpc, pid used the measured DV" in text
    assert "concentration&lt;-caustic_flow (ratio trim) K=" in text and "horizon=40" in text
