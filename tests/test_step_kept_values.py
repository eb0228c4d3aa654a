"""Values the controller's step keeps between samples give the same step as computing them anew.

The step keeps a sample's limits and setpoints in deviations while they stay, and takes the MV
limits themselves as the bounds reachable under the rate limits when the previous MVs are its own,
projected inside those very limits.  Reference: the same controller with both shortcuts off
computes every value from its formula each sample (the textbook reachable bound
``min(lo, u_prev + k rate)``, common practice, no source); the two runs must agree to the bit,
through limit changes that step past the MVs, a stuck valve read back, unmeasured DVs and a
changed setpoint.
"""

from __future__ import annotations

import numpy as np

import mpcproto as mp
from mpcproto.control.mpc_qp import ControllerQP

from _plants import tank_settings


def _tank():
    tank = mp.make_model("blending_tank")
    op = mp.steady_state(tank)
    return mp.linearize(tank, op).discretize(10.0)


def _settings():
    return tank_settings(30, 6)


def _run(dm, shortcut: bool, steps: int = 120):
    ctrl = mp.PredictiveController.from_settings(dm, _settings()).build()
    ctrl._reach_shortcut = shortcut
    ctrl.reset(dm.op)
    rng = np.random.default_rng(7)
    x = np.zeros(dm.nx)
    op = dm.op
    out_u, zs = [], []
    hi_duty = 600.0
    for k in range(steps):
        y = dm.C @ x + op.y + rng.normal(scale=[0.002, 0.01, 0.05])
        sp_ = op.y + np.array([0.0, 0.3 if k >= 10 else 0.0, -2.0 if k >= 60 else 0.0])
        if k == 40:                     # a high limit stepped below the heater's duty
            hi_duty = op.u[2] - 60.0
        if k == 80:
            hi_duty = 600.0
        tg = mp.Targets(setpoint=sp_, cv_low=np.full(3, -np.inf), cv_high=np.full(3, np.inf),
                        mv_low=np.zeros(3), mv_high=np.array([0.2, 3.0, hi_duty]))
        readback = None
        if 20 <= k < 26 and out_u:      # the water valve stuck at its last position
            readback = out_u[-1].copy()
            readback[1] = out_u[19][1] if k > 20 else readback[1]
        out = ctrl.step(k * dm.Ts, mp.Measurement.now(y, k * dm.Ts),
                        np.array([op.d[0], np.nan, np.nan]), tg, u_applied=readback)
        out_u.append(out.u)
        zs.append(ctrl._z.copy())
        x = dm.A @ x + dm.B @ (out.u - op.u)
    return np.array(out_u), np.array(zs), dict(ctrl.counts)


def test_kept_limits_and_reachable_bounds_equal_the_formulas_to_the_bit():
    dm = _tank()
    assert ControllerQP._reach_shortcut is True
    u1, z1, c1 = _run(dm, True)
    u0, z0, c0 = _run(dm, False)
    assert np.array_equal(u1, u0)
    assert np.array_equal(z1, z0)
    assert c1 == c0
    # the run did pass through what the shortcut must not hide: the duty limit stepped below
    # the duty (the reachable bound then follows the rate limit), and a readback
    assert c1["readback_differs"] > 0
    ctrl = mp.PredictiveController.from_settings(dm, _settings()).build()
    hi_block = z1[:, ctrl._zsl["u_hi"]].reshape(len(z1), -1, 3)[:, :, 2]    # (step, move)
    hi_dev = -60.0
    assert hi_block[40, 0] > hi_dev + 1.0                 # the plan may come down at its rate
    assert np.allclose(hi_block[39], 600.0 - dm.op.u[2])  # elsewhere: the limit itself
    assert np.isclose(u1[40, 2], dm.op.u[2] - 60.0)       # applied: the hard limit wins
