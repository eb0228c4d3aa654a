"""The steady target's closed form (the common case: every setpoint met, nothing else active) is
the same answer as the two-stage QP it replaces, and it steps aside wherever it would not be.

References outside the project, named beside each check:

* the same two stages stated in cvxpy and solved by Clarabel (an interior-point solver; cvxpy's
  own reduction of the problem, not ours) -- ``SteadyTarget.solve(fast=False)``;
* the steady-state equations solved by numpy: with as many setpoints as MVs (the tank) the
  target is the one solution of ``(I - A) xs = B us + ..., C xs + D us = sp - ...``; with a
  steady-state gain ``G = C (I - A)^-1 B`` the MVs that made reachable setpoints (linear algebra);
* the minimum of ``sum_j r_j (u_j - p_j)^2`` over ``G u = t`` by the null-space method
  (``scipy.linalg.null_space`` + ``lstsq``; Golub & Van Loan, Matrix Computations, LSE problems;
  from memory);
* the projection of the preferred MVs onto a zone edge (a one-CV, one-active-row KKT system solved
  by hand: Lagrange).

The general path (both stages by DAQP, ``closed_form=False``) is the project's own second
opinion; the Clarabel reference is the outside one.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

import mpcproto as mp

from _plants import tank_settings

INF = np.inf
CLARABEL = {"tol_gap_abs": 1e-10, "tol_gap_rel": 1e-10, "tol_feas": 1e-10, "max_iter": 500}
# the reference's stage 2 keeps the CVs within 1e-8 (relative) of its stage 1 -- an interior-point
# answer is good to its tolerance only -- and where only the MV preferences decide, its objective
# is flat (1e-6 weights when none is given): its MVs are then good to about 1e-5 of their scales,
# no better.  The exact outside references are the linear-algebra ones (1e-9).
CLARABEL_GAP = 1e-4


# ------------------------------------------------------------------------------------------------
# the units
TANK_SETTINGS = tank_settings(20, 4)


def tank_target():
    """The blending tank's own steady target (the model linearized at its steady state and
    sampled at 10 s; the controller's settings of benchmarks/bench_mpc.py's tank)."""
    tank = mp.make_model("blending_tank")
    op = mp.steady_state(tank)
    dm = mp.linearize(tank, op).discretize(10.0)
    ctrl = mp.PredictiveController.from_settings(dm, TANK_SETTINGS).build()
    return ctrl.target_, dm


def matrix_target(A, B, C, pref_weight, mv_scale=None, limit_weights=True):
    A, B, C = (np.atleast_2d(np.asarray(M, float)) for M in (A, B, C))
    nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
    su = np.ones(nu) if mv_scale is None else np.asarray(mv_scale, float)
    lin = np.full(ny, 100.0) if limit_weights else np.zeros(ny)
    return mp.SteadyTarget(A, B, C, np.zeros((ny, nu)), np.zeros((nx, 0)), np.zeros((ny, 0)),
                           np.zeros((nx, 0)), np.zeros((ny, 0)), band_weight=np.ones(ny),
                           limit_linear=lin, limit_quadratic=lin / 10,
                           preferred_weight=np.asarray(pref_weight, float),
                           scales=(np.ones(nx), su, np.ones(ny))).build()


def zvec(tgt, **parts):
    """The input vector in ``layout_`` order; absent blocks: no bound, zeros elsewhere."""
    fill = {"band_lo": -INF, "band_hi": INF, "lim_lo": -INF, "lim_hi": INF, "mv_lo": -INF,
            "mv_hi": INF}
    return np.concatenate([np.broadcast_to(np.asarray(parts.get(k, fill.get(k, 0.0)), float), n)
                           for k, n in tgt.layout_.items()])


def three_ways(tgt, z):
    """(closed-form attempt, general DAQP path, cvxpy/Clarabel reference) and the path taken."""
    a = tgt.solve(z)
    path = tgt.last_path
    b = tgt.solve(z, closed_form=False)
    assert tgt.last_path == "daqp"
    c = tgt.solve(z, fast=False, solver="CLARABEL", options=CLARABEL)
    assert tgt.last_path == "cvxpy"
    for r in (a, b, c):
        assert r.accepted, r.status
    return a, b, c, path


def lse_reference(tgt, z, r):
    """MVs minimising ``sum r (u - pref)^2`` over the steady states that meet the setpoints
    (``band_lo == band_hi``): the null-space method with scipy (``lstsq`` + ``null_space``) on the
    steady-state equations ``(I - A) xs - B us = Bd d + Bw w``, ``C xs + D us = sp - Dd d - Cw w``
    (every state must be pinned by them or by the MVs: no integrating state left free)."""
    A, B, C, D = tgt.A, tgt.B, tgt.C, tgt.D
    nx, nu = B.shape
    nd, nw = tgt.layout_["d"], tgt.layout_["w"]
    d, w = z[:nd], z[nd:nd + nw]
    lo, hi = z[tgt._zsl["band_lo"]], z[tgt._zsl["band_hi"]]
    m = lo == hi
    K = np.vstack([np.hstack([np.eye(nx) - A, -B]), np.hstack([C, D])[m]])
    rhs = np.concatenate([tgt.Bd @ d + tgt.Bw @ w, (lo - tgt.Dd @ d - tgt.Cw @ w)[m]])
    v_p = sla.lstsq(K, rhs)[0]
    Z = sla.null_space(K)
    Wsel = np.sqrt(r)[:, None] * np.hstack([np.zeros((nu, nx)), np.eye(nu)])
    pref = z[tgt._zsl["pref"]]
    alpha = sla.lstsq(Wsel @ Z, np.sqrt(r) * pref - Wsel @ v_p)[0]
    return (v_p + Z @ alpha)[nx:]


def gap(r1, r2, tgt):
    """Largest difference of us and ys, in MV / CV scales."""
    return max(np.max(np.abs(r1.values["us"] - r2.values["us"]) / tgt._su),
               np.max(np.abs(r1.values["ys"] - r2.values["ys"]) / tgt._sy))


# ------------------------------------------------------------------------------------------------
# the blending tank
def _tank_case(rng, tgt, kind):
    """Random inputs of one kind; returns (z, the path the closed form must take)."""
    sy, su = tgt._sy, tgt._su
    nd, nw = tgt.layout_["d"], tgt.layout_["w"]
    d = rng.normal(size=nd) * 0.02
    w = rng.normal(size=nw) * 0.02 * np.array([1.0, 1.0, 10.0])[:nw]
    sp = rng.normal(size=3) * sy * 2
    mv_lo, mv_hi = np.full(3, -40.0) * su, np.full(3, 40.0) * su
    pref = rng.normal(size=3) * su
    band_lo, band_hi = sp.copy(), sp.copy()
    lim_lo, lim_hi = np.full(3, -INF), np.full(3, INF)
    expect = "closed_form"
    if kind == "zones":                   # concentration in a wide zone, level limits far away
        band_lo[1], band_hi[1] = sp[1] - 50 * sy[1], sp[1] + 50 * sy[1]
        lim_lo[0], lim_hi[0] = -40 * sy[0], 40 * sy[0]
    elif kind == "zone_edge":            # a zone narrower than the preferred values allow
        tgt_free = tgt.solve(zvec(tgt, d=d, w=w, band_lo=np.r_[sp[0], -INF, sp[2]],
                                  band_hi=np.r_[sp[0], INF, sp[2]], mv_lo=mv_lo, mv_hi=mv_hi,
                                  pref=pref), closed_form=False)
        y1 = tgt_free.values["ys"][1]
        band_lo[1], band_hi[1] = y1 + 0.5 * sy[1], y1 + 3 * sy[1]
        expect = "daqp"
    elif kind == "unreachable":           # setpoints far beyond what the MV bounds allow
        sp[2] = 1e4 * sy[2]
        band_lo[2] = band_hi[2] = sp[2]
        expect = "daqp"
    elif kind == "limit":                 # the level setpoint above its soft limit
        lim_lo[0], lim_hi[0] = sp[0] - 2 * sy[0], sp[0] - 1 * sy[0]
        expect = "daqp"
    z = zvec(tgt, d=d, w=w, band_lo=band_lo, band_hi=band_hi, lim_lo=lim_lo, lim_hi=lim_hi,
             mv_lo=mv_lo, mv_hi=mv_hi, pref=pref)
    return z, expect


@pytest.mark.parametrize("kind", ["setpoints", "zones", "zone_edge", "unreachable", "limit"])
def test_tank_closed_form_equals_the_two_stage_qp(kind):
    # 12 random cases per kind (seeded): the closed form where it applies, the general DAQP path
    # and the cvxpy/Clarabel statement (outside reference) agree; the path is the expected one.
    tgt, dm = tank_target()
    rng = np.random.default_rng({"setpoints": 1, "zones": 2, "zone_edge": 3, "unreachable": 4,
                                 "limit": 5}[kind])
    paths = []
    for _ in range(12):
        z, expect = _tank_case(rng, tgt, kind)
        a, b, c, path = three_ways(tgt, z)
        paths.append(path)
        # where the DAQP stages decided, the next sample may re-use their active rows
        assert path == expect or (expect == "daqp" and path == "active_set" and
                                  paths[-2:-1] in (["daqp"], ["active_set"]))
        assert (a.iterations == 0) == (path != "daqp")
        # the DAQP stages hold the CVs to 1e-12 of their values (an unreachable setpoint of
        # 1e4 scales: to 1e-8 of a scale)
        assert gap(a, b, tgt) <= 1e-9 + 1e-12 * np.max(np.abs(z[tgt._zsl["band_lo"]]) / tgt._sy)
        assert gap(a, c, tgt) <= CLARABEL_GAP
        if path == "closed_form":
            u_ref = lse_reference(tgt, z, 1 / tgt._su ** 2)
            assert np.max(np.abs(a.values["us"] - u_ref) / tgt._su) <= 1e-9
            # the lazily computed band error and limit violation: zero (stage 1's optimum is 0)
            assert np.max(np.abs(a.values["e"])) <= 1e-9
            assert np.max(np.abs(a.values["s"])) == 0.0


def test_tank_setpoints_by_the_steady_state_equations():
    # Linear algebra: the tank's level integrates (I - A is singular: no gain matrix), but with 3
    # setpoints and 3 MVs the steady state is the one solution of the square system
    #   (I - A) xs - B us = [Bd Bw] [d; w],   C xs + D us = sp - [Dd Cw] [d; w]
    # (numpy's dense solve).
    tgt, dm = tank_target()
    A, B, C, D = tgt.A, tgt.B, tgt.C, tgt.D
    nx, nu = B.shape
    K = np.block([[np.eye(nx) - A, -B], [C, D]])
    assert np.linalg.matrix_rank(K) == nx + nu
    rng = np.random.default_rng(7)
    for _ in range(10):
        z, _ = _tank_case(rng, tgt, "setpoints")
        nd = tgt.layout_["d"]
        d, w = z[:nd], z[nd:tgt.layout_["d"] + tgt.layout_["w"]]
        sp = z[tgt._zsl["band_lo"]]
        res = tgt.solve(z)
        assert tgt.last_path == "closed_form" and res.iterations == 0
        ref = np.linalg.solve(K, np.concatenate([tgt.Bd @ d + tgt.Bw @ w,
                                                 sp - tgt.Dd @ d - tgt.Cw @ w]))
        assert np.max(np.abs(res.values["us"] - ref[nx:]) / tgt._su) <= 1e-9
        assert np.max(np.abs(res.values["xs"] - ref[:nx]) / (1 + np.abs(ref[:nx]))) <= 1e-9
        assert np.max(np.abs(res.values["ys"] - sp) / tgt._sy) <= 1e-10


def test_forcing_the_general_path_and_restart():
    # The switch is honoured (the attribute and the argument) and a restart changes nothing
    # (determinism: common practice, no source).
    tgt, _ = tank_target()
    z, _ = _tank_case(np.random.default_rng(11), tgt, "setpoints")
    first = tgt.solve(z)
    assert tgt.last_path == "closed_form"
    tgt.closed_form = False
    forced = tgt.solve(z)
    assert tgt.last_path == "daqp" and forced.iterations > 0
    assert tgt.solve(z, closed_form=True).iterations == 0
    tgt.closed_form = True
    tgt.restart()
    again = tgt.solve(z)
    np.testing.assert_array_equal(again.values["us"], first.values["us"])
    assert gap(first, forced, tgt) <= 1e-9


def test_general_path_after_a_closed_form_starts_from_it():
    # After a closed form, stage 1 starts from [s = 0, e = 0, phi]: a following general solve of
    # an unreachable case still agrees with a fresh target's answer (and with Clarabel).
    tgt, _ = tank_target()
    rng = np.random.default_rng(12)
    z_easy, _ = _tank_case(rng, tgt, "setpoints")
    z_hard, _ = _tank_case(rng, tgt, "unreachable")
    tgt.solve(z_easy)
    assert tgt.last_path == "closed_form"
    after = tgt.solve(z_hard)
    assert tgt.last_path == "daqp"
    fresh, _ = tank_target()
    ref = fresh.solve(z_hard, closed_form=False)
    assert gap(after, ref, tgt) <= 1e-9


# ------------------------------------------------------------------------------------------------
# other shapes
def random_lags(rng, nx, nu, ny, pref_weight):
    """A target on random first-order lags (diagonal A) and their steady-state gain matrix."""
    A = np.diag(rng.uniform(0.2, 0.9, nx))
    B = rng.normal(size=(nx, nu))
    C = rng.normal(size=(ny, nx))
    return matrix_target(A, B, C, pref_weight), C @ np.linalg.solve(np.eye(nx) - A, B)


def test_fewer_cvs_than_mvs_ties_broken_by_preferred_values():
    # Null-space method (scipy reference): 1 CV, 3 MVs, weights r: the MVs minimise
    # sum r (u - p)^2 on G u = t; an MV bound that the answer would cross sends the solve the
    # general way and the bound holds there.
    rng = np.random.default_rng(21)
    for trial in range(10):
        r = 10.0 ** rng.uniform(-1, 1, 3)
        tgt, _ = random_lags(rng, 2, 3, 1, r)
        t, p = rng.normal(size=1), rng.normal(size=3)
        z = zvec(tgt, band_lo=t, band_hi=t, mv_lo=-100.0, mv_hi=100.0, pref=p)
        a, b, c, path = three_ways(tgt, z)
        assert path == "closed_form"
        u_ref = lse_reference(tgt, z, r)
        np.testing.assert_allclose(a.values["us"], u_ref, atol=1e-9 * (1 + np.abs(u_ref).max()))
        assert gap(a, b, tgt) <= 1e-9 and gap(a, c, tgt) <= CLARABEL_GAP
        # an MV bound just inside the unconstrained answer: active, so the general path
        j = int(np.argmax(np.abs(u_ref)))
        lo, hi = np.full(3, -100.0), np.full(3, 100.0)
        if u_ref[j] > 0:
            hi[j] = u_ref[j] - 0.1
        else:
            lo[j] = u_ref[j] + 0.1
        z2 = zvec(tgt, band_lo=t, band_hi=t, mv_lo=lo, mv_hi=hi, pref=p)
        a2, b2, c2, path2 = three_ways(tgt, z2)
        assert path2 == "daqp"
        assert gap(a2, b2, tgt) == 0.0
        assert lo[j] - 1e-9 <= a2.values["us"][j] <= hi[j] + 1e-9
        assert gap(a2, c2, tgt) <= CLARABEL_GAP
        # the next sample (preferred values moved a little) re-uses the active bound
        z3 = zvec(tgt, band_lo=t, band_hi=t, mv_lo=lo, mv_hi=hi, pref=p * 1.01)
        a3, b3, c3, path3 = three_ways(tgt, z3)
        assert path3 == "active_set"
        assert a3.values["us"][j] in (lo[j], hi[j]) or abs(a3.values["us"][j] - (
            hi[j] if u_ref[j] > 0 else lo[j])) <= 1e-12 * 100
        assert gap(a3, b3, tgt) <= 1e-9 and gap(a3, c3, tgt) <= CLARABEL_GAP


def test_more_setpoints_than_mvs():
    # 3 CVs on setpoints, 2 MVs: setpoints drawn at random are unreachable (stage 1's weighted
    # compromise: the general path); setpoints made by the model itself from some MVs are
    # reachable through dependent rows and the closed form takes them (their agreement checked).
    # References: the cvxpy/Clarabel statement; for the reachable ones, the MVs that made them
    # (G has full column rank: unique; linear algebra).
    rng = np.random.default_rng(31)
    for trial in range(10):
        tgt, G = random_lags(rng, 3, 2, 3, [1.0, 1.0])
        t = rng.normal(size=3)
        z = zvec(tgt, band_lo=t, band_hi=t, mv_lo=-1e3, mv_hi=1e3, pref=rng.normal(size=2))
        a, b, c, path = three_ways(tgt, z)
        assert path == "daqp"
        assert gap(a, c, tgt) <= CLARABEL_GAP
        # the next sample re-uses that solve's deciding rows (none: the compromise alone) and
        # gives the weighted least-squares compromise (normal equations, numpy lstsq)
        t3 = t + rng.normal(size=3) * 0.1
        z3 = zvec(tgt, band_lo=t3, band_hi=t3, mv_lo=-1e3, mv_hi=1e3, pref=rng.normal(size=2))
        a3, b3, c3, path3 = three_ways(tgt, z3)
        assert path3 == "active_set"
        w = np.sqrt(tgt.band_weight)
        u_ls = np.linalg.lstsq(w[:, None] * G, w * t3, rcond=None)[0]
        np.testing.assert_allclose(a3.values["us"], u_ls, atol=1e-9 * (1 + np.abs(u_ls).max()))
        assert gap(a3, b3, tgt) <= 1e-9 and gap(a3, c3, tgt) <= CLARABEL_GAP
        u_true = rng.normal(size=2)
        t2 = G @ u_true
        z2 = zvec(tgt, band_lo=t2, band_hi=t2, mv_lo=-1e3, mv_hi=1e3, pref=rng.normal(size=2))
        a2, b2, c2, path2 = three_ways(tgt, z2)
        assert path2 in ("closed_form", "active_set")
        np.testing.assert_allclose(a2.values["us"], u_true, atol=1e-9)
        assert gap(a2, b2, tgt) <= 1e-9 and gap(a2, c2, tgt) <= CLARABEL_GAP


def test_integrating_level():
    # A level (inflow u0 minus outflow u1; an integrator) and a temperature-like lag on u0:
    # with the level on a setpoint the flows balance (u0 = u1) and the lag CV takes its own
    # setpoint: u0 = t_T / gain (closed form).  With the level in a zone only the target's 1e-9
    # pull towards the operating point decides it: level 0 exactly (d = w = 0; closed form).
    # Both ways against the general path and Clarabel, which solve the pulled direction with a
    # curvature 1e-9 of the rest and are good to about 1e-7 there (eps times 1e9).
    A = np.array([[1.0, 0.0], [0.0, 0.5]])
    B = np.array([[0.1, -0.1], [0.5, 0.0]])
    C = np.eye(2)
    tgt = matrix_target(A, B, C, [1.0, 1.0])
    gain = 0.5 / (1 - 0.5)
    rng = np.random.default_rng(41)
    for _ in range(6):
        t = rng.normal(size=2)
        z = zvec(tgt, band_lo=t, band_hi=t, mv_lo=-10.0, mv_hi=10.0, pref=rng.normal(size=2))
        a, b, c, path = three_ways(tgt, z)
        assert path == "closed_form"
        np.testing.assert_allclose(a.values["us"], [t[1] / gain] * 2, atol=1e-10)
        np.testing.assert_allclose(a.values["ys"], t, atol=1e-10)
        assert gap(a, b, tgt) <= 1e-9 and gap(a, c, tgt) <= CLARABEL_GAP
        z2 = zvec(tgt, band_lo=[-5.0, t[1]], band_hi=[5.0, t[1]], mv_lo=-10.0, mv_hi=10.0,
                  pref=rng.normal(size=2))
        a2, b2, c2, path2 = three_ways(tgt, z2)
        assert path2 == "closed_form"
        np.testing.assert_allclose(a2.values["xs"], [0.0, t[1] / gain], atol=1e-12)
        np.testing.assert_allclose(a2.values["us"], [t[1] / gain] * 2, atol=1e-12)
        assert gap(a2, b2, tgt) <= 1e-6 and gap(a2, c2, tgt) <= CLARABEL_GAP


def test_zone_edge_active_is_left_to_the_general_path():
    # One lag CV y = 2 u0 + u1 (steady gains), both MVs preferred at 0 with equal weights, CV in
    # the zone [1, 2]: the preferred point y = 0 is outside, the answer is the projection onto the
    # edge y = 1: u = [2, 1] / 5 (Lagrange, by hand).
    A, B, C = np.array([[0.5]]), np.array([[1.0, 0.5]]), np.array([[1.0]])
    tgt = matrix_target(A, B, C, [1.0, 1.0])
    z = zvec(tgt, band_lo=[1.0], band_hi=[2.0], mv_lo=-10.0, mv_hi=10.0, pref=[0.0, 0.0])
    a, b, c, path = three_ways(tgt, z)
    assert path == "daqp"
    np.testing.assert_allclose(a.values["us"], [0.4, 0.2], atol=1e-9)
    # the next sample keeps that active row: the zone [1.5, 2] gives u = 1.5 [2, 1] / 5 by the
    # re-used active set (its multiplier has the right sign)
    z1 = zvec(tgt, band_lo=[1.5], band_hi=[2.0], mv_lo=-10.0, mv_hi=10.0, pref=[0.0, 0.0])
    a1, b1, c1, path1 = three_ways(tgt, z1)
    assert path1 == "active_set"
    np.testing.assert_allclose(a1.values["us"], [0.6, 0.3], atol=1e-12)
    assert gap(a1, b1, tgt) <= 1e-9 and gap(a1, c1, tgt) <= CLARABEL_GAP
    # a zone around the preferred point: the old active row would pull y up to -1 against its
    # multiplier's sign, so it is refused, and nothing active: the common closed form
    z2 = zvec(tgt, band_lo=[-1.0], band_hi=[2.0], mv_lo=-10.0, mv_hi=10.0, pref=[0.0, 0.0])
    a2, b2, c2, path2 = three_ways(tgt, z2)
    assert path2 == "closed_form"
    np.testing.assert_allclose(a2.values["us"], [0.0, 0.0], atol=1e-12)
    # (the same with the zone's far edge active instead: refused, the DAQP stages decide)
    three_ways(tgt, z)
    z3 = zvec(tgt, band_lo=[-2.0], band_hi=[-1.0], mv_lo=-10.0, mv_hi=10.0, pref=[0.0, 0.0])
    a3, b3, c3, path3 = three_ways(tgt, z3)
    assert path3 == "daqp"
    np.testing.assert_allclose(a3.values["us"], [-0.4, -0.2], atol=1e-9)


def test_limits_without_weight_and_odd_inputs_go_the_general_way():
    # Finite CV limits with zero limit weights leave stage 1's optimum not unique: the closed form
    # is not taken.  Nor for NaN bounds (absent, but not checked cheaply), an infinite
    # "setpoint", or NaN inputs.  (Common practice, no source: a shortcut only where it is exact.)
    A, B, C = np.array([[0.5]]), np.array([[1.0, 0.5]]), np.array([[1.0]])
    tgt = matrix_target(A, B, C, [1.0, 1.0], limit_weights=False)
    z = zvec(tgt, band_lo=[1.0], band_hi=[1.0], lim_lo=[-5.0], lim_hi=[5.0], mv_lo=-10.0,
             mv_hi=10.0, pref=[0.0, 0.0])
    tgt.solve(z)
    assert tgt.last_path == "daqp"
    tgt = matrix_target(A, B, C, [1.0, 1.0])
    for z in (zvec(tgt, band_lo=[1.0], band_hi=[1.0], mv_lo=[np.nan, -10.0], mv_hi=10.0),
              zvec(tgt, band_lo=[INF], band_hi=[INF], mv_lo=-10.0, mv_hi=10.0),
              zvec(tgt, band_lo=[1.0], band_hi=[1.0], mv_lo=-10.0, mv_hi=10.0,
                   pref=[np.nan, 0.0])):
        tgt.solve(z)
        assert tgt.last_path not in ("closed_form", "active_set")
    z = zvec(tgt, band_lo=[1.0], band_hi=[1.0], lim_lo=[-5.0], lim_hi=[5.0], mv_lo=-10.0,
             mv_hi=10.0, pref=[0.0, 0.0])
    tgt.restart()                  # (forgets the last DAQP solve's active rows)
    tgt.solve(z)
    assert tgt.last_path == "closed_form"


def test_tank_closed_loop_same_with_and_without_the_closed_form():
    # The controller's whole closed loop (100 samples of setpoint steps against its own model)
    # is the same, to round-off, whichever way the target is computed; the recorded target
    # iterations say 0 where the closed form was taken.  (Reference: the general DAQP path, which
    # the tests above hold against Clarabel.)
    tgt, dm = tank_target()
    runs = []
    for closed in (True, False):
        ctrl = mp.PredictiveController.from_settings(dm, TANK_SETTINGS).build()
        ctrl.target_.closed_form = closed
        ctrl.reset(dm.op)
        x = np.zeros(dm.nx)
        us, its = [], []
        for k in range(100):
            sp = dm.op.y + np.array([0.05 if k >= 10 else 0.0, 0.3 if k >= 40 else 0.0,
                                     -2.0 if k >= 70 else 0.0])
            tg = mp.Targets(setpoint=sp, cv_low=np.full(3, -INF), cv_high=np.full(3, INF),
                            mv_low=np.zeros(3), mv_high=np.array([0.2, 3.0, 600.0]))
            out = ctrl.step(k * dm.Ts, mp.Measurement.now(dm.C @ x + dm.op.y, k * dm.Ts),
                            dm.op.d, tg)
            u = np.asarray(out.u, float)
            us.append(u)
            its.append(out.diagnostics["target_iterations"])
            x = dm.A @ x + dm.B @ (u - dm.op.u)
        runs.append((np.array(us), its))
    (u1, it1), (u2, it2) = runs
    scale = np.array([0.01, 0.1, 20.0])
    assert np.max(np.abs(u1 - u2) / scale) <= 1e-8
    assert sum(i == 0 for i in it1) >= 90          # nearly every sample in closed form
    assert all(i > 0 for i in it2)


def test_disturbance_without_a_steady_state_is_not_taken():
    # A state that integrates a DV and that no MV reaches (A = 1, B = 0 in its row): a nonzero DV
    # has no steady state at all (the row reads 0 = d; linear algebra), so the target refuses it,
    # and with such a model the closed form is never tried (the range check is the DAQP path's).
    A = np.diag([1.0, 0.5])
    B = np.array([[0.0], [0.5]])
    C = np.array([[0.0, 1.0]])
    Bd = np.array([[1.0], [0.0]])
    tgt = mp.SteadyTarget(A, B, C, np.zeros((1, 1)), Bd, np.zeros((1, 1)), np.zeros((2, 0)),
                          np.zeros((1, 0)), band_weight=[1.0], limit_linear=[100.0],
                          limit_quadratic=[10.0], preferred_weight=[1.0]).build()
    ok = tgt.solve(zvec(tgt, d=[0.0], band_lo=[0.3], band_hi=[0.3], mv_lo=-5.0, mv_hi=5.0))
    assert tgt.last_path == "daqp" and ok.accepted
    np.testing.assert_allclose(ok.values["us"], [0.3], atol=1e-10)    # gain 0.5 / (1 - 0.5) = 1
    bad = tgt.solve(zvec(tgt, d=[0.1], band_lo=[0.3], band_hi=[0.3], mv_lo=-5.0, mv_hi=5.0))
    assert tgt.last_path == "out_of_range" and not bad.accepted
