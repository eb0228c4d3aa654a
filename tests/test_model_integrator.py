"""The one sampled-integrator builder of a model (used by the simulator and the open-loop tests)."""

import math

import numpy as np
import pytest

import mpcproto as mp


def _first_order():
    m = mp.Model("lag", time_unit="s")
    tau = m.parameter("tau", 20.0, unit="s", low=0.0)
    x = m.state("x", nominal=0.0, unit="-")
    u = m.mv("u", nominal=0.0, unit="-", low=-10, high=10)
    m.derivative(x, (u - x) / tau)
    m.cv("y", x)
    return m.build()


def test_sampled_integrator_matches_the_analytic_first_order_step():
    # Analytic solution of tau dx/dt = u - x with u held: x(T) = u + (x0 - u) exp(-T/tau)
    # (linear ODE theory, common practice, no source).
    m = _first_order()
    F = m.sampled_integrator(5.0, options={"abstol": 1e-12, "reltol": 1e-12})
    xf = float(F(x0=0.3, p=np.r_[1.0, m.p])["xf"])
    assert xf == pytest.approx(1.0 + (0.3 - 1.0) * math.exp(-5.0 / 20.0), rel=1e-9)


def test_an_unknown_integrator_plugin_is_named_in_the_error():
    m = _first_order()
    with pytest.raises(mp.SettingsError, match="'no_such_plugin'"):
        m.sampled_integrator(1.0, plugin="no_such_plugin")
    with pytest.raises(mp.SettingsError, match="no_such_plugin"):
        mp.Plant(m, 1.0, integrator="no_such_plugin")


def test_an_unbuilt_model_says_what_to_call():
    m = mp.Model("raw")
    with pytest.raises(mp.NotBuiltError, match=r"build\(\)"):
        m.sampled_integrator(1.0)
