"""DiscreteLinearModel.gain() channel by channel: an integrating level does not make the
self-regulating channels infinite."""

from __future__ import annotations

import math

import numpy as np
import pytest

import mpcproto as mp


def unit():
    """Analytic test unit (our own): a level that integrates the flow difference and a lagged
    temperature with a dead time on one MV, plus a measured DV on the temperature.

        dh/dt = 0.5 (u1 - u2)                        y1 = h               (integrating)
        dT/dt = (2 u1(t - 2) + 3 u2 - T + 4 d) / 5   y2 = T + 0.5 u2      (self-regulating)
    """
    m = mp.Model("level_and_lag", time_unit="s")
    h = m.state("h", nominal=1.0)
    T = m.state("T", nominal=0.0)
    u1, u2 = m.mv("u1", nominal=0.0), m.mv("u2", nominal=0.0)
    d = m.dv("d", nominal=0.0)
    m.derivative(h, 0.5 * (u1 - u2))
    m.derivative(T, (2.0 * m.delayed(u1, 2.0) + 3.0 * u2 - T + 4.0 * d) / 5.0)
    m.cv("level", h)
    m.cv("temperature", T + 0.5 * u2)
    return m.build()


def test_discrete_gain_is_per_channel_and_equals_the_continuous_gain():
    m = unit()
    op = mp.OperatingPoint.at(m, m.nominal("state"), m.nominal("mv"))
    lin = mp.linearize(m, op)
    dlin = lin.discretize(1.0)
    assert dlin.nx == 2 + 2                              # two delay states for u1(t - 2)
    # analytic: level row integrates (+ for u1, - for u2); temperature row K = [2, 3 + 0.5]
    K = dlin.gain()
    assert K[0, 0] == math.inf and K[0, 1] == -math.inf
    assert K[1] == pytest.approx([2.0, 3.5], rel=1e-10)
    assert np.array_equal(np.isinf(K), np.isinf(lin.gain()))
    assert K[1] == pytest.approx(lin.gain()[1], rel=1e-10)     # ZOH keeps the steady-state gain
    Kd = dlin.gain("dv")
    assert Kd[0, 0] == 0.0 and Kd[1, 0] == pytest.approx(4.0, rel=1e-10)
    # the whole-system formula C (I - A)^-1 B + D is singular here: that was the all-inf answer
    assert abs(np.linalg.det(np.eye(dlin.nx) - dlin.A)) < 1e-12
    # the step response agrees: temperature settles at 3.5 per unit of u2, the level ramps at
    # -0.5 per second
    _, Y = dlin.simulate(np.tile([0.0, 1.0], (200, 1)))
    assert Y[-1, 1] == pytest.approx(3.5, rel=1e-9)
    assert Y[-1, 0] - Y[-2, 0] == pytest.approx(-0.5, rel=1e-12)
    with pytest.raises(mp.SettingsError, match=r"gain\(\): key 'role': expected 'mv' or 'dv', found 'cv'"):
        dlin.gain("cv")
