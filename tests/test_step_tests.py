"""Closed-loop step tests of the control layer (mpcproto.control.step_tests), stepped by the layer-2
plant stepper: the same samples as the closed-loop simulator with ideal instruments, and the
closed PI flow loop's step response against its closed form."""

import numpy as np
import pytest

from mpcproto.control.pid import PIDController
from mpcproto.control.step_tests import closed_inner_step_test, closed_loop_step
from mpcproto.sim import simulate
from tests._plants import op0
from tests.test_over_loops import AREA, FLOW_LOOP, TS, valve_tank


@pytest.fixture(scope="module")
def plant():
    return valve_tank()


@pytest.mark.parametrize("kind", ["setpoint", "dv"])
def test_step_test_takes_the_samples_the_simulator_takes(plant, kind):
    # the step test is the simulator's loop with no instruments, actuators, faults or readback:
    # the same CV samples to rounding (the simulator is the reference here)
    op = op0(plant)
    ctl = PIDController.for_model(plant, [FLOW_LOOP], name="inner")
    step = {"flow": (2 * TS, 0.1)} if kind == "setpoint" else {"draw": (2 * TS, 0.1)}
    got = closed_loop_step(plant, ctl, op, Ts=TS, duration=3.0,
                           **({"setpoints": step} if kind == "setpoint" else {"dvs": step}))
    spec = {n: {"kind": "step", "at": at, "size": size} for n, (at, size) in step.items()}
    ref = simulate(plant, ctl, op=op, Ts=TS, duration=3.0, rng=0, readback=False,
                   **({"setpoints": spec} if kind == "setpoint" else {"dvs": spec}))
    assert got.success and np.array_equal(got.t, ref.t)
    for cv in plant.cv_names:
        np.testing.assert_allclose(got.series(cv), ref.series("y", cv), rtol=1e-12, atol=1e-12)


def test_closed_flow_loop_follows_its_simc_first_order_response(plant):
    # SIMC on a first-order process (Skogestad 2003, "Simple analytic rules for model reduction
    # and PID controller tuning"): the PI loop with Ti = tau and Kc = tau/(k tau_c) gives the
    # closed loop 1/(tau_c s + 1) for the setpoint.  FLOW_LOOP has tau_c = 2 Ts; at the nominal
    # supply pressure the valve-to-flow process is exactly first order.  The level is the outer
    # CV: it ramps by the integral of the flow error over AREA (the mass balance).
    op = op0(plant)
    size, tau_c = 0.1, 2 * TS
    data = closed_inner_step_test(plant, op, FLOW_LOOP, "level", Ts=TS, size=size, duration=2.0)
    t = np.asarray(data.t)
    ctl = PIDController.for_model(plant, [FLOW_LOOP], name="inner")
    run = closed_loop_step(plant, ctl, op, Ts=TS, duration=2.0, setpoints={"flow": (TS, size)})
    flow = run.series("flow") - op.y[plant.cv_names.index("flow")]
    after = t >= TS + 10 * TS
    want = size * (1.0 - np.exp(-(t[after] - TS) / tau_c))
    # the discrete PI (one sample of computational delay) against the continuous closed form: a
    # tolerance of 5 % of the step (common practice, no source)
    assert np.max(np.abs(flow[after] - want)) < 0.05 * size
    level = np.asarray(data.y["level"]) - op.y[plant.cv_names.index("level")]
    # the level's slope at the end: (flow step)/AREA
    slope = (level[-1] - level[-11]) / (10 * TS)
    assert slope == pytest.approx(size / AREA, rel=0.02)
