"""Open-loop step, pulse and impulse tests against analytic responses of the balances."""

import math
import warnings

import matplotlib.image as mpimg
import numpy as np
import pytest

import mpcproto as mp


@pytest.fixture(scope="module")
def tank():
    m = mp.make_model("blending_tank")
    return m, mp.steady_state(m)


def test_heater_step_matches_the_analytic_first_order_response(tank):
    # analytic: with the level constant, the energy balance M cp dT/dt = ... + Q - UA (T - Ta) is
    # linear in T and Q, so a heater step dQ gives T(t) = T0 + dQ/(W cp + UA) (1 - exp(-t/tau)),
    # tau = M cp/(W cp + UA), W = w1 + w2 -- for the nonlinear model and the linear one alike
    m, op = tank
    p = m.parameters
    r = mp.open_loop_test(m, op, "heater_duty", kind="step", size=50.0, duration=3000.0, Ts=20.0)
    W = op.u[0] + op.u[1]
    M = p["density"] * p["area"] * op.x[0]
    gain = 1.0 / (W * p["heat_capacity"] + p["loss_coefficient"])
    tau = M * p["heat_capacity"] * gain
    T_ref = op.x[2] + 50.0 * gain * (1 - np.exp(-r.t / tau))
    # integrator tolerances (reltol 1e-10 of ~80 degC per step) allow ~1e-6 of the 8 K change
    np.testing.assert_allclose(r.y_nonlinear[:, 2], T_ref, rtol=0, atol=1e-6 * 50.0 * gain)
    np.testing.assert_allclose(r.y_linear[:, 2], T_ref, rtol=1e-10)
    assert r.linearity["temperature"] < 1e-5
    assert r.linearity["level"] == 0.0 and r.linearity["concentration"] == 0.0  # not moved at all
    assert r.t[-1] == pytest.approx(3000.0) and r.u[0] == pytest.approx(op.u[2] + 50.0)


def test_linear_plant_responses_coincide_and_follow_the_fopdt():
    # Wood & Berry is linear: nonlinear and linear responses agree to integrator accuracy; the
    # reflux -> top step follows K (1 - exp(-(t - theta)/tau)) with K 12.8, tau 16.7, theta 1
    # (Wood & Berry 1973, from memory)
    m = mp.make_model("wood_berry")
    op = mp.steady_state(m)
    r = mp.open_loop_test(m, op, "reflux", size=0.1, duration=60.0, Ts=1.0)
    assert max(r.linearity.values()) < 1e-12      # both exact maps of the same linear model
    k = r.t
    ref = 96.25 + np.where(k >= 1, 0.1 * 12.8 * (1 - np.exp(-(k - 1) / 16.7)), 0.0)
    np.testing.assert_allclose(r.y_nonlinear[:, 0], ref, atol=1e-10)
    # the feed's dead times 8.1 and 3.4 min are not whole samples of 1 min: kept exact, no
    # rounding (feed -> top: K 3.8, tau 14.9, theta 8.1; feed -> bottom: 4.9, 13.2, 3.4)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = mp.open_loop_test(m, op, "feed", size=0.3, duration=60.0, Ts=1.0)
    t = r.t
    for i, (y0, K, tau, theta) in enumerate(((96.25, 3.8, 14.9, 8.1), (0.5, 4.9, 13.2, 3.4))):
        ref = y0 + np.where(t > theta, 0.3 * K * (1 - np.exp(-(t - theta) / tau)), 0.0)
        np.testing.assert_allclose(r.y_nonlinear[:, i], ref, atol=1e-10)
        np.testing.assert_allclose(r.y_linear[:, i], ref, atol=1e-10)
    assert not r.notes


def test_impulse_is_a_one_sample_pulse_of_the_given_area():
    # analytic: K/(tau s + 1) driven by a pulse of height a/Ts over [0, Ts):
    # y(k Ts) = (a/Ts) K (1 - exp(-Ts/tau)) exp(-(k - 1) Ts/tau) for k >= 1
    K, tau, a, Ts = 2.0, 5.0, 3.0, 0.5
    m = mp.transfer_matrix_model("lag", mvs=["u"], cvs=["y"], elements={"y": {"u": (K, tau, 0.0)}})
    op = mp.steady_state(m)
    r = mp.open_loop_test(m, op, "u", kind="impulse", size=a, duration=20.0, Ts=Ts)
    k = np.arange(len(r.t))
    ref = np.where(k >= 1, a / Ts * K * (1 - math.exp(-Ts / tau)) * np.exp(-(k - 1) * Ts / tau), 0.0)
    np.testing.assert_allclose(r.y_nonlinear[:, 0], ref, atol=1e-8)
    np.testing.assert_allclose(r.y_linear[:, 0], ref, atol=1e-12)
    assert r.u[0] == pytest.approx(a / Ts) and r.u[1] == 0.0
    # the response integrates to K * a (impulse area times gain), trapezoid over the samples
    assert np.trapezoid(r.y_linear[:, 0], r.t) == pytest.approx(K * a, rel=0.02)


def test_pulse_width_and_return(tank):
    m, op = tank
    r = mp.open_loop_test(m, op, "caustic_flow", kind="pulse", size=0.02, width=55.0, duration=600.0, Ts=10.0)
    assert np.sum(r.u > op.u[0] + 0.01) == 6  # 55 s at 10 s rounded to 6 samples
    assert any("rounded to 6 samples" in n for n in r.notes)
    assert r.u[-1] == pytest.approx(op.u[0])


def test_cstr_linearity_worsens_with_step_size():
    # common practice, no source: the linearization error of a step test grows with the step size
    # (Taylor remainder); the Henson-Seborg reactor near its ignition point is strongly nonlinear
    m = mp.make_model("henson_seborg_cstr")
    op = mp.steady_states(m, {"coolant_temperature": 300.0})[2]  # stable, low temperature
    sweep = mp.linearity_sweep(m, op, "coolant_temperature", [0.5, 2.0], duration=8.0, Ts=0.1)
    small, large = (s["linearity"]["temperature"] for s in sweep)
    assert 0 < small < large
    assert small < 0.1


def test_dv_step_and_plot(tank, tmp_path):
    m, op = tank
    r = mp.open_loop_test(m, op, "water_temperature", size=-5.0, duration=2000.0, Ts=20.0)
    assert r.input_role == "dv"
    # analytic steady-state change: dT = w2 dT2 / (W cp + UA) * cp
    p = m.parameters
    W = op.u[0] + op.u[1]
    dT = op.u[1] * p["heat_capacity"] * -5.0 / (W * p["heat_capacity"] + p["loss_coefficient"])
    tau = p["density"] * p["area"] * op.x[0] * p["heat_capacity"] / (W * p["heat_capacity"] + p["loss_coefficient"])
    assert r.y_nonlinear[-1, 2] - op.y[2] == pytest.approx(dT * (1 - math.exp(-2000.0 / tau)), rel=1e-6)
    assert r.y_linear[-1, 2] - op.y[2] == pytest.approx(dT * (1 - math.exp(-2000.0 / tau)), rel=1e-9)
    path = mp.plot_response_test(r, tmp_path / "sub" / "water_step.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpimg.imread(path)
    assert img.shape[0] > 400 and img.shape[1] == 800
    assert img[..., :3].std() > 0.05  # something is drawn
    d = r.as_dict()
    assert d["cvs"]["temperature"]["unit"] == "degC" and len(d["t"]) == len(r.t)


def test_bad_requests_are_named(tank):
    m, op = tank
    with pytest.raises(mp.SettingsError, match=r"key 'mv': expected the name of an MV or DV of this model .*found 'heater'.*did you mean 'heater_duty'"):
        mp.open_loop_test(m, op, "heater", size=1.0)
    with pytest.raises(mp.SettingsError, match=r"key 'kind': expected one of 'step', 'pulse', 'impulse', found 'stpe'"):
        mp.open_loop_test(m, op, "heater_duty", kind="stpe", size=1.0)
    with pytest.raises(mp.SettingsError, match=r"key 'size': expected a finite non-zero number, found 0"):
        mp.open_loop_test(m, op, "heater_duty", size=0)
    with pytest.raises(mp.SettingsError, match=r"key 'Ts': expected a finite number > 0, found -1"):
        mp.open_loop_test(m, op, "heater_duty", size=1.0, Ts=-1.0, duration=10.0)
    other = mp.make_model("henson_seborg_cstr")
    with pytest.raises(mp.SettingsError, match=r"key 'op': expected an operating point of model 'henson_seborg_cstr', found one of model 'blending_tank'"):
        mp.open_loop_test(other, op, "coolant_temperature", size=1.0)
    r = mp.open_loop_test(m, op, "heater_duty", size=10.0, duration=100.0, Ts=10.0)
    with pytest.raises(mp.SettingsError, match=r"key 'path': expected a file name ending in .png, found 'out.svg'"):
        mp.plot_response_test(r, "out.svg")


def test_fopdt_fit_recovers_the_wood_berry_element():
    # reference: the published reflux -> bottoms element 6.6 e^{-7s}/(10.9 s + 1) (Wood & Berry 1973,
    # from memory), sampled at 0.5 min: the fit must give it back
    m = mp.make_model("wood_berry")
    op = mp.steady_state(m)
    r = mp.open_loop_test(m, op, "reflux", size=0.1, duration=100.0, Ts=0.5)
    fit = mp.fit_step_response(r.t, r.y_nonlinear[:, 1], size=0.1)
    assert fit.gain == pytest.approx(6.6, rel=1e-6)
    assert fit.time_constants[0] == pytest.approx(10.9, rel=1e-5)
    assert fit.dead_time == pytest.approx(7.0, abs=1e-5)
    # the element rebuilds an equivalent plant
    plant = mp.transfer_matrix_model("refit", mvs=["reflux"], cvs=["xb"], elements=[[fit.element]])
    assert mp.linearize(plant, mp.steady_state(plant)).gain()[0, 0] == pytest.approx(6.6, rel=1e-6)


def test_sopdt_fit_finds_the_quadruple_tank_lags():
    # Johansson (2000), from memory: pump 2 reaches tank 1 only through tank 3, a two-lag path with
    # time constants T1 ~ 62 s and T3 ~ 23 s in the minimum-phase setting
    m = mp.make_model("quadruple_tank")
    op = mp.steady_state(m)
    r = mp.open_loop_test(m, op, "v2", size=0.1, duration=800.0, Ts=2.0)
    fit = mp.fit_step_response(r.t, r.y_nonlinear[:, 0], size=0.1, order=2)
    assert fit.time_constants[0] == pytest.approx(62.0, rel=0.05)
    assert fit.time_constants[1] == pytest.approx(23.0, rel=0.05)
    assert fit.dead_time == pytest.approx(0.0, abs=0.5)
    with pytest.raises(mp.SettingsError, match=r"key 'order': expected 1 \(FOPDT\) or 2 \(SOPDT\), found 3"):
        mp.fit_step_response(r.t, r.y_nonlinear[:, 0], size=0.1, order=3)
    with pytest.raises(mp.SettingsError, match=r"key 'y': expected a response that moves"):
        mp.fit_step_response(r.t, np.ones_like(r.t), size=0.1)
