"""PID loops: anti-windup, zero offset, bumpless start, derivative on measurement, pairing."""

from __future__ import annotations

import math

import numpy as np
import pytest

import mpcproto as mp
from _plants import first_order, op0




def targets(sp, lo=-5.0, hi=5.0, rate=np.inf):
    return mp.Targets(setpoint=np.array([sp]), cv_low=np.array([-np.inf]), cv_high=np.array([np.inf]),
                      mv_low=np.array([lo]), mv_high=np.array([hi]), mv_rate=np.array([rate]))


def test_pi_removes_offset_on_a_first_order_plant():
    # Reference: final value theorem -- integral action gives zero steady-state error to a step
    m = first_order()
    ctl = mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=2.0, integral_time=10.0)])
    tr = mp.simulate(m, ctl, op=op0(m), Ts=1.0, duration=200.0,
                     setpoints={"y": {"kind": "step", "at": 10, "size": 1.0}})
    assert tr.series("y", "y")[-1] == pytest.approx(1.0, abs=1e-4)
    assert tr.series("u", "u")[-1] == pytest.approx(1.0, abs=1e-3)


def windup_run(tracking_time):
    # setpoint 2 needs u = 2 but the valve tops out at 1: saturated from t = 10 to t = 300,
    # then the setpoint drops to 0.5 (reachable)
    m = first_order()
    loop = mp.PIDLoop("y", "u", gain=2.0, integral_time=10.0, tracking_time=tracking_time)
    ctl = mp.PIDController.for_model(m, [loop])
    return mp.simulate(m, ctl, op=op0(m), Ts=1.0, duration=400.0,
                       setpoints={"y": [{"kind": "step", "at": 10, "size": 2.0},
                                        {"kind": "step", "at": 300, "size": -1.5}]},
                       mv_limits={"u": {"low": -1.0, "high": 1.0, "rate": math.inf}})


def test_anti_windup_keeps_the_integrator_bounded_while_the_valve_is_saturated():
    # Reference: back-calculation anti-windup (Astrom & Hagglund, Advanced PID Control, 2006,
    # from memory): while limited, I settles where K/Ti e + (u - v)/Tt = 0, i.e. v - u = K Tt e / Ti
    with_aw = windup_run(None)
    without = windup_run(1e12)
    t = with_aw.t
    sat = (t >= 60) & (t < 300)
    i_aw = with_aw.series("diag", "integral.u")
    i_no = without.series("diag", "integral.u")
    assert np.all(with_aw.series("u", "u")[sat] == 1.0)
    # bounded: the unlimited output stays within K*Tt*|e|/Ti (+ P) of the limit
    e_end = 2.0 - with_aw.series("y", "y")[sat][-1]
    bound = 1.0 + 2.0 * e_end * (1 + 10.0 / 10.0)
    assert np.max(np.abs(i_aw[sat])) <= bound + 1e-9
    assert abs(i_aw[sat][-1] - i_aw[sat][-50]) < 1e-6          # no longer growing
    # fixed point with Tt = Ti: v - u = K e and v = K e + I, so I = u = the limit
    assert i_aw[sat][-1] == pytest.approx(1.0, abs=1e-6)
    # without anti-windup the integral keeps growing by K/Ti e per second (this is what is guarded)
    assert i_no[sat][-1] > 10 * bound
    assert np.all(np.diff(i_no[sat]) > 0.19 * 1.0)
    # after the setpoint becomes reachable, the valve leaves the limit at once with anti-windup
    after = t >= 300
    def leaves(tr):
        idx = np.flatnonzero(tr.series("u", "u")[after] < 1.0)
        return t[after][idx[0]] - 300 if idx.size else math.inf

    assert leaves(with_aw) <= 1.0 and leaves(without) > 30.0


def test_bumpless_start_and_no_derivative_kick_on_a_setpoint_step():
    # Reference: derivative on the measurement and setpoint weighting b (Astrom & Hagglund, from
    # memory): a setpoint step moves the output by K b dr only
    m = first_order()
    K, b = 1.5, 0.4
    ctl = mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=K, integral_time=20.0,
                                                     derivative_time=5.0, setpoint_weight=b)])
    op = mp.OperatingPoint.at(m, [0.3], [0.3])
    ctl.reset(op)
    out0 = ctl.step(0.0, mp.Measurement.now([0.3], 0.0), np.zeros(0), targets(1.0))
    assert out0.u[0] == 0.3                                   # bumpless although sp != y
    out1 = ctl.step(1.0, mp.Measurement.now([0.3], 1.0), np.zeros(0), targets(1.0))
    out2 = ctl.step(2.0, mp.Measurement.now([0.3], 2.0), np.zeros(0), targets(2.0))
    integral_step = K * 1.0 / 20.0 * (1.0 - 0.3)
    assert out2.u[0] - out1.u[0] == pytest.approx(K * b * 1.0 + integral_step)


def test_filtered_derivative_of_a_measurement_ramp():
    # Reference: for y = a t the filtered derivative term tends to -K Td a (backward-difference
    # filter Td/N, Astrom & Hagglund), so the output of a PD loop is K (b r - a t) - K Td a
    K, Td, a = 2.0, 4.0, 0.1
    ctl = mp.PIDController(("y",), ("u",), [mp.PIDLoop("y", "u", gain=K, derivative_time=Td,
                                                         derivative_filter=8.0)])
    m = first_order()
    ctl.reset(op0(m))
    for k in range(200):
        out = ctl.step(float(k), mp.Measurement.now([a * k], float(k)), np.zeros(0), targets(0.0, -1e9, 1e9))
    # no integral action: the bumpless start put I = u0 - K (b r - y0) = 0
    assert out.u[0] == pytest.approx(-K * a * 199 - K * Td * a, rel=1e-12)


def test_bad_reading_holds_the_output_and_analyzer_loops_act_on_fresh_results():
    m = first_order()
    ctl = mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=1.0, integral_time=5.0)])
    ctl.reset(op0(m))
    ctl.step(0.0, mp.Measurement.now([0.0], 0.0), np.zeros(0), targets(1.0))
    u1 = ctl.step(1.0, mp.Measurement.now([0.0], 1.0), np.zeros(0), targets(1.0)).u[0]
    bad = ctl.step(2.0, mp.Measurement.now([np.nan], 2.0), np.zeros(0), targets(1.0))
    assert bad.u[0] == u1 and bad.status == "fallback_hold"
    stale = mp.Measurement(y=np.array([0.0]), taken_at=np.array([1.0]), fresh=np.array([False]))
    assert ctl.step(3.0, stale, np.zeros(0), targets(1.0)).u[0] == u1
    # closed loop with an analyzer every 20 s: the MV moves only when a result arrives
    tr = mp.simulate(m, mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", 0.5, 20.0)]), op=op0(m),
                     Ts=1.0, duration=200.0, setpoints={"y": {"kind": "step", "at": 0, "size": 1}},
                     instruments={"y": {"period": 20.0, "dead_time": 5.0}})
    moves = np.flatnonzero(np.abs(np.diff(tr.series("u", "u"))) > 0) + 1
    assert set(tr.t[moves] % 20) == {5.0}


def test_rga_pairing_wood_berry_and_blending_tank():
    # Reference: Wood & Berry (1973) column gains; lambda_11 = 1/(1 - K12 K21/(K11 K22)) = 2.01
    # (Bristol 1966; the 2.01 value is the textbook figure, from memory)
    wb = mp.make_model("wood_berry")
    lin = mp.linearize(wb, op0(wb))
    p = mp.suggest_pairing(lin)
    K = lin.gain("mv")
    lam = 1.0 / (1.0 - K[0, 1] * K[1, 0] / (K[0, 0] * K[1, 1]))
    assert p.rga[0, 0] == pytest.approx(lam) and round(lam, 2) == 2.01
    assert p.pairs == [("top_composition", "reflux"), ("bottom_composition", "steam")]
    assert np.allclose(p.rga.sum(axis=0), 1) and np.allclose(p.rga.sum(axis=1), 1)
    # blending tank: the level integrates, so the RGA is taken at a low frequency; the pairing
    # follows the balances (water is most of the flow, caustic sets the strength, heat the temperature)
    tank = mp.make_model("blending_tank")
    pt = mp.suggest_pairing(mp.linearize(tank, op0(tank)))
    assert pt.low_frequency
    assert pt.pairs == [("level", "water_flow"), ("concentration", "caustic_flow"),
                        ("temperature", "heater_duty")]
    with pytest.raises(mp.SettingsError, match="as many CVs as MVs"):
        mp.suggest_pairing(lin, cvs=["top_composition"])


@pytest.mark.parametrize("loops, message", [
    ([{"cv": "y", "mv": "u"}], r"key 'gain': expected the key 'gain'"),
    ([{"cv": "y", "mv": "u", "gain": 1, "intergal_time": 3}], r"unknown key 'intergal_time'.*did you mean 'integral_time'"),
    ([{"cv": "yy", "mv": "u", "gain": 1}], r"key 'loops\[0\].cv': expected the name of a CV .*found 'yy' \(did you mean 'y'"),
    ([{"cv": "y", "mv": "u", "gain": 0}], r"key 'gain': expected a finite non-zero number"),
    ([{"cv": "y", "mv": "u", "gain": 1, "integral_time": -2}], r"key 'integral_time': expected a number > 0"),
    ([{"cv": "y", "mv": "u", "gain": 1}, {"cv": "y", "mv": "u", "gain": 2}], r"key 'loops\[1\].cv': expected a CV no other loop uses .*found 'y', used by an earlier loop"),
    ([], r"key 'loops': expected at least one loop, found none"),
])
def test_bad_loop_settings_are_named(loops, message):
    with pytest.raises(mp.SettingsError, match=message):
        mp.PIDController(("y",), ("u",), loops)
