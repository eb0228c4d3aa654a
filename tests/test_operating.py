"""Steady states and the target problem, checked against independent solutions of the balances."""

import math
import pickle

import numpy as np
import pytest
from scipy.optimize import brentq

import mpcproto as mp


@pytest.fixture(scope="module")
def cstr():
    return mp.make_model("henson_seborg_cstr")


def _cstr_temperatures_by_scipy(p, Tc, q=100.0, CAf=1.0, Tf=350.0):
    """Independent reference: reduce the Henson-Seborg balances to one equation in T
    (C_A = q C_Af / (q + V k(T)) from the component balance) and bracket every root with scipy."""
    V, rho, Cp = p["volume"], p["density"], p["heat_capacity"]
    k = lambda T: p["rate_constant"] * math.exp(-p["activation_temperature"] / T)  # noqa: E731
    CA = lambda T: q * CAf / (q + V * k(T))  # noqa: E731

    def g(T):
        return (q / V * (Tf - T) + (-p["heat_of_reaction"]) / (rho * Cp) * k(T) * CA(T)
                + p["heat_transfer"] / (V * rho * Cp) * (Tc - T))

    grid = np.linspace(250.5, 599.5, 3000)
    vals = [g(T) for T in grid]
    roots = [brentq(g, a, b, xtol=1e-12) for a, b, ga, gb in zip(grid[:-1], grid[1:], vals[:-1], vals[1:])
             if ga * gb < 0]
    return sorted((CA(T), T) for T in roots)


def test_cstr_three_steady_states_at_300_K_middle_one_unstable(cstr):
    # Henson & Seborg (1997), from memory: the CSTR has three steady states over a band of coolant
    # temperatures, the middle one (here the published C_A ~ 0.5 mol/L, T ~ 350 K) unstable.
    # Reference values: scipy's bracketing solve of the reduced balance (above).
    ops = mp.steady_states(cstr, {"coolant_temperature": 300.0})
    ref = _cstr_temperatures_by_scipy(cstr.parameters, 300.0)
    assert len(ref) == 3 and len(ops) == 3
    for op, (ca_ref, t_ref) in zip(ops, ref):
        assert op.x[0] == pytest.approx(ca_ref, rel=1e-8)
        assert op.x[1] == pytest.approx(t_ref, rel=1e-10)
    # sorted by the first state (C_A): high-temperature, middle, low-temperature
    assert [op.x[0] for op in ops] == sorted(op.x[0] for op in ops)
    middle = ops[1]
    assert middle.x[0] == pytest.approx(0.5, abs=0.005) and middle.x[1] == pytest.approx(350.0, abs=0.1)
    assert middle.stable is False
    # a saddle: one real positive eigenvalue (common practice, no source: the slope condition of the
    # heat-generation and heat-removal lines at the middle intersection)
    assert np.sum(middle.eigenvalues.real > 0) == 1 and np.all(np.abs(middle.eigenvalues.imag) < 1e-12)
    assert ops[2].stable is True  # the low-temperature (extinguished) state


@pytest.mark.parametrize("Tc", [290.0, 310.0])
def test_cstr_single_steady_state_outside_the_band(cstr, Tc):
    # reference: scipy's bracketing solve finds one root at these coolant temperatures
    ops = mp.steady_states(cstr, {"coolant_temperature": Tc})
    ref = _cstr_temperatures_by_scipy(cstr.parameters, Tc)
    assert len(ref) == 1 and len(ops) == 1
    assert ops[0].x[1] == pytest.approx(ref[0][1], rel=1e-10)


def test_steady_state_picks_the_one_nearest_the_guess(cstr):
    u = {"coolant_temperature": 300.0}
    hot = mp.steady_state(cstr, u, x_guess={"CA": 0.2, "T": 372.0})
    cold = mp.steady_state(cstr, u, x_guess=[0.9, 320.0])
    assert hot.x[1] > 365 and cold.x[1] < 330


def test_steady_states_reproducible_with_seed_and_compiled_once(cstr):
    a = mp.steady_states(cstr, {"coolant_temperature": 301.0}, rng=7, n_starts=10)
    rf = cstr.steady_rootfinder_
    b = mp.steady_states(cstr, {"coolant_temperature": 301.0}, rng=np.random.default_rng(7), n_starts=10)
    assert cstr.steady_rootfinder_ is rf  # compiled once per model
    assert [op.x.tolist() for op in a] == [op.x.tolist() for op in b]


def test_no_steady_state_gives_a_clear_error():
    # inflow 1.6 kg/s against a draw-off of 1.5 kg/s: the level keeps rising (mass balance)
    tank = mp.make_model("blending_tank")
    assert mp.steady_states(tank, {"water_flow": 1.54}) == []
    with pytest.raises(mp.OperatingPointError, match=r"no steady state.*water_flow=1.54"):
        mp.steady_state(tank, {"water_flow": 1.54})


def test_bad_inputs_are_named(cstr):
    with pytest.raises(mp.ModelError, match=r"'coolant_temp' is not a mv.*did you mean 'coolant_temperature'"):
        mp.steady_states(cstr, {"coolant_temp": 300.0})
    with pytest.raises(mp.OperatingPointError, match=r"coolant_temperature are not finite"):
        mp.steady_states(cstr, {"coolant_temperature": math.nan})
    with pytest.raises(mp.OperatingPointError, match=r"each start must have 2 state values"):
        mp.steady_states(cstr, starts=[[1.0, 2.0, 3.0]])


# --------------------------------------------------------------------------- targets

def test_cstr_temperature_target_matches_the_hand_solution(cstr):
    # analytic: for a target T, the component balance gives C_A = q C_Af/(q + V k(T)) and the energy
    # balance solved for the coolant temperature gives
    #   Tc = T - V rho Cp / UA * (q/V (Tf - T) + (-dH)/(rho Cp) k(T) C_A)
    p = cstr.parameters
    T = 360.0
    k = p["rate_constant"] * math.exp(-p["activation_temperature"] / T)
    CA = 100.0 / (100.0 + p["volume"] * k)
    Tc = T - p["volume"] * p["density"] * p["heat_capacity"] / p["heat_transfer"] * (
        (350.0 - T) + (-p["heat_of_reaction"]) / (p["density"] * p["heat_capacity"]) * k * CA)
    res = mp.solve_targets(cstr, {"temperature": T})
    assert res.reachable and res.unreachable == ()
    assert res.op.u[0] == pytest.approx(Tc, rel=1e-8)
    assert res.op.x[0] == pytest.approx(CA, rel=1e-7)
    assert abs(res.residuals["temperature"]) < 1e-5
    solver = cstr.target_solver_
    mp.solve_targets(cstr, {"temperature": 355.0})
    assert cstr.target_solver_ is solver  # compiled once per model


def test_cstr_unreachable_target_names_the_cv_and_the_limiting_mv(cstr):
    res = mp.solve_targets(cstr, {"temperature": 450.0})
    assert not res.reachable and res.unreachable == ("temperature",)
    assert res.mvs_at_bounds == {"coolant_temperature": "high"}
    assert "temperature: target 450 K" in res.message
    assert "coolant_temperature at its high bound 350 K" in res.message
    assert res.op.residual < 1e-6  # still a steady state


def test_blending_tank_targets_match_the_hand_solution():
    # analytic: at steady state with draw-off w, x = w1 xc / w and w1 + w2 = w; the energy balance
    # gives Q = w1 cp (T - T1) + w2 cp (T - T2) + UA (T - Ta)
    tank = mp.make_model("blending_tank")
    p = tank.parameters
    res = mp.solve_targets(tank, {"level": 1.0, "concentration": 2.5, "temperature": 70.0})
    w, xc, T2 = 1.5, 0.5, 15.0
    w1 = w * 0.025 / xc
    w2 = w - w1
    Q = (w1 * p["heat_capacity"] * (70.0 - p["caustic_temperature"]) + w2 * p["heat_capacity"] * (70.0 - T2)
         + p["loss_coefficient"] * (70.0 - p["ambient_temperature"]))
    assert res.reachable, res.message
    # to solver precision since the Newton polish (was 1e-5)
    np.testing.assert_allclose(res.op.u, [w1, w2, Q], rtol=1e-10)
    assert res.op.x[0] == pytest.approx(1.0, rel=1e-12)


def test_blending_tank_too_strong_target_is_the_least_squares_compromise():
    # analytic: with the caustic pump at its 0.2 kg/s limit and draw-off 1.5 kg/s the strongest
    # product is 100 * 0.2 * 0.5 / 1.5 = 6.67 wt%
    tank = mp.make_model("blending_tank")
    res = mp.solve_targets(tank, {"concentration": 12.0, "temperature": 75.0})
    assert not res.reachable and res.unreachable == ("concentration",)
    assert res.mvs_at_bounds.get("caustic_flow") == "high"
    assert res.op.y[1] == pytest.approx(100 * 0.2 * 0.5 / 1.5, rel=1e-5)
    assert res.residuals["temperature"] == pytest.approx(0.0, abs=1e-4)
    assert "concentration: target 12 wt%" in res.message and "caustic_flow at its high bound" in res.message


def test_fixed_mvs_are_held():
    tank = mp.make_model("blending_tank")
    res = mp.solve_targets(tank, {"temperature": 80.0}, fixed_mvs={"heater_duty": 300.0})
    assert res.op.u[2] == 300.0
    assert "heater_duty" not in res.mvs_at_bounds
    with pytest.raises(mp.OperatingPointError, match=r"fixed_mvs names 'heater', which is not an MV"):
        mp.solve_targets(tank, {"temperature": 80.0}, fixed_mvs={"heater": 300.0})
    with pytest.raises(mp.OperatingPointError, match=r"key 'fixed_mvs.heater_duty': expected a value within its bounds \[0, 600\], found fixed MV 'heater_duty' = 900"):
        mp.solve_targets(tank, {"temperature": 80.0}, fixed_mvs={"heater_duty": 900.0})


def test_quadruple_tank_targets_match_the_hand_solution():
    # analytic (Johansson 2000 balances at steady state): the outflows a_i sqrt(2 g h_i) of tanks 1, 2
    # equal their inflows, linear in the pump voltages:
    #   a1 sqrt(2 g h1) = g1 k1 v1 + (1 - g2) k2 v2,   a2 sqrt(2 g h2) = (1 - g1) k1 v1 + g2 k2 v2
    m = mp.make_model("quadruple_tank", options={"setting": "non_minimum_phase"})
    p = m.parameters
    res = mp.solve_targets(m, {"level1": 10.0, "level2": 11.0})
    M = np.array([[p["gamma1"] * p["k1"], (1 - p["gamma2"]) * p["k2"]],
                  [(1 - p["gamma1"]) * p["k1"], p["gamma2"] * p["k2"]]])
    rhs = [p["a1"] * math.sqrt(2 * p["g"] * 10.0), p["a2"] * math.sqrt(2 * p["g"] * 11.0)]
    assert res.reachable, res.message
    np.testing.assert_allclose(res.op.u, np.linalg.solve(M, rhs), rtol=1e-10)


def test_bad_targets_are_named(cstr):
    with pytest.raises(mp.OperatingPointError, match=r"key 'targets.temprature': expected a CV .*found target 'temprature', which is not a CV.*did you mean 'temperature'"):
        mp.solve_targets(cstr, {"temprature": 350.0})
    with pytest.raises(mp.OperatingPointError, match=r"key 'targets.temperature': expected a finite number, found 'hot'"):
        mp.solve_targets(cstr, {"temperature": "hot"})
    with pytest.raises(mp.OperatingPointError, match=r"non-empty mapping"):
        mp.solve_targets(cstr, {})


def test_model_with_compiled_solvers_pickles(cstr):
    # models travel to worker processes: the cached CasADi solvers must pickle (CasADi Functions do)
    mp.steady_states(cstr)
    mp.solve_targets(cstr, {"temperature": 352.0})
    clone = pickle.loads(pickle.dumps(cstr))
    assert mp.steady_state(clone).x == pytest.approx(mp.steady_state(cstr).x)


def test_wood_berry_targets_to_solver_precision():
    # Reference: Wood & Berry (1973) steady-state gains (mol% per lb/min): top 12.8 reflux,
    # -18.9 steam; bottom 6.6 reflux, -19.4 steam.  The model is linear, so the MV moves are
    # G^-1 times the CV moves.  IPOPT alone stopped with CV residuals of about 1e-5 mol% and
    # reported "every target is reached"; the Newton polish takes them to rounding.
    wb = mp.make_model("wood_berry")
    op = mp.steady_state(wb)
    dy = np.array([1.0, 0.3])
    res = mp.solve_targets(wb, {"top_composition": op.y[0] + dy[0],
                                "bottom_composition": op.y[1] + dy[1]})
    assert res.reachable and "every target is reached" in res.message
    assert "not to solver precision" not in res.message
    for k, t in res.targets.items():
        assert abs(res.residuals[k]) <= 1e-10 * abs(t)
    G = np.array([[12.8, -18.9], [6.6, -19.4]])
    np.testing.assert_allclose(res.op.u - op.u, np.linalg.solve(G, dy), rtol=1e-10)


def _valve_tank():
    import casadi as ca

    m = mp.Model("valve_tank", time_unit="s")
    h = m.state("h", nominal=1.0, low=0.0, high=3.0)
    cv_ = m.mv("valve_coefficient", nominal=0.004, low=0.0, high=0.02)
    q = m.dv("inflow", nominal=0.005)
    m.derivative(h, (q - cv_ * ca.sqrt(h)) / 2.0)
    m.cv("level", h)
    return m.build()


def test_valve_coefficient_solved_as_an_mv_to_rounding():
    # Closed form: at steady state the outflow cv sqrt(h) equals the inflow q, so cv = q / sqrt(h).
    # IPOPT alone was good to 1e-11 .. 5e-11 relative here.
    m = _valve_tank()
    for level in (0.3, 1.7, 2.9):
        res = mp.solve_targets(m, {"level": level})
        assert res.reachable
        assert res.op.u[0] == pytest.approx(0.005 / math.sqrt(level), rel=1e-14)
        assert abs(res.residuals["level"]) <= 1e-14


def test_integrating_level_keeps_the_guessed_level():
    # Closed form: with the draw-off an MV the level integrates; at steady state it may take any
    # value and the concentration and temperature follow from the balances alone:
    # x = w1 xc / (w1 + w2), T from the energy balance (as in the hand solution above).  The
    # level must be the guessed one.  Before, a least-squares fallback moved it (guess 0.5 ->
    # 0.717), or every candidate tied in the max-norm on the temperature and the first one (the
    # nominal 1.2 m) won for a guess of 1.3 m.
    tank = mp.make_model("blending_tank", options={"outflow": "mv"})
    nominal = mp.steady_state(tank)
    for guess in ([1.3, 0.03, 60.0], [0.5, 0.01, 90.0], [1.5, 0.02, 75.0]):
        op = mp.steady_state(tank, nominal.u, x_guess=np.array(guess))
        assert op.x[0] == guess[0]
        np.testing.assert_allclose(op.x[1:], nominal.x[1:], rtol=1e-10)
        assert op.residual < 1e-12


def test_a_target_met_only_within_tolerance_says_so():
    # A level target 1e-7 above the tank's top (3 m) is within the default tolerance (1e-6 of the
    # 3 m span) but cannot be met exactly with the level inside its bounds: the answer counts as
    # reached and the message gives the residual (project convention: never claim a precision the
    # answer does not have; no outside source).
    m = _valve_tank()
    res = mp.solve_targets(m, {"level": 3.0 + 1e-7})
    assert res.reachable and res.states_at_bounds == {"h": "high"}
    assert "not to solver precision: residual level" in res.message
    assert 1e-7 <= abs(res.residuals["level"]) <= 3e-6
