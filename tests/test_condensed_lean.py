"""The condensed QP's per-sample data and plan against a plain construction of the same QP.

References:

* the **model's own recursion**: the free response and the forced response G are obtained by
  stepping the discrete state-space model sample by sample in a plain loop
  (``x+ = A x + B u + Bd d + Bw w``, ``y = C x + D u + Dd d + Cw w``; G column by column from unit
  moves), not from the Markov-parameter sums of :meth:`CondensedQP.build`; the QP is then written
  out term by term from the controller's statement (``mpcproto/control/dynamic_qp.py``: setpoint
  least squares, move suppression, preferred MVs, soft zone and limit rows with DAQP's per-row
  weights, hard MV bounds, rate rows) and solved by **DAQP's own API** (``daqp.Model``, primal
  tolerance 1e-12);
* the **cvxpy statement** of the same MPC (state variables, band errors, slacks) solved by DAQP
  through cvxpy and by Clarabel at 1e-12 (``check_against_statement`` of test_condensed.py).

On the blending tank (3 MVs with limits and rates, 3 CVs, 3 DVs with a forecast) with setpoint
preview: setpoints, a zone whose ends are its limits, a zone of its own, a one-sided limit, an MV
without a rate, crossed run-time limits.
"""

from __future__ import annotations

import numpy as np
import pytest

import mpcproto as mp

from test_condensed import check_against_statement

N, M = 20, 4
BIG = 1e30          # DAQP's infinity (bounds are clipped to it)
RHO_LINEAR = 1e8    # the controller's reciprocal quadratic weight of a linear-only soft row


@pytest.fixture(scope="module")
def tank():
    model = mp.make_model("blending_tank")
    dm = mp.linearize(model, mp.steady_state(model)).discretize(10.0)
    ctrl = mp.PredictiveController.from_settings(dm, {
        "horizon": N, "control_horizon": M, "setpoint_preview": True,
        "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5, "limit_penalty_quadratic": 40.0},
               "concentration": {"scale": 0.2, "low": 0.0, "high": 50.0},
               "temperature": {"scale": 1.0, "weight": 2.0}},
        "mv": {"caustic_flow": {"scale": 0.01, "low": 0.0, "high": 0.2, "max_move": 0.005},
               "water_flow": {"scale": 0.1, "low": 0.0, "high": 3.0, "max_move": 0.1},
               "heater_duty": {"scale": 20.0, "low": 0.0, "high": 600.0, "max_move": 20.0,
                               "preferred_weight": 0.01}},
    }).build()
    assert ctrl.condensed_ is not None
    return dm, ctrl


def plain_outputs(ctrl, z, U):
    """Scaled CVs (ny, N) at samples 1..N for the scaled plan U (nu, M): the model stepped in a
    plain loop (the held MV after the control horizon; DVs = value now + forecast departure)."""
    m, zs = ctrl.dmodel, ctrl._zsl
    A, B, C, D, Bd, Dd = (np.asarray(a, float) for a in (m.A, m.B, m.C, m.D, m.Bd, m.Dd))
    su, sy = ctrl._su, ctrl._sy
    x, w, d_now = z[zs["x0"]].copy(), z[zs["w"]], z[zs["d_now"]]
    dtraj = z[zs["dtraj"]].reshape(N + 1, m.nd)          # sample after sample
    Y = np.empty((m.ny, N))
    for k in range(N):
        x = A @ x + B @ (su * U[:, min(k, M - 1)]) + Bd @ (d_now + dtraj[k]) + ctrl._Bw @ w
        y = (C @ x + D @ (su * U[:, min(k + 1, M - 1)]) + Dd @ (d_now + dtraj[k + 1])
             + ctrl._Cw @ w)
        Y[:, k] = y / sy
    return Y


def plain_qp(ctrl, z):
    """The condensed QP for input vector *z* written out term by term (module docstring)."""
    m, zs = ctrl.dmodel, ctrl._zsl
    nu, ny = m.nu, m.ny
    n = nu * M
    su, sy = ctrl._su, ctrl._sy
    w_ = ctrl.scaled_
    q, r, wp = w_["cv_weight"], w_["move_weight"], w_["preferred_weight"]
    l_, h_ = w_["limit_linear"], w_["limit_quadratic"]
    Y0 = plain_outputs(ctrl, z, np.zeros((nu, M)))
    G = np.empty((ny, N, n))                  # G[i, k, :]: CV i at sample k+1
    for j in range(n):
        E = np.zeros(n)
        E[j] = 1.0
        G[:, :, j] = plain_outputs(ctrl, z, E.reshape(nu, M, order="F")) - Y0
    blo, bhi = z[zs["band_lo"]] / sy, z[zs["band_hi"]] / sy
    llo, lhi = z[zs["lim_lo"]] / sy, z[zs["lim_hi"]] / sy
    ref = z[zs["ref"]].reshape(N, ny).T / sy[:, None]        # (ny, N) band departures
    rate = z[zs["rate"]] / su
    up = z[zs["u_prev"]] / su
    pref = z[zs["pref"]] / su
    fin = np.isfinite
    eq = (q > 0) & fin(blo) & fin(bhi) & (blo == bhi)
    zone = (q > 0) & ~eq & (fin(blo) | fin(bhi))
    lim = ((l_ > 0) | (h_ > 0)) & (fin(llo) | fin(lhi))
    merged = zone & lim & (blo == llo) & (bhi == lhi) & ~np.any(ref != 0, axis=1)
    zone &= ~merged
    # moves dU = Dm U - (u_prev, 0, ...); preferred MVs: each planned move counted per sample held
    Dm = np.eye(n) - np.eye(n, k=-nu)
    held = np.array([sum(min(k, M - 1) == j for k in range(N)) for j in range(M)], float)
    ws = np.kron(held, wp)
    wr = np.tile(r, M)
    e0 = np.concatenate([up, np.zeros(n - nu)])
    H = 2.0 * (Dm.T @ (wr[:, None] * Dm) + np.diag(ws))
    f = -2.0 * Dm.T @ (wr * e0) - 2.0 * ws * np.tile(pref, M)
    for i in np.flatnonzero(eq):
        H += 2.0 * q[i] * G[i].T @ G[i]
        f += 2.0 * q[i] * G[i].T @ (Y0[i] - blo[i] - ref[i])
    rows, lo, hi, rho, wl = [], [], [], [], []
    for i in np.flatnonzero(zone):            # zone rows: quadratic weight q, no linear weight
        rows.append(G[i])
        lo.append(blo[i] + ref[i] - Y0[i])
        hi.append(bhi[i] + ref[i] - Y0[i])
        rho.append(np.full(N, 1.0 / (2.0 * q[i])))
        wl.append(np.zeros(N))
    for i in np.flatnonzero(lim):             # limit rows: l s + h s^2 (+ q s^2 when merged)
        a, b, lin = llo[i], lhi[i], l_[i]
        if a > b:       # crossed: one slack for both sides = the mid-point, weight raised
            lin = lin + h_[i] * (a - b)
            a = b = 0.5 * (a + b)
        hq = h_[i] + (q[i] if merged[i] else 0.0)
        rows.append(G[i])
        lo.append(a - Y0[i])
        hi.append(b - Y0[i])
        rho.append(np.full(N, 1.0 / (2.0 * hq) if hq > 0 else RHO_LINEAR))
        wl.append(np.full(N, lin))
    n_soft = N * len(rows)
    for j in np.flatnonzero(fin(rate)):       # rate rows: |u_k - u_(k-1)| <= rate
        for k in range(M):
            rows.append(Dm[k * nu + j][None, :])
            first = up[j] if k == 0 else 0.0
            lo.append(np.array([first - rate[j]]))
            hi.append(np.array([first + rate[j]]))
    Arows = np.vstack(rows) if rows else np.zeros((0, n))
    mA = Arows.shape[0]
    bl = np.clip(np.concatenate([z[zs["u_lo"]] / np.tile(su, M)] + lo), -BIG, BIG)
    bu = np.clip(np.concatenate([z[zs["u_hi"]] / np.tile(su, M)] + hi), -BIG, BIG)
    sense = np.zeros(n + mA, dtype=np.int32)
    sense[n:n + n_soft] = 8                   # DAQP's soft-row flag
    rho_all = np.full(n + mA, RHO_LINEAR)
    wl_all = np.zeros(n + mA)
    if n_soft:
        rho_all[n:n + n_soft] = np.concatenate(rho)
        wl_all[n:n + n_soft] = np.concatenate(wl)
    return H, f, Arows, bu, bl, sense, rho_all, wl_all


def daqp_plan(H, f, A, bu, bl, sense, rho, wl):
    """The plain QP solved by DAQP's own API (tight primal tolerance)."""
    import daqp

    mdl = daqp.Model()
    mdl.setup(H, f, A, bu, bl, sense)
    mdl.settings = {"primal_tol": 1e-12, "iter_limit": 10000}
    mdl.soft_weights(rho_l=rho, rho_u=rho, w_l=wl, w_u=wl)
    x, _fval, flag, _info = mdl.solve()
    assert flag in (1, 2), flag
    return np.asarray(x)


def check_sample(ctrl, z, *, soft_rows_expected):
    cq = ctrl.condensed_
    H, f, A, bu, bl, sense, weights, _st, _key = cq.data(z)
    Hp, fp, Ap, bup, blp, sensep, rhop, wlp = plain_qp(ctrl, z)
    assert A.shape == Ap.shape and int((sense == 8).sum()) == soft_rows_expected
    scale = np.abs(Hp).max()
    np.testing.assert_allclose(H, Hp, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(f, fp, rtol=0, atol=1e-10 * max(1.0, np.abs(fp).max()))
    np.testing.assert_allclose(A, Ap, rtol=0, atol=1e-12 * max(1.0, np.abs(Ap).max()))
    np.testing.assert_allclose(bu, bup, rtol=1e-12, atol=1e-10)
    np.testing.assert_allclose(bl, blp, rtol=1e-12, atol=1e-10)
    np.testing.assert_array_equal(sense, sensep)
    np.testing.assert_allclose(weights[0], rhop, rtol=1e-14)
    np.testing.assert_allclose(weights[1], rhop, rtol=1e-14)
    np.testing.assert_allclose(weights[2], wlp, rtol=1e-14)
    np.testing.assert_allclose(weights[3], wlp, rtol=1e-14)
    # the plan: the controller's solve against DAQP on the plain QP (both exact active-set
    # solves; 1e-8 of the MV scale), and the slacks read back against the plain prediction
    res = cq.solve(z)
    assert res.accepted, res.status
    U = daqp_plan(Hp, fp, Ap, bup, blp, sensep, rhop, wlp).reshape(ctrl.dmodel.nu, M, order="F")
    np.testing.assert_allclose(res.values["u"], U, rtol=0, atol=1e-8)
    Y = plain_outputs(ctrl, z, res.values["u"])
    zs, sy = ctrl._zsl, ctrl._sy
    llo, lhi = (z[zs["lim_lo"]] / sy)[:, None], (z[zs["lim_hi"]] / sy)[:, None]
    with np.errstate(invalid="ignore"):
        s = np.fmax(np.fmax(llo - Y, Y - lhi), 0.0)
    lim = ctrl.scaled_["limit_linear"] > 0
    np.testing.assert_allclose(res.values["slack"][lim], s[lim], rtol=0, atol=1e-8)
    return res


def test_lean_data_equals_plain_construction_on_the_tank(tank):
    dm, ctrl = tank
    rng = np.random.default_rng(5)
    ctrl.reset(dm.op)
    x = rng.normal(scale=0.02, size=dm.nx)
    sp = dm.op.y + np.array([np.nan, 0.5, -1.0])          # level: zone between its limits
    prog = np.tile(sp, (N + 1, 1))
    prog[6:, 1] += 0.3                                    # a step seen ahead
    prog[:, 2] += np.linspace(0.0, 2.0, N + 1)            # a ramp
    tg = mp.Targets(setpoint=sp, cv_low=np.full(3, -np.inf), cv_high=np.full(3, np.inf),
                    mv_low=np.full(3, -np.inf), mv_high=np.full(3, np.inf))
    fc = dm.op.d + np.array([[0.0, 0.0, 0.0], [0.05, 0.0, 0.0], [0.1, 0.01, -0.5]])
    out = ctrl.plan(x, tg, disturbance=rng.normal(scale=0.01, size=3), dv=dm.op.d + 0.02,
                    dv_forecast=fc, u_prev=dm.op.u * 1.05, setpoint_program=prog)
    assert out["accepted"]
    z = ctrl._last_inputs.copy()
    zs = ctrl._zsl
    assert np.any(z[zs["dtraj"]] != 0) and np.any(z[zs["ref"]] != 0)
    # the level's zone is its limits: one row set (merged); the concentration's limits
    check_sample(ctrl, z, soft_rows_expected=2 * N)
    u_s = (out["u_plan"][:, :M] - ctrl._op_u[:, None]) / ctrl._su[:, None]
    check_against_statement(ctrl, z, u_s)
    # a zone of its own on the temperature with a moving band, a one-sided level limit, a
    # concentration limit, no rate on the heater
    z2 = z.copy()
    z2[zs["band_lo"].start + 2] -= 0.5
    z2[zs["band_hi"].start + 2] += 1.5
    z2[zs["lim_hi"].start + 0] = np.inf
    z2[zs["ref"]] += 0.05 * rng.standard_normal(N * dm.ny)
    z2[zs["rate"].start + 2] = np.inf
    res = check_sample(ctrl, z2, soft_rows_expected=4 * N)   # level: zone moves, own rows
    check_against_statement(ctrl, z2, res.values["u"])
    # crossed run-time limits on the level (lo > hi): the mid-point row, the raised weight
    z3 = z.copy()
    lo0 = z3[zs["lim_lo"].start]
    z3[zs["lim_hi"].start] = lo0 - 0.05
    z3[zs["band_lo"].start] = z3[zs["band_hi"].start] = np.nan   # no zone: the limits alone
    res = check_sample(ctrl, z3, soft_rows_expected=2 * N)
    assert res.values["slack"][0].min() >= 0.5 * 0.05 / ctrl._sy[0] - 1e-9
    # soft rows on the level alone: its moving zone and its limit (one free response for
    # both), then with the limits crossed
    z4 = z2.copy()
    z4[zs["lim_lo"].start + 1], z4[zs["lim_hi"].start + 1] = -np.inf, np.inf
    z4[zs["band_lo"].start + 2] = z4[zs["band_hi"].start + 2]
    check_sample(ctrl, z4, soft_rows_expected=2 * N)
    z5 = z4.copy()
    z5[zs["lim_hi"].start] = z5[zs["lim_lo"].start] - 0.05
    check_sample(ctrl, z5, soft_rows_expected=2 * N)
    # the same samples again (warm-started workspaces, cached structures): the same QP data
    for zz, rows in ((z, 2 * N), (z2, 4 * N), (z3, 2 * N), (z5, 2 * N), (z4, 2 * N), (z, 2 * N)):
        check_sample(ctrl, zz, soft_rows_expected=rows)


def test_lean_data_one_soft_group_and_moving_mv_limits(tank):
    """One CV with soft rows (a limit alone, a zone alone, a zone that is its limits, crossed
    limits) -- the structures whose ends are read as a view of the scaled bands -- and MV limits
    that change between samples of one structure (its bounds are rewritten only then): every
    sample's QP data and plan against the plain construction solved by DAQP's own API
    (references in the module docstring); a result kept by the caller does not change when
    later samples are solved."""
    dm, ctrl = tank
    rng = np.random.default_rng(11)
    ctrl.reset(dm.op)
    x = rng.normal(scale=0.02, size=dm.nx)
    sp = dm.op.y + np.array([0.05, 0.5, -1.0])
    tg = mp.Targets(setpoint=sp, cv_low=np.full(3, -np.inf), cv_high=np.full(3, np.inf),
                    mv_low=np.full(3, -np.inf), mv_high=np.full(3, np.inf))
    out = ctrl.plan(x, tg, disturbance=rng.normal(scale=0.01, size=3), dv=dm.op.d + 0.02,
                    u_prev=dm.op.u * 1.05)
    assert out["accepted"]
    z = ctrl._last_inputs.copy()
    zs = ctrl._zsl
    inf = np.inf
    # the level's limits alone (its band a setpoint; no concentration limits): one group
    z1 = z.copy()
    z1[zs["lim_lo"].start + 1], z1[zs["lim_hi"].start + 1] = -inf, inf
    check_sample(ctrl, z1, soft_rows_expected=N)
    # crossed on that one group: the mid-point row; the slacks are the crossing's floor at least
    z2 = z1.copy()
    z2[zs["lim_hi"].start] = z2[zs["lim_lo"].start] - 0.05
    kept = check_sample(ctrl, z2, soft_rows_expected=N)
    kept_slack = kept.values["slack"].copy()
    assert kept_slack[0].min() >= 0.5 * 0.05 / ctrl._sy[0] - 1e-9
    # a zone alone on the temperature (no CV limits at all): one zone group
    z3 = z1.copy()
    z3[zs["lim_lo"].start], z3[zs["lim_hi"].start] = -inf, inf
    z3[zs["band_lo"].start + 2] -= 0.5
    z3[zs["band_hi"].start + 2] += 1.5
    res3 = check_sample(ctrl, z3, soft_rows_expected=N)
    assert not res3.values["slack"].any()               # no limit rows: no slack
    # the level's zone is its limits (one merged group)
    z4 = z1.copy()
    z4[zs["band_lo"].start] = z4[zs["lim_lo"].start]
    z4[zs["band_hi"].start] = z4[zs["lim_hi"].start]
    check_sample(ctrl, z4, soft_rows_expected=N)
    # MV limits tightened, then a one-sided one, then back: the same structure each time
    z5 = z1.copy()
    z5[zs["u_lo"]] += 0.2 * np.abs(z5[zs["u_lo"]]) + 0.001
    z6 = z5.copy()
    z6[zs["u_hi"]][1::dm.nu] = inf                        # the water flow: no upper limit
    for zz in (z5, z6, z1, z5):
        check_sample(ctrl, zz, soft_rows_expected=N)
    # the result kept from the crossed sample: unchanged by the solves after it
    np.testing.assert_array_equal(kept.values["slack"], kept_slack)
