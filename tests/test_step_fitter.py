"""One step-response fitter: fit_step_response (layer 2) behind fit_fopdt / fit_sopdt /
fit_integrating (layer 3)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

import mpcproto as mp


def test_step_model_response_matches_scipy_for_one_and_two_lags():
    # reference library: scipy.signal.step of 2.5/((8s+1)(3s+1)) and 2.5/(8s+1), shifted by the dead time
    t = np.linspace(0.0, 60.0, 241)
    theta = 4.0
    for den in ([8.0, 1.0], np.polymul([8.0, 1.0], [3.0, 1.0])):
        ref = np.zeros_like(t)
        late = t >= theta
        _, ref[late] = signal.step(signal.lti([2.5], den), T=t[late] - theta)
        taus = (8.0,) if len(den) == 2 else (8.0, 3.0)
        assert np.allclose(mp.step_model_response(t, 2.5, taus, theta), ref, atol=1e-9)
    # a ramp k' (t - theta) after the dead time (analytic, 1/s)
    assert np.allclose(mp.step_model_response(t, 0.2, (), theta, integrating=True),
                       0.2 * np.clip(t - theta, 0.0, None))


def test_the_tuning_fits_are_the_layer2_fit():
    # data: the analytic FOPDT 1.8 e^{-6 s}/(15 s + 1) (a worked example of our own), step of 0.5 at t=10
    t = np.arange(0.0, 150.0, 1.0)
    y = 3.0 + 0.5 * mp.step_model_response(t - 10.0, 1.8, (15.0,), 6.0)
    lay2 = mp.fit_step_response(t, y, size=0.5, t_step=10.0)
    lay3 = mp.fit_fopdt(t, y, at=10.0, size=0.5, cv="y", mv="u")
    assert lay2.kind == "fopdt" and lay3.kind == "fopdt"
    assert type(lay2) is type(lay3) is mp.ProcessFit          # one kind of step fit
    assert (lay3.cv, lay3.mv, lay2.cv) == ("y", "u", "")
    for f in (lay2, lay3):
        assert f.gain == pytest.approx(1.8, rel=1e-8)
        assert f.time_constants[0] == pytest.approx(15.0, rel=1e-7)
        assert f.dead_time == pytest.approx(6.0, abs=1e-6)
    assert lay3.rmse == pytest.approx(lay2.rmse, abs=1e-9)
    # SOPDT through both entry points
    y2 = 0.5 * mp.step_model_response(t - 10.0, -1.2, (20.0, 4.0), 3.0)
    a = mp.fit_step_response(t, y2, size=0.5, t_step=10.0, order=2)
    b = mp.fit_sopdt(t, y2, at=10.0, size=0.5)
    for f in (a, b):
        assert f.gain == pytest.approx(-1.2, rel=1e-6)
        assert f.time_constants == pytest.approx((20.0, 4.0), rel=1e-5)
        assert f.dead_time == pytest.approx(3.0, abs=1e-4)


def test_integrating_fit_at_layer_2():
    # analytic ramp 0.05 (t - 8) after the dead time 8, step of 2 at t = 5
    t = np.arange(0.0, 80.0, 1.0)
    y = 1.0 + 2.0 * mp.step_model_response(t - 5.0, 0.05, (), 8.0, integrating=True)
    f = mp.fit_step_response(t, y, size=2.0, t_step=5.0, kind="integrating")
    assert f.kind == "integrating" and f.element is None and f.time_constants == ()
    assert f.gain == pytest.approx(0.05, rel=1e-8) and f.dead_time == pytest.approx(8.0, abs=1e-6)
    g = mp.fit_integrating(t, y, at=5.0, size=2.0)
    assert (g.gain, g.dead_time) == pytest.approx((f.gain, f.dead_time))
    with pytest.raises(mp.SettingsError, match=r"key 'kind': expected one of 'fopdt', 'sopdt', "
                                               r"'integrating', found 'fodpt'.*did you mean 'fopdt'"):
        mp.fit_step_response(t, y, size=2.0, kind="fodpt")
    with pytest.raises(mp.SettingsError, match=r"fit_fopdt\(y<-u\): key 't': expected at least 5 samples after"):
        mp.fit_fopdt(t[:8], y[:8], at=5.0, size=2.0, cv="y", mv="u")


def test_fitters_refuse_wrong_types_with_settings_error():
    t = np.arange(10.0)
    with pytest.raises(mp.SettingsError, match=r"fit_step_response\(\): key 't_step': expected a finite number, found None"):
        mp.fit_step_response(t, t, size=1.0, t_step=None)
    with pytest.raises(mp.SettingsError, match=r"fit_fopdt: key 'at': expected the time of the step \(a finite number\), found 'x'"):
        mp.fit_fopdt(t, t, at="x", size=1.0)
    with pytest.raises(mp.SettingsError, match=r"fit_sopdt: key 'size': expected a finite non-zero step size, found 'a'"):
        mp.fit_sopdt(t, t, at=0.0, size="a")
