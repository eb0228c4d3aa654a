"""The steady target is lexicographic: every reachable CV target is met exactly, and the MV
preferred values decide only the freedom that is left.

References outside the project: the steady-state gain ``G = C (I - A)^-1 B + D`` computed with
numpy's dense solve, and the minimum of ``sum_j r_j (u_j - p_j)^2`` over ``G u = t`` computed in
the null space of ``G`` (``scipy.linalg.null_space`` + ``scipy.linalg.lstsq``): the textbook
null-space method for equality-constrained least squares (Golub & Van Loan, Matrix Computations,
section on LSE problems; from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

import mpcproto as mp

INF = np.inf


def _random_system(rng, nx, nu, ny, mv_gain_scale):
    """A stable discrete system whose MV j moves the CVs by about ``mv_gain_scale[j]`` per unit."""
    A = rng.normal(size=(nx, nx))
    A *= 0.8 / max(abs(np.linalg.eigvals(A)))
    B = rng.normal(size=(nx, nu)) * mv_gain_scale[None, :]
    C = rng.normal(size=(ny, nx))
    D = np.zeros((ny, nu))
    return A, B, C, D


def _target(A, B, C, D, mv_scale, pref_weight, cv_scale=None):
    nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
    su = np.asarray(mv_scale, float)
    sy = np.ones(ny) if cv_scale is None else np.asarray(cv_scale, float)
    return mp.SteadyTarget(A, B, C, D, np.zeros((nx, 0)), np.zeros((ny, 0)), np.zeros((nx, 0)),
                           np.zeros((ny, 0)), band_weight=np.ones(ny) / sy ** 2,
                           limit_linear=100 / sy, limit_quadratic=10 / sy ** 2,
                           preferred_weight=np.asarray(pref_weight, float),
                           scales=(np.ones(nx), su, sy)).build()


def _z(tgt, sp, mv_lo, mv_hi, pref, lim_lo=None, lim_hi=None):
    ny = len(sp)
    parts = {"d": [], "w": [], "band_lo": sp, "band_hi": sp,
             "lim_lo": np.full(ny, -INF) if lim_lo is None else lim_lo,
             "lim_hi": np.full(ny, INF) if lim_hi is None else lim_hi,
             "mv_lo": mv_lo, "mv_hi": mv_hi, "pref": pref}
    return np.concatenate([np.asarray(parts[k], float).reshape(n)
                           for k, n in tgt.layout_.items()])


def _null_space_reference(G, t, pref, r):
    """min sum r (u - pref)^2 s.t. G u = t, by the null-space method (scipy)."""
    u_p = sla.lstsq(G, t)[0]                       # one solution of G u = t
    Z = sla.null_space(G)
    if Z.shape[1] == 0:
        return u_p
    W = np.sqrt(r)
    alpha = sla.lstsq(W[:, None] * Z, W * (pref - u_p))[0]
    return u_p + Z @ alpha


@pytest.mark.parametrize("shape", [(4, 2, 2), (5, 3, 2), (6, 4, 1), (4, 1, 2), (6, 3, 3)])
def test_reachable_cv_targets_met_exactly_and_preferences_use_only_the_freedom(shape):
    # Property (issue 9): random square and non-square systems, reachable CV targets, MV limits
    # far away, MV gains from 1e-3 to 1e3 per unit and MV scales of 1 or far off; the target
    # meets every CV target to 1e-8 relative and the MVs equal the null-space solution
    # (scipy reference above) of the preferred values with their weights.
    nx, nu, ny = shape
    rng = np.random.default_rng(900 + nx * 10 + nu)
    for trial in range(9):
        gain = 10.0 ** rng.uniform(-3, 3, nu)
        A, B, C, D = _random_system(rng, nx, nu, ny, gain)
        G = C @ np.linalg.solve(np.eye(nx) - A, B) + D
        u_true = rng.normal(size=nu) / gain           # moves the CVs by O(1)
        t = G @ u_true                                # reachable whatever the shape
        big = 1e4 * np.max(np.abs(u_true)) + 1e4 / gain
        # MV scales: 1 (engineering units), the natural size (1 / gain), or anything
        mv_scale = [np.ones(nu), 1 / gain, 10.0 ** rng.uniform(-3, 3, nu)][trial % 3]
        r = 10.0 ** rng.uniform(-2, 2, nu)            # ratios up to 1e4 between MVs
        pref = rng.normal(size=nu) / gain
        tgt = _target(A, B, C, D, mv_scale, r)
        res = tgt.solve(_z(tgt, t, -big, big, pref))
        assert res.accepted, res.status
        np.testing.assert_allclose(res.values["ys"], t, rtol=1e-8, atol=1e-8 * np.abs(t).max())
        if nu > ny or np.linalg.matrix_rank(G) < nu:
            u_ref = _null_space_reference(G, t, pref, r)
        else:
            u_ref = sla.lstsq(G, t)[0]
        if trial % 3 == 2:
            # arbitrary scales can make the weights per scaled unit (r * scale^2) differ by
            # 1e16, beyond double precision: only the CVs are required then
            continue
        np.testing.assert_allclose(res.values["us"], u_ref, rtol=1e-6,
                                   atol=1e-7 * np.abs(u_ref).max())


def test_preferred_weights_act_through_their_ratios():
    # Closed form: y = u0 + u1 = 1, preferred u0 = 2 (weight w), u1 = 0 (weight 1):
    # min w (u0 - 2)^2 + u1^2 on u0 + u1 = 1 gives u0 = (2 w + 1) / (w + 1) (Lagrange).
    A, B, C, D = np.array([[0.5]]), np.array([[0.5, 0.5]]), np.array([[1.0]]), np.zeros((1, 2))
    for w in (1.0, 100.0):
        tgt = _target(A, B, C, D, np.ones(2), [w, 1.0])
        res = tgt.solve(_z(tgt, [1.0], [-10, -10], [10, 10], [2.0, 0.0]))
        assert res.accepted
        np.testing.assert_allclose(res.values["us"][0], (2 * w + 1) / (w + 1), rtol=1e-8)
        np.testing.assert_allclose(res.values["ys"], [1.0], rtol=1e-11)   # stage 2 keeps 1e-12


def test_unreachable_setpoints_keep_the_weighted_compromise():
    # Closed form: one MV, two CVs y = g u with setpoints t, weights c: the weighted least-squares
    # u = sum c g t / sum c g^2 (normal equation); a preferred value cannot move it.
    A, B = np.array([[0.5, 0.0], [0.0, 0.5]]), np.array([[0.5], [1.0]])
    C, D = np.eye(2), np.zeros((2, 1))
    g = np.linalg.solve(np.eye(2) - A, B)[:, 0]
    t = np.array([1.0, -1.0])
    tgt = _target(A, B, C, D, np.ones(1), [100.0])
    c = tgt.band_weight
    res = tgt.solve(_z(tgt, t, [-10], [10], [5.0]))
    u = np.sum(c * g * t) / np.sum(c * g ** 2)
    np.testing.assert_allclose(res.values["us"], [u], rtol=1e-9)


def _lag(K, lo, hi, n_mv=1):
    m = mp.Model("lag", time_unit="s")
    x = m.state("x", nominal=0.0)
    us = [m.mv(f"u{i}", nominal=0.0, low=lo, high=hi) for i in range(n_mv)]
    m.derivative(x, (K * sum(us) - x) / 10.0)
    m.cv("y", x)
    return m.build()


def test_small_gain_in_engineering_units_reaches_its_setpoint_in_closed_loop():
    # Issue 9: gain 1e-3 from an MV spanning +-1e5 (scale 1), setpoint step 0 -> 1.  With the MV
    # preferred value as a tie-break of weight 1e-6 (scaled) the steady target was y = 0.50
    # (weights c e^2 + r u^2 with c g^2 = r: half way, a closed-form check) and the loop settled
    # there.  Now the target is the setpoint itself and the loop reaches it.
    plant = _lag(1e-3, -1e5, 1e5)
    op = mp.OperatingPoint.at(plant, plant.nominal("state"), plant.nominal("mv"),
                              plant.nominal("dv"))
    dm = mp.linearize(plant, op).discretize(1.0)
    ctl = mp.PredictiveController.from_settings(dm, {
        "horizon": 30, "mv": {"u0": {"move_weight": 1e-7}}}).build()
    ctl.reset(op)
    tg = mp.Targets(setpoint=np.array([1.0]), cv_low=np.array([-INF]), cv_high=np.array([INF]),
                    mv_low=np.array([-1e5]), mv_high=np.array([1e5]))
    plan = ctl.plan(np.zeros(dm.nx), tg)
    assert abs(plan["diagnostics"]["target_y"][0] - 1.0) < 1e-8
    assert abs(plan["diagnostics"]["target_u"][0] - 1000.0) < 1e-5
    tr = mp.simulate(plant, ctl, op=op, Ts=1.0, duration=300.0,
                     setpoints={"y": {"kind": "step", "at": 1.0, "size": 1.0}})
    assert tr.success
    y = tr.series("y", "y")
    assert abs(y[-1] - 1.0) < 1e-6


def test_preferred_value_weight_matters_in_closed_loop():
    # Issue 9: two MVs on one CV, MV u0 preferred at 2.0.  With every preferred weight floored
    # to the same 1e-6 the MV settled at the same place whether its weight was 1 or 100.  Closed
    # form as above: u0 = (2 w + 1) / (w + 1) -> 1.5 (w = 1) and 201/101 = 1.990 (w = 100).
    plant = _lag(1.0, -10, 10, n_mv=2)
    op = mp.OperatingPoint.at(plant, plant.nominal("state"), plant.nominal("mv"),
                              plant.nominal("dv"))
    dm = mp.linearize(plant, op).discretize(1.0)
    ends = []
    for w in (1.0, 100.0):
        ctl = mp.PredictiveController.from_settings(dm, {"horizon": 30, "mv": {
            "u0": {"preferred_value": 2.0, "preferred_weight": w},
            "u1": {"preferred_weight": 1.0}}}).build()
        tr = mp.simulate(plant, ctl, op=op, Ts=1.0, duration=600.0,
                         setpoints={"y": {"kind": "step", "at": 1.0, "size": 1.0}})
        assert tr.success
        u0 = tr.series("u", "u0")[-50:]
        np.testing.assert_allclose(u0, (2 * w + 1) / (w + 1), atol=1e-6)
        np.testing.assert_allclose(tr.series("y", "y")[-50:], 1.0, atol=1e-6)
        ends.append(u0[-1])
    assert ends[1] - ends[0] > 0.4


def test_integrating_level_target_takes_the_setpoint():
    # A pure integrator (a level: inflow u0 minus outflow u1) has no steady-state gain; its
    # steady state asks for balanced flows and the level is free: the target takes the level
    # setpoint exactly and the flows follow their preferred values (closed form: u0 = u1, the
    # midpoint of the two preferred values for equal weights).
    A, B = np.array([[1.0]]), np.array([[0.1, -0.1]])
    C, D = np.array([[1.0]]), np.zeros((1, 2))
    tgt = _target(A, B, C, D, np.ones(2), [1.0, 1.0])
    res = tgt.solve(_z(tgt, [0.7], [-5, -5], [5, 5], [1.0, 2.0]))
    assert res.accepted
    np.testing.assert_allclose(res.values["ys"], [0.7], rtol=1e-11)
    np.testing.assert_allclose(res.values["us"], [1.5, 1.5], rtol=1e-8)


def test_restart_repeats_the_same_answers():
    # Determinism (common practice, no source): after restart() the same inputs give the same
    # targets to the last bit.
    rng = np.random.default_rng(5)
    A, B, C, D = _random_system(rng, 4, 3, 2, np.ones(3))
    tgt = _target(A, B, C, D, np.ones(3), [1.0, 0.0, 3.0])
    zs = [_z(tgt, rng.normal(size=2), -np.full(3, 2.0), np.full(3, 2.0), rng.normal(size=3))
          for _ in range(5)]
    first = [tgt.solve(z).values["us"] for z in zs]
    tgt.restart()
    again = [tgt.solve(z).values["us"] for z in zs]
    for a, b in zip(first, again):
        np.testing.assert_array_equal(a, b)
