"""Instruments and actuators: lag, bias, noise, dead time, analyzer sample-and-hold; spec errors."""

from __future__ import annotations

import math

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.sim import OpenLoop


def passthrough():
    """CV = MV directly (a feedthrough), so the true CV is a known step."""
    m = mp.Model("wire", time_unit="s")
    x = m.state("x", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-10, high=10)
    m.derivative(x, -x)
    m.cv("y", u + x)
    return m.build()


def run(instrument, duration=200.0, Ts=1.0, rng=0):
    m = passthrough()
    op = mp.OperatingPoint.at(m, [0.0], [0.0])
    ol = OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 10.0, "size": 1.0}})
    return mp.simulate(m, ol, op=op, Ts=Ts, duration=duration, instruments={"y": instrument}, rng=rng)


def test_first_order_lag_and_bias():
    # Reference: exact discretization of a first-order lag on a held input,
    # y_k = y_{k-1} e^{-Ts/tau} + (1 - e^{-Ts/tau}) u_k, i.e. 1 - e^{-n Ts/tau} after n samples
    tr = run({"lag": 20.0, "bias": 0.3})
    t = tr.t
    y = tr.series("y", "y")
    # the true CV sees the applied MV from the next sample (inputs held over the sample)
    assert y[11] == 1.0 and y[10] == 0.0
    n = t - 10.0
    expected = np.where(n >= 1, 1 - np.exp(-n / 20.0), 0.0) + 0.3
    assert np.allclose(tr.series("ym", "y"), expected, atol=1e-12)


def test_dead_time_delays_the_reading_and_sets_taken_at():
    tr = run({"dead_time": 7.0})
    y, ym = tr.series("y", "y"), tr.series("ym", "y")
    assert np.array_equal(ym[7:], y[:-7]) and np.all(ym[:7] == 0.0)
    assert np.array_equal(tr.series("taken", "y"), tr.t - 7.0)


def test_analyzer_samples_every_period_and_reports_late():
    # an analyzer that takes a sample every 30 s and reports it 20 s later, held in between
    tr = run({"period": 30.0, "dead_time": 20.0}, duration=150.0)
    t, y, ym, taken = tr.t, tr.series("y", "y"), tr.series("ym", "y"), tr.series("taken", "y")
    for k in range(len(t)):
        js = ((k - 20) // 30) * 30
        assert taken[k] == js
        assert ym[k] == (y[js] if js >= 0 else 0.0)
    loop = mp.ClosedLoop(passthrough(), OpenLoop(("u",)), op=mp.OperatingPoint.at(passthrough(), [0.0], [0.0]),
                         Ts=1.0, duration=100.0, instruments={"y": {"period": 30.0, "dead_time": 20.0}})
    loop.reset()
    fresh = []
    for k in range(100):
        fresh.append(bool(loop._measure(k, float(k), np.array([0.0])).fresh[0]))
    assert [k for k, f in enumerate(fresh) if f] == [20, 50, 80]


def test_noise_has_the_given_standard_deviation_and_no_bias():
    # Reference: sample mean and standard deviation of 5000 normal draws (common practice)
    tr = run({"noise_std": 0.5}, duration=5000.0, rng=5)
    e = tr.series("ym", "y") - tr.series("y", "y")
    assert abs(e.std() - 0.5) < 0.025 and abs(e.mean()) < 0.03


@pytest.mark.parametrize("factory, spec, message", [
    (mp.instrument_from_spec, {"noise": 1}, r"instruments.y: key 'noise': expected one of the keys .*found the unknown key 'noise' \(did you mean 'noise_std'"),
    (mp.instrument_from_spec, {"lag": -1}, r"key 'lag': expected a number >= 0, found -1"),
    (mp.instrument_from_spec, {"period": 0}, r"key 'period': expected a number > 0"),
    (mp.actuator_from_spec, {"low": 2, "high": 1}, r"key 'low': expected a value <= 'high' \(1\), found 2"),
    (mp.actuator_from_spec, {"rate": -1}, r"key 'rate': expected a number >= 0"),
    (mp.fault_from_spec, {"kind": "sensor_stuck", "variable": "y", "at": 1}, r"did you mean 'sensor_"),
    (mp.fault_from_spec, {"kind": "sensor_nan", "at": 1}, r"key 'variable': expected the key 'variable'"),
    (mp.fault_from_spec, {"kind": "sensor_drift", "variable": "y", "at": 1}, r"key 'rate': expected the key 'rate'"),
    (mp.fault_from_spec, {"kind": "sensor_nan", "variable": "y", "at": 5, "until": 2}, r"key 'until': expected a time after 'at' \(5\), found 2"),
    (mp.fault_from_spec, {"kind": "valve_saturation", "variable": "u", "at": 1}, r"expected 'low' and/or 'high' \(the reduced travel\), found neither"),
])
def test_bad_specs_are_named(factory, spec, message):
    with pytest.raises(mp.SettingsError, match=message):
        factory(spec, what="instruments.y")


def test_fault_dataclass_round_trip():
    f = mp.fault_from_spec({"kind": "valve_saturation", "variable": "u", "at": 3, "high": 2.0}, what="f")
    assert f.as_dict() == {"kind": "valve_saturation", "variable": "u", "at": 3.0, "high": 2.0}
    assert f.active(3.0) and not f.active(2.9) and not f.on_sensor
    assert mp.fault_from_spec(f.as_dict(), what="again") == f
    assert math.isinf(f.low)
