"""The built-in models against outside references.

* blending tank: steady state and Jacobians derived by hand from the balances in the module
  docstring (analytic, written out below);
* Henson-Seborg CSTR: the published steady state at Tc = 300 K (C_A ~ 0.5 mol/L, T ~ 350 K;
  Henson & Seborg, Nonlinear Process Control, 1997 -- from memory);
* quadruple tank: Johansson (2000) steady levels, time constants and zero condition (from memory);
* Wood & Berry (1973): gains and the relative gain array lambda11 = 2.01 (quoted in many
  process-control textbooks -- from memory);
* transfer-matrix elements: analytic FOPDT/SOPDT step responses and scipy.signal.
"""

import math

import numpy as np
import pytest
import scipy.signal as sig

import mpcproto as mp


def test_available_lists_every_model_with_options_and_parameters():
    info = {m["name"]: m for m in mp.available_models()}
    assert set(info) == {"blending_tank", "henson_seborg_cstr", "quadruple_tank", "wood_berry"}
    assert info["blending_tank"]["options"]["outflow"]["allowed"] == ["dv", "mv", "valve"]
    assert info["blending_tank"]["options"]["outflow"]["default"] == "dv"
    assert info["quadruple_tank"]["options"]["setting"]["allowed"] == ["minimum_phase", "non_minimum_phase"]
    assert info["henson_seborg_cstr"]["parameters"]["rate_constant"] == 7.2e10
    assert info["henson_seborg_cstr"]["time_unit"] == "min"
    assert info["blending_tank"]["time_unit"] == "s"


# --------------------------------------------------------------------------- blending tank

@pytest.fixture(scope="module")
def tank():
    return mp.make_model("blending_tank")


def test_blending_tank_variable_names(tank):
    # names other parts of the project (scenarios, MPC) depend on
    assert tank.mv_names == ("caustic_flow", "water_flow", "heater_duty")
    assert tank.dv_names == ("draw_off", "caustic_strength", "water_temperature")
    assert tank.measured_dv_names == ("draw_off",)
    assert tank.cv_names == ("level", "concentration", "temperature")
    assert mp.make_model("blending_tank", options={"outflow": "mv"}).mv_names[-1] == "draw_off"
    assert "draw_off" not in mp.make_model("blending_tank", options={"outflow": "valve"}).dv_names


def _hand_steady_state(p, w1, w2, Q, xc, T2, Ws=0.0):
    """Steady state of the balances (module docstring): with w = w1 + w2,
    x = w1 xc / (w1 + w2) and T = (w1 cp T1 + w2 cp T2 + Q + Ws + UA Ta) / ((w1 + w2) cp + UA)."""
    cp, UA = p["heat_capacity"], p["loss_coefficient"]
    x = w1 * xc / (w1 + w2)
    T = (w1 * cp * p["caustic_temperature"] + w2 * cp * T2 + Q + Ws + UA * p["ambient_temperature"]) / (
        (w1 + w2) * cp + UA)
    return x, T


def test_blending_tank_steady_state_matches_the_hand_derivation(tank):
    # analytic: steady-state component and energy balances solved by hand (see _hand_steady_state)
    p = tank.parameters
    u = {"caustic_flow": 0.07, "water_flow": 1.43, "heater_duty": 380.0}  # w1 + w2 = draw-off 1.5
    d = {"draw_off": 1.5, "caustic_strength": 0.48, "water_temperature": 12.0}
    op = mp.steady_state(tank, u, d)
    x, T = _hand_steady_state(p, 0.07, 1.43, 380.0, 0.48, 12.0)
    assert op.x[1] == pytest.approx(x, rel=1e-9)
    assert op.x[2] == pytest.approx(T, rel=1e-9)
    assert op.y[1] == pytest.approx(100 * x, rel=1e-9)  # CV concentration in wt%
    # nominal point is exact: 2 wt%, 75 degC
    op0 = mp.steady_state(tank)
    assert op0.y == pytest.approx([1.2, 2.0, 75.0], rel=1e-9)
    assert op0.residual < 1e-12


def test_blending_tank_valve_level_and_shaft_work_by_hand():
    # analytic: valve law w = Cv sqrt(h) at steady state gives h = ((w1 + w2)/Cv)^2;
    # the agitator power adds Ws / ((w1 + w2) cp + UA) to the temperature
    m = mp.make_model("blending_tank", options={"outflow": "valve", "shaft_work": "agitator"},
                      parameters={"valve_coefficient": 1.3, "agitator_power": 5.0})
    p = m.parameters
    u = {"caustic_flow": 0.06, "water_flow": 1.3, "heater_duty": 300.0}
    op = mp.steady_state(m, u)
    assert op.x[0] == pytest.approx(((0.06 + 1.3) / 1.3) ** 2, rel=1e-9)
    x, T = _hand_steady_state(p, 0.06, 1.3, 300.0, 0.5, 15.0, Ws=5.0)
    assert op.x[1] == pytest.approx(x, rel=1e-9)
    assert op.x[2] == pytest.approx(T, rel=1e-9)
    assert op.stable  # the valve makes the level self-regulating


def test_blending_tank_jacobians_match_the_hand_derivation(tank):
    # analytic Jacobians of the balances at a steady state (numerators of dx/dt and dT/dt vanish):
    #   f_h = (w1 + w2 - w)/(rho A)
    #   f_x = (w1 (xc - x) - w2 x)/M                 M = rho A h
    #   f_T = (w1 cp (T1 - T) + w2 cp (T2 - T) + Q - UA (T - Ta))/(M cp)
    op = mp.steady_state(tank)
    lin = mp.linearize(tank, op)
    p = tank.parameters
    rho, A, cp, UA = p["density"], p["area"], p["heat_capacity"], p["loss_coefficient"]
    h, x, T = op.x
    w1, w2, Q = op.u
    w, xc, T2 = op.d
    T1 = p["caustic_temperature"]
    M = rho * A * h
    A_hand = np.array([
        [0.0, 0.0, 0.0],
        [0.0, -(w1 + w2) / M, 0.0],
        [0.0, 0.0, -((w1 + w2) * cp + UA) / (M * cp)],
    ])
    B_hand = np.array([
        [1 / (rho * A), 1 / (rho * A), 0.0],
        [(xc - x) / M, -x / M, 0.0],
        [(T1 - T) / M, (T2 - T) / M, 1 / (M * cp)],
    ])
    Bd_hand = np.array([
        [-1 / (rho * A), 0.0, 0.0],
        [0.0, w1 / M, 0.0],
        [0.0, 0.0, w2 / M],
    ])
    C_hand = np.diag([1.0, 100.0, 1.0])  # concentration CV in wt%
    np.testing.assert_allclose(lin.A, A_hand, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(lin.B, B_hand, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(lin.Bd, Bd_hand, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(lin.C, C_hand, rtol=1e-12)
    assert np.all(lin.D == 0) and np.all(lin.Dd == 0)


def test_blending_tank_valve_jacobian_by_hand():
    # analytic: d/dh of (w1 + w2 - Cv sqrt(h))/(rho A) is -Cv / (2 sqrt(h) rho A)
    m = mp.make_model("blending_tank", options={"outflow": "valve"})
    op = mp.steady_state(m)
    p = m.parameters
    lin = mp.linearize(m, op)
    expected = -p["valve_coefficient"] / (2 * math.sqrt(op.x[0]) * p["density"] * p["area"])
    assert lin.A[0, 0] == pytest.approx(expected, rel=1e-9)


def test_blending_tank_gains_and_pairs_by_hand(tank):
    # analytic: x = w1 xc/(w1 + w2) -> dx/dw1 = xc w2/(w1 + w2)^2, dx/dw2 = -w1 xc/(w1 + w2)^2;
    # T from _hand_steady_state -> dT/dQ = 1/((w1 + w2) cp + UA); the level integrates with ramp
    # rate 1/(rho A) per kg/s; the heater does not move level or concentration at all.
    op = mp.steady_state(tank)
    lin = mp.linearize(tank, op)
    p = tank.parameters
    w1, w2, _ = op.u
    xc = op.d[1]
    K = lin.gain()
    assert K[1, 0] == pytest.approx(100 * xc * w2 / (w1 + w2) ** 2, rel=1e-8)
    assert K[1, 1] == pytest.approx(-100 * w1 * xc / (w1 + w2) ** 2, rel=1e-8)
    assert K[2, 2] == pytest.approx(1 / ((w1 + w2) * p["heat_capacity"] + p["loss_coefficient"]), rel=1e-8)
    assert K[0, 0] == math.inf and K[0, 2] == 0.0
    pairs = {(q["cv"], q["mv"]): q for q in lin.pairs()}
    lv = pairs[("level", "caustic_flow")]
    assert lv["integrating"] and lv["ramp_rate"] == pytest.approx(1 / (p["density"] * p["area"]), rel=1e-8)
    assert not pairs[("level", "heater_duty")]["connected"]
    assert not pairs[("concentration", "heater_duty")]["connected"]
    tau = p["density"] * p["area"] * op.x[0] / (w1 + w2)  # M / (w1 + w2), by hand
    assert pairs[("concentration", "caustic_flow")]["time_constants"] == [pytest.approx(tau, rel=1e-8)]


# --------------------------------------------------------------------------- Henson-Seborg CSTR

def test_henson_seborg_steady_state_at_300_K():
    # Henson & Seborg (1997), from memory: at Tc = 300 K the reactor runs at C_A ~ 0.5 mol/L, T ~ 350 K
    m = mp.make_model("henson_seborg_cstr")
    op = mp.steady_state(m, {"coolant_temperature": 300.0})
    assert op.x[0] == pytest.approx(0.5, abs=0.005)
    assert op.x[1] == pytest.approx(350.0, abs=0.1)
    assert op.residual < 1e-8
    assert m.variable("coolant_temperature").role == "mv"
    assert not m.variable("feed_concentration").measured
    assert m.time_unit == "min"


# --------------------------------------------------------------------------- quadruple tank

@pytest.mark.parametrize("setting, levels, taus", [
    # Johansson (2000), from memory: P- levels (12.4, 12.7, 1.8, 1.4) cm, time constants (62, 90, 23, 30) s;
    # P+ levels (12.6, 13.0, 4.8, 4.9) cm, time constants (63, 91, 39, 56) s
    ("minimum_phase", (12.4, 12.7, 1.8, 1.4), (62, 90, 23, 30)),
    ("non_minimum_phase", (12.6, 13.0, 4.8, 4.9), (63, 91, 39, 56)),
])
def test_quadruple_tank_published_operating_points(setting, levels, taus):
    m = mp.make_model("quadruple_tank", options={"setting": setting})
    op = mp.steady_state(m)
    np.testing.assert_allclose(op.x, levels, atol=0.25)
    lin = mp.linearize(m, op)
    # each tank is a first-order lag -1/T_i on the diagonal of A (Johansson's linearization)
    np.testing.assert_allclose(-1.0 / np.diag(lin.A), taus, rtol=0.05)


@pytest.mark.parametrize("setting", ["minimum_phase", "non_minimum_phase"])
def test_quadruple_tank_zero_in_the_right_half_plane_only_when_non_minimum_phase(setting):
    # Johansson (2000): zeros solve (1 + s T3)(1 + s T4) = (1 - g1)(1 - g2)/(g1 g2); one is in the
    # right half plane iff g1 + g2 < 1 (the non-minimum-phase setting)
    m = mp.make_model("quadruple_tank", options={"setting": setting})
    op = mp.steady_state(m)
    lin = mp.linearize(m, op)
    z = lin.zeros()
    p = m.parameters
    T3 = p["A3"] / p["a3"] * math.sqrt(2 * op.x[2] / p["g"])
    T4 = p["A4"] / p["a4"] * math.sqrt(2 * op.x[3] / p["g"])
    eta = (1 - p["gamma1"]) * (1 - p["gamma2"]) / (p["gamma1"] * p["gamma2"])
    z_hand = np.sort(np.roots([T3 * T4, T3 + T4, 1 - eta]).real)
    np.testing.assert_allclose(np.sort(z.real), z_hand, rtol=1e-6)
    nmp = p["gamma1"] + p["gamma2"] < 1
    assert nmp == (setting == "non_minimum_phase")
    assert bool(np.any(z.real > 0)) == nmp


# --------------------------------------------------------------------------- Wood & Berry

def test_wood_berry_gains_and_rga():
    # Wood & Berry (1973), from memory: gains [[12.8, -18.9], [6.6, -19.4]], RGA lambda11 = 2.01
    m = mp.make_model("wood_berry")
    lin = mp.linearize(m, mp.steady_state(m))
    np.testing.assert_allclose(lin.gain(), [[12.8, -18.9], [6.6, -19.4]], rtol=1e-10)
    np.testing.assert_allclose(lin.gain("dv"), [[3.8], [4.9]], rtol=1e-10)
    L = lin.rga()
    assert L[0, 0] == pytest.approx(2.01, abs=0.005)
    np.testing.assert_allclose(L.sum(axis=0), 1.0)  # rows and columns of an RGA sum to 1 (Bristol 1966)
    np.testing.assert_allclose(L.sum(axis=1), 1.0)
    pairs = {(q["cv"], q["mv"]): q for q in lin.pairs()}
    # published time constants and dead times, from memory
    assert pairs[("top_composition", "reflux")]["time_constants"] == [pytest.approx(16.7)]
    assert pairs[("top_composition", "reflux")]["dead_time"] == 1.0
    assert pairs[("bottom_composition", "reflux")]["dead_time"] == 7.0
    assert pairs[("bottom_composition", "steam")]["time_constants"] == [pytest.approx(14.4)]


def test_wood_berry_zeros_are_those_of_the_delay_free_determinant():
    # reference: det G(s) of the published matrix without its dead times, expanded by hand:
    # 12.8 (-19.4) (21 s + 1)(10.9 s + 1) + 18.9 (6.6) (16.7 s + 1)(14.4 s + 1) = 0.
    # The feed (DV) lags must not appear: they are not seen from the MVs.
    m = mp.make_model("wood_berry")
    lin = mp.linearize(m, mp.steady_state(m))
    num = (12.8 * -19.4 * np.polymul([21, 1], [10.9, 1]) + 18.9 * 6.6 * np.polymul([16.7, 1], [14.4, 1]))
    np.testing.assert_allclose(np.sort(lin.zeros().real), np.sort(np.roots(num).real), rtol=1e-8)


# --------------------------------------------------------------------------- transfer elements

def test_sopdt_element_with_lead_matches_scipy_step_response():
    # reference: scipy.signal.step of K (ta s + 1)/((t1 s + 1)(t2 s + 1)), shifted by the dead time
    K, t1, t2, ta, theta = 2.5, 8.0, 3.0, 4.0, 2.0
    m = mp.transfer_matrix_model("sopdt", mvs=["u"], cvs=[{"name": "y", "nominal": 10.0}],
                                 elements={"y": {"u": {"gain": K, "time_constants": [t1, t2],
                                                       "lead": ta, "dead_time": theta}}})
    lin = mp.linearize(m, mp.steady_state(m))
    num, den, dead = lin.transfer_element(0, 0)
    num_ref = K * np.array([ta, 1.0])
    den_ref = np.polymul([t1, 1.0], [t2, 1.0])
    # compare monic-normalized polynomials
    np.testing.assert_allclose(num / den[0], num_ref / den_ref[0], rtol=1e-9)
    np.testing.assert_allclose(den / den[0], den_ref / den_ref[0], rtol=1e-9)
    assert dead == theta
    # discrete step at Ts = 1 equals the continuous step sampled (scipy), delayed by theta
    dlin = lin.discretize(1.0)
    _, Y = dlin.simulate(np.ones((40, 1)))
    t = np.arange(40) - theta
    _, ystep = sig.step((num_ref, den_ref), T=np.arange(40, dtype=float))
    yref = np.concatenate([np.zeros(int(theta)), ystep[:40 - int(theta)]])
    np.testing.assert_allclose(Y[:, 0], yref, atol=1e-9)


def test_pure_gain_element_and_tuple_form():
    # a tuple (gain, tau, dead_time) and a tau of () are accepted; a pure gain is a static map
    m = mp.transfer_matrix_model("two", mvs=[{"name": "u", "nominal": 1.0}], cvs=["y1", "y2"],
                                 elements=[[(3.0, 5.0, 0.0)], [{"gain": -2.0}]])
    assert m.nx == 1
    y = m.output(np.zeros(1), [2.0])
    assert y[1] == pytest.approx(-2.0)  # -2 * (2 - 1), no lag
    assert y[0] == pytest.approx(0.0)  # the lag state starts at 0
