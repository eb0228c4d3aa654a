"""MV readback: controllers told which MVs were actually applied (valve position feedback).

Common practice, no source: a loop whose valve does not follow (stuck, saturated, rate-limited
by the actuator) must not integrate the error it cannot remove, and a model-based controller must
predict with what the valve did, not with what it was asked to do.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import mpcproto as mp
from _plants import first_order, op0

STUCK = {"kind": "valve_stuck", "variable": "u", "at": 5.0, "until": 150.0, "position": 0.0}




def pid_run(readback):
    m = first_order()
    ctl = mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=2.0, integral_time=10.0)])
    return mp.simulate(m, ctl, op=op0(m), Ts=1.0, duration=300.0, faults=[STUCK],
                       setpoints={"y": {"kind": "step", "at": 10.0, "size": 1.0}},
                       readback=readback)


def test_pid_integral_stays_bounded_behind_a_stuck_valve():
    # Reference: back-calculation anti-windup (Astrom & Hagglund, Advanced PID Control, 2006,
    # from memory) with the applied value in the tracking term: while the valve is stuck at 0 with
    # error e = 1, I settles where K/Ti e + (u_applied - v)/Tt = 0, i.e. v = K Tt e / Ti = 2
    # (Tt = Ti here) and I = v - K e = 0.  Without readback the loop tracks only its own
    # limit (5), so I winds up to 5 - K e + K Tt e/Ti = 5.
    with_rb, without = pid_run(True), pid_run(False)
    t = with_rb.t
    stuck = (t >= 60) & (t < 150)
    assert np.all(with_rb.series("u", "u")[stuck] == 0.0)        # the valve really did not move
    assert np.all(with_rb.series("ucmd", "u")[stuck] > 0.0)      # though the loop asked it to
    i_rb = with_rb.series("diag", "integral.u")
    i_no = without.series("diag", "integral.u")
    assert np.max(np.abs(i_rb[stuck])) < 0.05
    assert i_rb[stuck][-1] == pytest.approx(0.0, abs=1e-6)
    assert i_no[stuck][-1] == pytest.approx(5.0, abs=1e-3)
    # when the valve frees, the wound-up loop overshoots; the loop with readback hardly does
    after = t >= 150
    over_rb = np.max(with_rb.series("y", "y")[after]) - 1.0
    over_no = np.max(without.series("y", "y")[after]) - 1.0
    assert over_rb < 0.05 and over_no > 0.3


def test_simulator_passes_readback_only_to_controllers_that_take_it():
    # Backward compatibility (the protocol's optional keyword): an old-style controller without
    # the keyword runs unchanged; one with **kwargs receives the applied MVs.
    m = first_order()

    class Fixed:
        name = "fixed"

        def reset(self, op, t0=0.0):
            pass

        def step(self, t, meas, dv, targets, dv_forecast=None):
            return mp.ControlOutput(u=np.array([1.0]))

    class Recorder(Fixed):
        def __init__(self):
            self.seen = []

        def step(self, t, meas, dv, targets, dv_forecast=None, **kw):
            self.seen.append(kw.get("u_applied"))
            return mp.ControlOutput(u=np.array([1.0]))

    assert not mp.accepts_readback(Fixed()) and mp.accepts_readback(Recorder())
    assert mp.accepts_readback(mp.PIDController.for_model(m, [mp.PIDLoop("y", "u", gain=1.0)]))
    tr = mp.simulate(m, Fixed(), op=op0(m), Ts=1.0, duration=10.0, faults=[STUCK])
    assert tr.success
    rec = Recorder()
    mp.simulate(m, rec, op=op0(m), Ts=1.0, duration=10.0, faults=[STUCK])
    assert rec.seen[0][0] == 0.0 and rec.seen[4][0] == 1.0     # applied before the fault
    assert all(s[0] == 0.0 for s in rec.seen[6:])              # stuck at 0 from t = 5
    with pytest.raises(mp.SettingsError, match="readback"):
        mp.simulate(m, rec, op=op0(m), Ts=1.0, duration=10.0, readback="yes")


def mpc_loop(readback, until=150.0):
    m = first_order()
    dm = mp.linearize(m, op0(m)).discretize(1.0)
    ctl = mp.PredictiveController(dm, horizon=30, mv={"u": {"low": -5.0, "high": 5.0}}).build()
    loop = mp.ClosedLoop(m, ctl, op=op0(m), Ts=1.0, duration=300.0,
                         faults=[dict(STUCK, until=until)],
                         setpoints={"y": {"kind": "step", "at": 10.0, "size": 1.0}},
                         readback=readback)
    return loop, ctl


def test_mpc_estimator_not_biased_by_a_stuck_valve():
    # Reference: the estimator's disturbance state (Muske & Badgwell 2002) explains the gap
    # between prediction and measurement; with the applied MV in the prediction a stuck valve
    # leaves no gap (exact linear plant, no noise), without it the gap is read as a load of
    # -K * u_cmd.  After the valve frees, the biased controller pays for it.
    est = {}
    for rb in (True, False):
        loop, ctl = mpc_loop(rb)
        loop.reset()
        while loop.t0 + loop.k * loop.Ts < 140.0 and loop.step():
            pass
        est[rb] = (ctl.estimator_.disturbance_estimate.copy(), ctl.estimator_.state.copy(),
                   ctl.counts["readback_differs"] + 1000 * ctl.counts["mv_not_following"])
        while loop.step():
            pass
        est[rb] += (loop.trajectory(),)
    w_rb, x_rb, n_rb, tr_rb = est[True]
    w_no, x_no, n_no, tr_no = est[False]
    assert abs(w_rb[0]) < 1e-6 and abs(x_rb[0]) < 1e-6          # knows the valve sat at 0
    assert abs(w_no[0]) > 0.5                                  # a phantom disturbance
    # the valve was found not following (and limited at its position for 5 samples at
    # a time, then tried again): the commands mostly stay where the valve is
    assert n_rb >= 1000 + 5 and n_no == 0
    t = tr_rb.t
    stuck = (t >= 20) & (t < 150)
    held = np.abs(tr_rb.series("ucmd", "u")[stuck] - tr_rb.series("u", "u")[stuck]) < 1e-9
    assert held.mean() > 0.7
    assert np.all(tr_no.series("ucmd", "u")[stuck] > 0.5)       # without readback it keeps asking
    t = tr_rb.t
    after = t >= 150

    def iae(tr):
        return float(np.sum(np.abs(tr.series("y", "y") - tr.series("sp", "y"))[after]))

    assert iae(tr_rb) < 0.7 * iae(tr_no)
    assert math.isfinite(iae(tr_rb))


def test_a_readback_off_by_round_off_is_the_command():
    # An actuator's arithmetic may return the command a few ulps off; that is no difference
    # (our rule: within 1e-9 of the MV's scale, common practice of comparing floats, no
    # source): nothing is counted and the next step equals one given no readback at all.  A
    # readback 1e-6 of the scale off is a difference and is counted.
    m = first_order()
    dm = mp.linearize(m, op0(m)).discretize(1.0)
    tg = mp.Targets(setpoint=np.array([op0(m).y[0] + 1.0]), cv_low=np.array([-np.inf]),
                    cv_high=np.array([np.inf]), mv_low=np.array([-5.0]), mv_high=np.array([5.0]))
    outs = {}
    for case in ("none", "ulps", "off"):
        ctl = mp.PredictiveController(dm, horizon=20, mv={"u": {"low": -5.0, "high": 5.0}}).build()
        ctl.reset(op0(m))
        u = ctl.step(0.0, mp.Measurement.now(op0(m).y, 0.0), np.zeros(0), tg).u
        ua = {"none": None, "ulps": np.nextafter(np.nextafter(u, np.inf), np.inf),
              "off": u + 1e-6 * ctl.scales_["u"]}[case]
        assert case == "none" or not np.array_equal(ua, u)
        out = ctl.step(1.0, mp.Measurement.now(op0(m).y, 1.0), np.zeros(0), tg, u_applied=ua)
        outs[case] = (out.u, ctl.counts["readback_differs"])
    assert outs["ulps"][1] == 0 and outs["none"][1] == 0
    assert np.array_equal(outs["ulps"][0], outs["none"][0])
    assert outs["off"][1] == 1
