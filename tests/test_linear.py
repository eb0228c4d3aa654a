"""Linear models: discretization, poles, zeros, gains and dead-time delay states against scipy.signal and
python-control (general-purpose reference libraries) and analytic FOPDT responses."""

import math
import warnings

import control
import numpy as np
import pytest
import scipy.signal as sig

import mpcproto as mp


@pytest.fixture(scope="module")
def cstr_lin():
    m = mp.make_model("henson_seborg_cstr")
    op = mp.steady_states(m, {"coolant_temperature": 300.0})[2]  # the stable low-temperature state
    return mp.linearize(m, op)


@pytest.fixture(scope="module")
def quad_lin():
    m = mp.make_model("quadruple_tank", options={"setting": "non_minimum_phase"})
    return mp.linearize(m, mp.steady_state(m))


@pytest.fixture(scope="module")
def wood_berry_lin():
    m = mp.make_model("wood_berry")
    return mp.linearize(m, mp.steady_state(m))


@pytest.mark.parametrize("Ts", [0.05, 0.5])
def test_zoh_discretization_matches_scipy_and_python_control(cstr_lin, Ts):
    # references: scipy.signal.cont2discrete(method="zoh") and control.c2d(method="zoh")
    lin = cstr_lin
    d = lin.discretize(Ts)
    Ball = np.hstack([lin.B, lin.Bd])
    Ad, Bd_all, Cd, Dd, _ = sig.cont2discrete((lin.A, Ball, lin.C, np.hstack([lin.D, lin.Dd])), Ts, method="zoh")
    np.testing.assert_allclose(d.A, Ad, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(np.hstack([d.B, d.Bd]), Bd_all, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(d.C, Cd)
    sysd = control.c2d(control.ss(lin.A, lin.B, lin.C, lin.D), Ts, method="zoh")
    np.testing.assert_allclose(d.A, sysd.A, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(d.B, sysd.B, rtol=1e-10, atol=1e-14)


def test_poles_and_zeros_match_python_control(quad_lin):
    # reference: control.poles / control.zeros of the same (A, B, C, D)
    sys = control.ss(quad_lin.A, quad_lin.B, quad_lin.C, quad_lin.D)
    np.testing.assert_allclose(np.sort_complex(quad_lin.poles()), np.sort_complex(control.poles(sys)), rtol=1e-10)
    np.testing.assert_allclose(np.sort_complex(quad_lin.zeros()), np.sort_complex(control.zeros(sys)), rtol=1e-8)
    d = quad_lin.discretize(2.0)
    # discrete poles are exp(p Ts) (ZOH maps poles exactly)
    np.testing.assert_allclose(np.sort(d.poles().real), np.sort(np.exp(2.0 * quad_lin.poles().real)), rtol=1e-10)


@pytest.mark.filterwarnings("ignore::scipy.signal.BadCoefficients")  # leading ~0 numerator terms
def test_siso_zeros_match_scipy_ss2zpk(cstr_lin):
    # reference: scipy.signal.ss2zpk of each single channel (the CSTR is 1 MV, 2 CVs)
    for i, pair in enumerate(cstr_lin.pairs()):
        z_ref, p_ref, k_ref = sig.ss2zpk(cstr_lin.A, cstr_lin.B, cstr_lin.C[[i]], cstr_lin.D[[i]])
        np.testing.assert_allclose(np.sort_complex(np.array(pair["zeros"])), np.sort_complex(z_ref), rtol=1e-8)
        np.testing.assert_allclose(np.sort_complex(np.array(pair["poles"])), np.sort_complex(p_ref), rtol=1e-8)


def _tall(lead1, lead2):
    """One MV, two CVs: K (lead s + 1)/((t1 s + 1)(t2 s + 1)) each."""
    m = mp.transfer_matrix_model(
        "tall", mvs=["u"], cvs=["y1", "y2"],
        elements={"y1": {"u": {"gain": 1.0, "time_constants": [1.0, 3.0], "lead": lead1}},
                  "y2": {"u": {"gain": 2.0, "time_constants": [2.0, 4.0], "lead": lead2}}})
    return mp.linearize(m, mp.steady_state(m))


@pytest.mark.filterwarnings("ignore::scipy.signal.BadCoefficients")
def test_non_square_zeros_are_the_common_zeros_of_the_channels():
    # a column G(s) = [g1; g2] loses rank only where g1 and g2 both vanish; reference: the zeros of
    # each channel from scipy.signal.ss2zpk, intersected
    lin = _tall(-2.0, -2.0)  # both channels have their zero at s = +0.5
    z1 = sig.ss2zpk(lin.A, lin.B, lin.C[[0]], lin.D[[0]])[0]
    z2 = sig.ss2zpk(lin.A, lin.B, lin.C[[1]], lin.D[[1]])[0]
    common = [z for z in z1 if np.any(np.abs(z2 - z) < 1e-8)]
    np.testing.assert_allclose(lin.zeros(), common, rtol=1e-8)
    assert lin.zeros()[0].real == pytest.approx(0.5)
    # different zeros in the two channels: no transmission zero at all (a squared-down system
    # would show a spurious one)
    assert _tall(-2.0, 3.0).zeros().size == 0
    assert _tall(0.0, 0.0).zeros().size == 0


def test_zeros_ignore_states_the_mvs_do_not_reach(wood_berry_lin):
    # the feed (DV) lags are input-decoupling modes seen from the MVs: not transmission zeros
    # (reference: the transmission zeros are invariant under removing uncontrollable modes -- common
    # practice, no source; the values themselves are checked in test_models_library)
    dv_poles = [-1 / 14.9, -1 / 13.2]
    for z in wood_berry_lin.zeros():
        assert np.min(np.abs(np.array(dv_poles) - z)) > 1e-3


def test_zoh_step_invariance_against_scipy_step(cstr_lin):
    # ZOH is step invariant: the discrete step response equals the continuous one at the samples.
    # reference: scipy.signal.step of the continuous system
    Ts = 0.1
    d = cstr_lin.discretize(Ts)
    N = 60
    _, Y = d.simulate(np.ones((N, 1)))
    for i in range(2):
        _, yc = sig.step((cstr_lin.A, cstr_lin.B, cstr_lin.C[[i]], cstr_lin.D[[i]]), T=np.arange(N) * Ts)
        np.testing.assert_allclose(Y[:, i], yc, rtol=1e-8, atol=1e-12)
    # ZOH keeps the steady-state gain (common practice, no source)
    np.testing.assert_allclose(d.gain(), cstr_lin.gain(), rtol=1e-9)


def test_dead_time_delay_states_and_analytic_fopdt_step(wood_berry_lin):
    # Wood & Berry at Ts = 1 min: the 1, 3, 7 min dead times on the MVs are whole samples;
    # with dead_time="round" the feed's 8.1 and 3.4 min are rounded (with a warning naming the feed)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        d = wood_berry_lin.discretize(1.0, dead_time="round")
    msgs = sorted(str(r.message) for r in rec)
    assert len(msgs) == 2
    assert "dead time on 'feed' = 3.4 is not a multiple of the sample time 1" in msgs[0]
    assert "dead time on 'feed' = 8.1 is not a multiple of the sample time 1" in msgs[1]
    names = d.state_names
    assert d.n_plant_states == 6
    assert sum(n.startswith("reflux[k-") for n in names) == 7  # longest reflux delay: 7 samples
    assert sum(n.startswith("steam[k-") for n in names) == 3
    assert sum(n.startswith("feed[k-") for n in names) == 8
    # analytic FOPDT step (reference: y = K (1 - exp(-(t - theta)/tau)) for t >= theta, sampled):
    # reflux -> bottoms, K = 6.6, tau = 10.9, theta = 7
    N = 40
    u = np.zeros((N, 2))
    u[:, 0] = 1.0
    _, Y = d.simulate(u)
    k = np.arange(N)
    ref = np.where(k >= 7, 6.6 * (1 - np.exp(-(k - 7) / 10.9)), 0.0)
    np.testing.assert_allclose(Y[:, 1], ref, atol=1e-10)
    ref_top = np.where(k >= 1, 12.8 * (1 - np.exp(-(k - 1) / 16.7)), 0.0)
    np.testing.assert_allclose(Y[:, 0], ref_top, atol=1e-10)


def test_dead_time_refuse_and_half_sample_rounding(wood_berry_lin):
    with pytest.raises(mp.SettingsError, match=r"dead time on 'reflux' = 1, not a multiple of the sample time 2"):
        wood_berry_lin.discretize(2.0, dead_time="refuse")
    with pytest.raises(mp.SettingsError,
                       match=r"key 'policy': expected a dead_time policy one of 'exact', 'round', 'refuse', "
                             r"found 'nearest'"):
        wood_berry_lin.discretize(0.7, dead_time="nearest")
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        d = wood_berry_lin.discretize(2.0, dead_time="round")
    assert any("'reflux' = 1" in str(r.message) and "rounded to 1 samples" in str(r.message) for r in rec)
    assert sum(n.startswith("reflux[k-") for n in d.state_names) == 4  # 7 min -> 3.5 -> 4 samples
    for bad in (0, -1.0, math.nan, "1"):
        with pytest.raises(mp.SettingsError, match=r"key 'Ts': expected a sample time > 0"):
            wood_berry_lin.discretize(bad)


def test_dead_time_rounded_to_zero_acts_directly():
    m = mp.transfer_matrix_model("short", mvs=["u"], cvs=["y"],
                                 elements={"y": {"u": {"gain": 2.0, "tau": 5.0, "dead_time": 0.3}}})
    lin = mp.linearize(m, mp.steady_state(m))
    with pytest.warns(UserWarning, match="rounded to 0 samples"):
        d = lin.discretize(1.0, dead_time="round")
    assert d.nx == 1
    _, Y = d.simulate(np.ones((3, 1)))
    # analytic first-order ZOH step: y[k] = K (1 - exp(-k Ts / tau))
    np.testing.assert_allclose(Y[:, 0], 2.0 * (1 - np.exp(-np.arange(3) / 5.0)), atol=1e-12)


def test_rga_errors_and_values():
    # Bristol (1966): RGA = K .* inv(K)^T; a diagonal plant has the identity RGA
    np.testing.assert_allclose(mp.rga(np.diag([2.0, -3.0])), np.eye(2))
    with pytest.raises(mp.SettingsError, match=r"key 'K': expected a square gain matrix, found shape \(2, 3\)"):
        mp.rga(np.ones((2, 3)))
    with pytest.raises(mp.SettingsError, match="singular"):
        mp.rga(np.array([[1.0, 2.0], [2.0, 4.0]]))
    with pytest.raises(mp.SettingsError, match="non-finite"):
        mp.rga(np.array([[np.inf, 1.0], [1.0, 1.0]]))


def test_integrating_level_discrete_gain_only_where_it_integrates():
    tank = mp.make_model("blending_tank")
    lin = mp.linearize(tank, mp.steady_state(tank))
    d = lin.discretize(10.0)
    K, Kd = lin.gain(), d.gain()
    assert np.all(np.isinf(K[0, :2])) and np.all(np.isinf(Kd[0, :2]))
    np.testing.assert_allclose(Kd[1:], K[1:], rtol=1e-8)  # ZOH keeps finite gains
    # the draw-off lowers the level: a negative ramp
    assert lin.gain("dv")[0, 0] == -math.inf
