"""MPC over flow loops (mpcproto.control.over_loops): the MPC writes the flow setpoint, a PID
flow loop moves the valve; the MPC's model comes from step tests of the closed flow loop."""

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.control.mpc import PredictiveController
from mpcproto.control.over_loops import OverLoops, identify_over_loops
from mpcproto.control.pid import PIDLoop
from mpcproto.control.tuning import fit_step, step_test
from mpcproto.sim import simulate
from tests._plants import op0

AREA = 2.0          # m2
CMAX = 2.0          # m3/min at a full-open valve and the nominal supply pressure
TAU_F = 0.1         # min: valve and flow lag
TS = 0.05           # min


def valve_tank():
    """Surge tank fed through a valve (our own test plant): flow w = CMAX (valve/100) sqrt(p)
    through a lag; supply pressure p: unmeasured DV; draw: measured DV; CVs: level, feed flow."""
    m = mp.Model("valve_tank", time_unit="min")
    h = m.state("h", nominal=1.0, low=0.0, high=3.0)
    w = m.state("w", nominal=0.5)
    v = m.mv("valve", nominal=25.0, low=0.0, high=100.0)
    p = m.dv("supply_pressure", nominal=1.0, low=0.1, high=2.0, measured=False)
    q = m.dv("draw", nominal=0.5, low=0.0, high=1.5, measured=True)
    m.derivative(w, (CMAX * v / 100.0 * p ** 0.5 - w) / TAU_F)
    m.derivative(h, (w - q) / AREA)
    m.cv("level", h, low=0.0, high=3.0)
    m.cv("flow", w, low=0.0, high=2.0)
    return m.build()


# PI flow loop, SIMC on the first-order valve (gain CMAX/100 per %, tau TAU_F, tau_c = 2 Ts)
FLOW_LOOP = PIDLoop("flow", "valve", gain=TAU_F / (CMAX / 100.0 * 2 * TS), integral_time=TAU_F)


@pytest.fixture(scope="module")
def setup():
    plant = valve_tank()
    op = op0(plant)
    model = identify_over_loops(plant, op, TS, [FLOW_LOOP], cvs=["level"], mvs=["flow"],
                                sizes={"flow": 0.1, "draw": 0.1}, duration=6.0)
    return plant, op, model


def test_model_of_the_closed_flow_loop_is_the_mass_balance(setup):
    # closed form: the closed flow loop (PI: integral action) has unit steady-state gain, so the
    # level ramps at (flow setpoint step)/AREA per min and at -(draw step)/AREA per min
    # (the mass balance dh/dt = (w - q)/A)
    _, _, model = setup
    op_m = op0(model)
    f = fit_step(step_test(model, op_m, "flow", size=0.1, Ts=TS, duration=5.0), "level")
    assert f.kind == "integrating" and f.gain == pytest.approx(1.0 / AREA, rel=0.03)
    assert model.dv_names == ("draw",)
    lin = mp.linearize(model, op_m)
    assert lin.B.shape[1] == 1 and lin.Bd.shape[1] == 1


def test_mpc_over_the_flow_loop_rejects_a_supply_upset_the_valve_mpc_only_sees_late(setup):
    plant, op, model = setup
    settings = {"horizon": 40, "control_horizon": 5, "cv": {"level": {"disturbance": "auto"}}}
    outer = PredictiveController.from_settings(
        mp.linearize(model, op0(model)).discretize(TS),
        {**settings, "mv": {"flow": {"scale": 0.1}}}).build()
    over = OverLoops(outer, plant, [FLOW_LOOP], name="over")
    direct = PredictiveController.from_settings(
        mp.linearize(plant, op).discretize(TS),
        {**settings, "cv": {"level": {"disturbance": "auto"}, "flow": {"weight": 0.0}},
         "mv": {"valve": {"scale": 5.0}}}).build()
    kw = dict(op=op, Ts=TS, duration=8.0, rng=1,
              dvs={"supply_pressure": {"kind": "step", "at": 1.0, "size": -0.4}})
    # the conventional scheme beside them: a level loop cascaded onto the same flow loop
    level = PIDLoop("level", "flow", gain=2.0, integral_time=2.0)
    conv = mp.RegulatoryController.for_model(plant, cascades=[mp.Cascade(level, FLOW_LOOP)])
    runs = mp.compare(plant, {"over": over, "direct": direct, "conventional": conv}, **kw)
    for lb in ("over", "direct", "conventional"):
        tr = runs.trajectories[lb]
        assert tr.success
        valve = tr.series("u", "valve")
        assert np.all((valve >= 0.0) & (valve <= 100.0))     # the hard limits hold
    err = {lb: float(np.max(np.abs(runs.trajectories[lb].series("y", "level") - 1.0)))
           for lb in ("over", "direct")}
    # the flow loop restores the flow within a few of its time constants: the level hardly moves;
    # the MPC on the valve only learns of the upset through the level
    assert err["over"] < 0.5 * err["direct"]
    sp = runs.trajectories["over"].series("diag", "setpoint.flow")
    assert np.all((sp >= 0.0) & (sp <= 2.0))                 # setpoints within the flow's range
    text = runs.scorecard_text()
    assert "predictive controller writing setpoints to flow loop" in text
    assert "cascade level -> flow -> valve" in text
    # the outer MPC feeds the measured draw forward, the cascade does not: the scorecard says so
    assert runs.meta["inputs"]["over"]["measured_dvs_used"] == ["draw"]


def test_setpoint_does_not_wind_up_while_the_valve_is_at_its_limit(setup):
    # the supply pressure falls so far that the full-open valve passes less than the draw: the
    # flow loop cannot follow; with the measured flow as readback while the valve sits at its
    # limit, the MPC's setpoint stays near what the loop can deliver instead of running away to
    # the top of the flow range (common practice, no source)
    plant, op, model = setup
    outer = PredictiveController.from_settings(
        mp.linearize(model, op0(model)).discretize(TS),
        # level scale 1 m: the tuning this check was set up with (the default, 0.2 m, is tighter)
        {"horizon": 40, "control_horizon": 5, "cv": {"level": {"disturbance": "auto", "scale": 1.0}},
         "mv": {"flow": {"scale": 0.1}}}).build()
    over = OverLoops(outer, plant, [FLOW_LOOP], name="over")
    tr = simulate(plant, over, op=op, Ts=TS, duration=10.0, rng=1,
                  dvs={"supply_pressure": {"kind": "step", "at": 1.0, "size": -0.8},   # p = 0.2
                       "draw": {"kind": "pulse", "at": 1.0, "duration": 3.0, "size": 0.5}})
    t = tr.t
    valve, flow = tr.series("u", "valve"), tr.series("y", "flow")
    sp = tr.series("diag", "setpoint.flow")
    sat = (t > 2.0) & (t < 4.0)
    assert np.all(valve[sat] > 99.99)                          # the loop cannot follow
    # CMAX sqrt(0.2) = 0.894 m3/min is all the valve passes
    assert flow[sat][-1] == pytest.approx(CMAX * 0.2 ** 0.5, rel=1e-3)
    assert np.max(sp[sat] - flow[sat]) < 0.3                   # no run-away setpoint
    # and the level comes back once the draw drops again
    assert tr.series("y", "level")[-1] == pytest.approx(1.0, abs=0.01)
