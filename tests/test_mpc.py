"""Predictive controller: LQR equivalence, limits, slack, offset-free control, feedforward, DPP.

Every closed loop here runs the controller against a discrete linear plant built directly from
matrices (the controller's model, or one with other gains for the mismatch cases).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.linalg as sla
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import mpcproto as mp
from mpcproto.control.base import STATUS_FALLBACK, STATUS_HOLD, STATUS_OK


def make_dlm(A, B, C, Bd=None, D=None, Dd=None, Ts=1.0, u0=None, y0=None, d0=None):
    """A DiscreteLinearModel straight from matrices (operating point at u0, y0, d0)."""
    A, B, C = (np.atleast_2d(np.asarray(M, float)) for M in (A, B, C))
    nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
    Bd = np.zeros((nx, 0)) if Bd is None else np.asarray(Bd, float).reshape(nx, -1)
    nd = Bd.shape[1]
    op = mp.OperatingPoint(
        model="matrices", x=np.zeros(nx),
        u=np.zeros(nu) if u0 is None else np.asarray(u0, float),
        d=np.zeros(nd) if d0 is None else np.asarray(d0, float),
        y=np.zeros(ny) if y0 is None else np.asarray(y0, float), p=np.zeros(0),
        state_names=tuple(f"x{i}" for i in range(nx)), mv_names=tuple(f"u{i}" for i in range(nu)),
        dv_names=tuple(f"d{i}" for i in range(nd)), cv_names=tuple(f"y{i}" for i in range(ny)))
    return mp.DiscreteLinearModel(
        A=A, B=B, Bd=Bd, C=C, D=np.zeros((ny, nu)) if D is None else np.asarray(D, float),
        Dd=np.zeros((ny, nd)) if Dd is None else np.asarray(Dd, float), Ts=Ts, op=op,
        state_names=op.state_names, n_plant_states=nx)


def random_stable(rng, nx, nu, ny, nd=0):
    """Random stable system: eigenvalues inside 0.3..0.95 after a random similarity transform."""
    T = rng.standard_normal((nx, nx)) + 3 * np.eye(nx)
    A = T @ np.diag(rng.uniform(0.3, 0.95, nx)) @ np.linalg.inv(T)
    B = rng.standard_normal((nx, nu))
    C = rng.standard_normal((ny, nx))
    Bd = rng.standard_normal((nx, nd)) if nd else None
    return A, B, C, Bd


def free_targets(ny, nu, sp=None):
    return mp.Targets(setpoint=np.zeros(ny) if sp is None else np.asarray(sp, float),
                      cv_low=np.full(ny, -np.inf), cv_high=np.full(ny, np.inf),
                      mv_low=np.full(nu, -np.inf), mv_high=np.full(nu, np.inf))


TIGHT = {"eps_abs": 1e-10, "eps_rel": 1e-10, "max_iter": 200000, "polishing": True}


def run_loop(ctrl, dm_plant, n, targets, d_plant=None, dv_meas=None, x0=None):
    """Closed loop against a linear plant; returns (Y, U, outputs)."""
    nx = dm_plant.nx
    x = np.zeros(nx) if x0 is None else x0.copy()
    Y, U, outs = [], [], []
    ctrl.reset(dm_plant.op)
    for k in range(n):
        t = k * dm_plant.Ts
        d = np.zeros(dm_plant.nd) if d_plant is None else d_plant(k)
        y = dm_plant.C @ x + dm_plant.Dd @ d + dm_plant.op.y
        dv = np.full(dm_plant.nd, np.nan) if dv_meas is None else dv_meas(k)
        out = ctrl.step(t, mp.Measurement.now(y, t), dv, targets)
        u = out.u - dm_plant.op.u
        x = dm_plant.A @ x + dm_plant.B @ u + dm_plant.Bd @ d
        Y.append(y)
        U.append(out.u)
        outs.append(out)
    return np.array(Y), np.array(U), outs


# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("N", [1, 3, 10, 40])
def test_unconstrained_with_riccati_terminal_weight_is_lqr(N):
    # Reference: standard linear-quadratic control theory -- with the terminal weight P from the
    # discrete algebraic Riccati equation, the finite-horizon optimum of
    # sum x'Qx + u'Ru + x_N'P x_N is the infinite-horizon LQR law u = -K x for every horizon,
    # K = (R + B'PB)^-1 B'PA with P from scipy.linalg.solve_discrete_are.
    rng = np.random.default_rng(7)
    A, B, _, _ = random_stable(rng, 3, 2, 3)
    C = np.eye(3)
    dm = make_dlm(A, B, C)
    qw = np.array([1.0, 2.0, 0.5])
    rw = np.array([0.3, 0.7])
    ctrl = mp.PredictiveController(
        dm, horizon=N, terminal_cost=True, steady_target=True, solver="osqp", solver_options=TIGHT,
        cv={f"y{i}": {"weight": float(qw[i])} for i in range(3)},
        mv={f"u{j}": {"preferred_weight": float(rw[j]), "move_weight": 0.0} for j in range(2)}).build()
    P = sla.solve_discrete_are(A, B, np.diag(qw), np.diag(rw))
    K = np.linalg.solve(np.diag(rw) + B.T @ P @ B, B.T @ P @ A)
    for _ in range(3):
        x = rng.standard_normal(3)
        res = ctrl.plan(x, free_targets(3, 2))
        assert res["accepted"]
        np.testing.assert_allclose(res["u"], -K @ x, rtol=1e-5, atol=1e-6)


def test_lqr_equivalence_through_clarabel_plain_path():
    # Reference: as above (LQR via scipy.linalg.solve_discrete_are), solved by Clarabel through
    # cvxpy's own Problem.solve.
    rng = np.random.default_rng(3)
    A, B, _, _ = random_stable(rng, 2, 1, 2)
    dm = make_dlm(A, B, np.eye(2))
    ctrl = mp.PredictiveController(
        dm, horizon=6, terminal_cost=True, solver="clarabel",
        mv={"u0": {"preferred_weight": 0.5, "move_weight": 0.0}}).build()
    P = sla.solve_discrete_are(A, B, np.eye(2), 0.5 * np.eye(1))
    K = np.linalg.solve(0.5 + B.T @ P @ B, B.T @ P @ A)
    x = np.array([0.7, -1.1])
    res = ctrl.plan(x, free_targets(2, 1))
    np.testing.assert_allclose(res["u"], -K @ x, rtol=1e-5, atol=1e-7)


def test_fast_path_equals_cvxpy_solve_on_random_steps():
    # Reference: cvxpy's own Problem.solve (Clarabel interior point) on the same compiled
    # problem; the fast path reads cvxpy's parameter->data map and drives OSQP directly.
    rng = np.random.default_rng(11)
    A, B, C, Bd = random_stable(rng, 4, 2, 3, nd=1)
    dm = make_dlm(A, B, C, Bd=Bd)
    kw = dict(horizon=12, control_horizon=5,
              cv={"y0": {"weight": 2.0, "high": 0.8}, "y1": {"low": -0.5, "priority": 2},
                  "y2": {"disturbance": "input"}},
              mv={"u0": {"low": -1.0, "high": 1.0, "max_move": 0.3, "preferred_weight": 0.1},
                  "u1": {"low": -2.0, "high": 0.5}})
    fast = mp.PredictiveController(
        dm, solver="osqp", solver_options={"eps_abs": 1e-6, "eps_rel": 1e-6, "polishing": True,
                            "polish_refine_iter": 10}, **kw).build()
    plain = mp.PredictiveController(
        dm, solver="clarabel", solver_options={"tol_gap_abs": 1e-11, "tol_gap_rel": 1e-11,
                                               "tol_feas": 1e-11}, **kw).build()
    for _ in range(6):
        x = 0.5 * rng.standard_normal(4)
        tg = mp.Targets(setpoint=np.array([rng.normal(), np.nan, rng.normal()]),
                        cv_low=np.array([-np.inf, rng.uniform(-2, 0), -np.inf]),
                        cv_high=np.array([np.inf, np.inf, rng.uniform(0, 2)]),
                        mv_low=np.array([-1.0, -np.inf]), mv_high=np.array([np.inf, 0.5]))
        kwp = dict(disturbance=rng.normal(size=3) * 0.1, dv=rng.normal(size=1),
                   u_prev=rng.uniform(-0.5, 0.5, 2))
        a = fast.plan(x, tg, **kwp)
        b = plain.plan(x, tg, **kwp)
        assert a["accepted"] and b["accepted"], (a["status"], b["status"])
        np.testing.assert_allclose(a["u_plan"], b["u_plan"], atol=1e-6)
        np.testing.assert_allclose(a["y_pred"], b["y_pred"], atol=1e-6)
        np.testing.assert_allclose(a["objective"], b["objective"], rtol=1e-5, atol=1e-6)
        # the composed input map gives the same solver data as cvxpy's parameter map itself
        z = fast._last_inputs
        for got, want in zip(fast.qp_.data_inputs(z), fast.qp_.data(fast.qp_.values_from_inputs(z))):
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


# ----------------------------------------------------------------------------------------------
@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), nx=st.integers(1, 4), nu=st.integers(1, 3),
       ny=st.integers(1, 3))
def test_applied_mvs_respect_hard_and_rate_limits(seed, nx, nu, ny):
    # Reference: the definition of hard limits (common practice, no source) -- every applied MV
    # within [low, high] and every move within the rate limit, whatever the setpoints ask.
    rng = np.random.default_rng(seed)
    A, B, C, _ = random_stable(rng, nx, nu, ny)
    dm = make_dlm(A, B, C)
    lo = -rng.uniform(0.1, 1.0, nu)
    hi = rng.uniform(0.1, 1.0, nu)
    rate = rng.uniform(0.02, 0.5, nu)
    ctrl = mp.PredictiveController(dm, horizon=8, control_horizon=3).build()
    tg = mp.Targets(setpoint=rng.normal(scale=3.0, size=ny), cv_low=np.full(ny, -np.inf),
                    cv_high=np.full(ny, np.inf), mv_low=lo, mv_high=hi, mv_rate=rate)
    _, U, outs = run_loop(ctrl, dm, 15, tg)
    U = np.vstack([np.zeros(nu), U])
    assert np.all(U[1:] >= lo - 1e-12) and np.all(U[1:] <= hi + 1e-12)
    assert np.all(np.abs(np.diff(U, axis=0)) <= rate + 1e-12)
    assert all(o.status in (STATUS_OK, STATUS_FALLBACK, STATUS_HOLD) for o in outs)


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1))
def test_conflicting_cv_limits_solve_with_slack_and_flag(seed):
    # Reference: exact penalty functions for soft constraints (Scokaert & Rawlings 1999, from
    # memory): with slack variables a solution always exists; the conflict shows as slack.
    rng = np.random.default_rng(seed)
    A, B, C, _ = random_stable(rng, 3, 2, 2)
    C = np.vstack([C[0], C[0]])                 # two CVs that are the same signal
    dm = make_dlm(A, B, C)
    ctrl = mp.PredictiveController(dm, horizon=10).build()
    tg = mp.Targets(setpoint=np.full(2, np.nan), cv_low=np.array([1.0, -np.inf]),
                    cv_high=np.array([np.inf, -1.0]),   # y0 >= 1 and y1 <= -1 with y0 == y1
                    mv_low=np.full(2, -5.0), mv_high=np.full(2, 5.0))
    _, _, outs = run_loop(ctrl, dm, 6, tg)
    last = outs[-1]
    assert last.status == STATUS_OK
    assert last.diagnostics["cv_limits_relaxed"] is True
    assert last.diagnostics["slack_max"] > 0.5        # at least half of the 2-unit conflict
    assert set(last.diagnostics["relaxed_cvs"]) <= {"y0", "y1"}


def test_soft_limits_with_priority_keep_the_important_cv():
    # Reference: weighted exact penalty -- the CV with the larger penalty gives way less
    # (common practice, no source).
    A = np.diag([0.8, 0.8])
    B = np.array([[1.0], [1.0]])
    C = np.eye(2)
    dm = make_dlm(A, B, C)
    ctrl = mp.PredictiveController(dm, horizon=15, cv={"y0": {"priority": 1},
                                                       "y1": {"priority": 2}}).build()
    # one MV moves both CVs equally; y0 must stay >= 1, y1 <= -1: impossible together
    tg = mp.Targets(setpoint=np.full(2, np.nan), cv_low=np.array([1.0, -np.inf]),
                    cv_high=np.array([np.inf, -1.0]), mv_low=[-10.0], mv_high=[10.0])
    Y, _, outs = run_loop(ctrl, dm, 40, tg)
    assert Y[-1, 0] > 0.9                          # the priority-1 CV holds its limit
    assert outs[-1].diagnostics["relaxed_cvs"] == ["y1"]


# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("model", ["output", "input"])
def test_offset_free_with_gain_mismatch_and_unmeasured_disturbance(model):
    # Reference: offset-free MPC with disturbance augmentation (Muske & Badgwell 2002;
    # Pannocchia & Rawlings 2003): with as many integrating disturbances as CVs, a stable closed
    # loop has zero steady-state offset despite model error and unmeasured step disturbances.
    rng = np.random.default_rng(5)
    A, B, C, _ = random_stable(rng, 3, 2, 2)
    Bd = rng.standard_normal((3, 1))
    dm = make_dlm(A, B, C, Bd=Bd)
    plant = make_dlm(A, 1.2 * B, C, Bd=Bd)           # 20 % larger gains than the model
    ctrl = mp.PredictiveController(
        dm, horizon=20, control_horizon=6,
        cv={n: {"disturbance": model} for n in ("y0", "y1")}).build()
    sp = np.array([0.5, -0.3])
    tg = mp.Targets(setpoint=sp, cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=np.full(2, -50.0), mv_high=np.full(2, 50.0))
    d = lambda k: np.array([0.4 if k >= 40 else 0.0])    # noqa: E731 - unmeasured step
    Y, _, outs = run_loop(ctrl, plant, 300, tg, d_plant=d)
    np.testing.assert_allclose(Y[-1], sp, atol=1e-4)
    assert all(o.status == STATUS_OK for o in outs)
    # the disturbance did upset the loop (else the check above proves nothing)
    assert np.max(np.abs(Y[40:60] - sp)) > 1e-2


def test_feedforward_of_measured_dv_reduces_iae():
    # Reference: feedforward from a measured disturbance acts before the CV moves (common
    # practice, no source); the integral of absolute error after a DV step must be smaller.
    A = np.array([[0.9, 0.0, 0.0], [0.0, 0.85, 0.0], [0.0, 0.1, 0.9]])
    B = np.array([[0.2, 0.0], [0.0, 0.0], [0.0, 0.15]])
    C = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    Bd = np.array([[0.0], [0.3], [0.0]])           # the DV reaches y1 through a lag
    dm = make_dlm(A, B, C, Bd=Bd)
    tg = mp.Targets(setpoint=np.zeros(2), cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=np.full(2, -10.0), mv_high=np.full(2, 10.0))
    d = lambda k: np.array([1.0 if k >= 5 else 0.0])     # noqa: E731
    iae = {}
    for ff in (True, False):
        ctrl = mp.PredictiveController(dm, horizon=25, dv={"d0": {"feedforward": ff}}).build()
        Y, _, _ = run_loop(ctrl, dm, 80, tg, d_plant=d, dv_meas=d)
        iae[ff] = float(np.sum(np.abs(Y)) * dm.Ts)
    assert iae[True] < 0.5 * iae[False], iae


def test_dv_forecast_is_used():
    # Reference: a known future DV change can be met before it arrives when the MV acts through
    # a dead time (common practice, no source): with the forecast the MV moves now, without it
    # the controller has no reason to move.
    A = np.array([[0.8, 0.5], [0.0, 0.0]])           # x1: the CV; x2: the MV one sample late
    B = np.array([[0.0], [1.0]])
    dm = make_dlm(A, B, [[1.0, 0.0]], Bd=[[0.5], [0.0]])
    ctrl = mp.PredictiveController(dm, horizon=10, mv={"u0": {"move_weight": 0.01}}).build()
    fc = np.array([[0.0]] + [[1.0]] * 10)             # the DV steps up at the next sample
    with_fc = ctrl.plan(np.zeros(2), free_targets(1, 1), dv=[0.0], dv_forecast=fc)
    without = ctrl.plan(np.zeros(2), free_targets(1, 1), dv=[0.0])
    assert with_fc["u"][0] < -0.5 and abs(without["u"][0]) < 1e-6


# ----------------------------------------------------------------------------------------------
def test_problem_is_dpp_never_recompiles_and_constraints_do_not_grow():
    # Reference: cvxpy's DPP rules (cvxpy documentation, "Disciplined Parametrized
    # Programming"): a DPP problem is canonicalized once; re-solves only apply parameters.
    import cvxpy as cp

    rng = np.random.default_rng(2)
    A, B, C, Bd = random_stable(rng, 3, 2, 2, nd=1)
    dm = make_dlm(A, B, C, Bd=Bd)
    counts = []
    for N in (5, 40):
        ctrl = mp.PredictiveController(dm, horizon=N, fast_path=False, terminal_cost=True,
                                       mv={"u0": {"preferred_weight": 0.1}, "u1": {"preferred_weight": 0.1}}
                                       ).build()
        prob = ctrl.qp_.problem
        assert prob.is_dpp()
        counts.append(len(prob.constraints))
        tg = mp.Targets(setpoint=np.array([0.3, -0.2]), cv_low=np.full(2, -np.inf),
                        cv_high=np.array([0.5, np.inf]), mv_low=np.full(2, -1.0),
                        mv_high=np.full(2, 1.0))
        with warnings.catch_warnings():
            warnings.simplefilter("error")           # cvxpy's "not DPP ... recompile" is a warning
            _, _, outs = run_loop(ctrl, dm, 4, tg, d_plant=lambda k: np.array([0.1]),
                                  dv_meas=lambda k: np.array([0.1]))
        assert all(o.status == STATUS_OK for o in outs)
        cache = prob._cache.param_prog
        ctrl.step(4.0, mp.Measurement.now(np.zeros(2), 4.0), [0.1], tg)
        assert prob._cache.param_prog is cache        # the canonical program was reused
        assert isinstance(prob, cp.Problem)
    assert counts[0] == counts[1]


# ----------------------------------------------------------------------------------------------
def test_failed_solve_falls_back_to_shifted_plan_then_holds():
    # Reference: common practice, no source -- a non-optimal solve is never applied.
    rng = np.random.default_rng(4)
    A, B, C, _ = random_stable(rng, 2, 1, 1)
    dm = make_dlm(A, B, C)
    ctrl = mp.PredictiveController(dm, horizon=5, mv={"u0": {"low": -1, "high": 1}},
                                   solver="osqp", backup_solver=None).build()
    tg = free_targets(1, 1, sp=[0.5])
    ctrl.reset()
    good = ctrl.step(0.0, mp.Measurement.now([0.0], 0.0), [], tg)
    assert good.status == STATUS_OK and not good.diagnostics["fallback"]
    plan = ctrl.last_plan()
    ctrl.qp_.update_settings(max_iter=1)          # every solve now stops early
    seen = []
    for k in range(1, 7):
        out = ctrl.step(float(k), mp.Measurement.now([0.0], float(k)), [], tg)
        seen.append(out.status)
        assert out.diagnostics["fallback"] is True
        assert out.diagnostics["solver_status"] == "max_iterations"
        if out.status == STATUS_FALLBACK:
            np.testing.assert_allclose(out.u, plan[:, min(k, plan.shape[1] - 1)])
    assert seen[:4] == [STATUS_FALLBACK] * 4 and seen[4:] == [STATUS_HOLD] * 2
    assert ctrl.counts["fallbacks"] == 6 and ctrl.counts["holds"] == 2


def test_diagnostics_report_active_limits_and_timing():
    dm = make_dlm([[0.9]], [[0.1]], [[1.0]])
    ctrl = mp.PredictiveController(dm, horizon=10, mv={"u0": {"high": 0.5}}).build()
    assert isinstance(ctrl, mp.Controller) and ctrl.name == "mpc"
    ctrl.reset()
    out = ctrl.step(0.0, mp.Measurement.now([0.0], 0.0), [], free_targets(1, 1, sp=[10.0]))
    d = out.diagnostics
    assert out.u[0] == pytest.approx(0.5)
    assert d["active_mv_limits"] == 1 and d["active_mv_limit_names"] == ["u0"]
    for key in ("solve_ms", "solver_status", "fallback", "slack_max", "iterations", "step_ms"):
        assert key in d
    assert d["solve_ms"] > 0 and d["iterations"] >= 1


def test_nonlinear_blending_tank_linearization_drives_to_setpoint():
    # Reference: the controller's model is the exact linearization of the blending tank
    # (mpcproto.linearize); on that same linear model the setpoint change must be met
    # with zero offset (offset-free MPC, Pannocchia & Rawlings 2003).
    tank = mp.make_model("blending_tank")
    op = mp.steady_state(tank)
    lin = mp.linearize(tank, op)
    dm = lin.discretize(10.0)
    ctrl = mp.PredictiveController.from_settings(dm, {
        "horizon": 30, "control_horizon": 8,
        "cv": {"level": {"scale": 0.1}, "concentration": {"scale": 1.0},
               "temperature": {"scale": 1.0}},
        "mv": {"caustic_flow": {"scale": 0.01}, "water_flow": {"scale": 0.1},
               "heater_duty": {"scale": 10.0}}}).build()
    sp = op.y + np.array([0.05, 0.5, 1.0])
    tg = mp.Targets(setpoint=sp, cv_low=np.full(3, -np.inf), cv_high=np.full(3, np.inf),
                    mv_low=np.array([0.0, 0.0, 0.0]), mv_high=np.array([0.2, 3.0, 600.0]))
    Y, U, outs = run_loop(ctrl, dm, 120, tg)
    np.testing.assert_allclose(Y[-1], sp, atol=1e-3 * np.abs(sp).max())
    assert np.all(U >= -1e-12) and np.all(U <= np.array([0.2, 3.0, 600.0]) + 1e-12)


def test_dead_times_of_the_wood_berry_column_are_handled():
    # Reference: Wood & Berry (1973) distillation column (mpcproto.models.wood_berry), dead times
    # of 1-8 min as integer-sample delay states; offset-free MPC reaches both composition
    # setpoints (Pannocchia & Rawlings 2003) through the delays.
    wb = mp.make_model("wood_berry")
    op = mp.steady_state(wb)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)     # 8.1 and 3.4 min rounded to samples
        dm = mp.linearize(wb, op).discretize(1.0)
    assert dm.nx > dm.n_plant_states                     # delay states are present
    ctrl = mp.PredictiveController(dm, horizon=40, control_horizon=8).build()
    sp = op.y + np.array([1.0, -1.0])
    tg = mp.Targets(setpoint=sp, cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=op.u - 5.0, mv_high=op.u + 5.0)
    Y, _, outs = run_loop(ctrl, dm, 150, tg)
    np.testing.assert_allclose(Y[-1], sp, atol=1e-3)
    assert all(o.status == STATUS_OK for o in outs)


def test_reset_is_bumpless_at_the_operating_point():
    # Reference: bumpless transfer (common practice, no source): at a steady state with the
    # setpoints where the CVs are, the controller leaves the MVs where they are.
    rng = np.random.default_rng(8)
    A, B, C, Bd = random_stable(rng, 3, 2, 2, nd=1)
    dm = make_dlm(A, B, C, Bd=Bd, u0=[1.0, 2.0], y0=[5.0, -3.0], d0=[0.5])
    ctrl = mp.PredictiveController(dm, horizon=10).build()
    ctrl.reset(dm.op)
    tg = mp.Targets(setpoint=dm.op.y, cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=np.full(2, -10.0), mv_high=np.full(2, 10.0))
    for k in range(3):
        out = ctrl.step(float(k), mp.Measurement.now(dm.op.y, float(k)), dm.op.d, tg)
        np.testing.assert_allclose(out.u, dm.op.u, atol=1e-6)


def test_steady_target_daqp_stages_match_an_interior_point_solve():
    # Reference: cvxpy's own solve of the same two stages with Clarabel (interior point), written
    # on the full variables (no elimination of the steady-state equations, no rescaling).
    rng = np.random.default_rng(21)
    A, B, C, Bd = random_stable(rng, 3, 2, 2, nd=1)
    dm = make_dlm(A, B, C, Bd=Bd)
    ctrl = mp.PredictiveController(dm, horizon=8, mv={"u0": {"low": -0.4, "high": 0.4},
                                                      "u1": {"preferred_weight": 0.2}}).build()
    tgt = ctrl.target_
    lay = tgt.layout_
    met = 0
    for _ in range(12):
        parts = {"d": rng.normal(size=1) * 0.2, "w": rng.normal(size=2) * 0.05,
                 "band_lo": np.array([rng.normal(), -np.inf]), "band_hi": np.array([np.nan, 0.3]),
                 "lim_lo": np.full(2, -np.inf), "lim_hi": np.array([np.inf, 1.0]),
                 "mv_lo": np.array([-0.4, -np.inf]), "mv_hi": np.array([0.4, np.inf]),
                 "pref": np.zeros(2)}
        parts["band_hi"][0] = parts["band_lo"][0]          # a setpoint on y0, a zone on y1
        z = np.concatenate([np.asarray(parts[k], float).reshape(lay[k]) for k in lay])
        a = tgt.solve(z, fast=True)
        b = tgt.solve(z, fast=False, solver="CLARABEL",
                      options={"tol_gap_abs": 1e-11, "tol_gap_rel": 1e-11, "tol_feas": 1e-11})
        assert a.accepted and b.accepted
        # stage 2 keeps the CVs where stage 1 left them (the reference path to its 1e-8
        # widening), so the two agree to that level, MVs included
        for key in ("us", "ys", "xs"):
            np.testing.assert_allclose(a.values[key], b.values[key], atol=1e-6)
        # where the setpoint of y0 is reachable, DAQP meets it exactly
        sp = parts["band_lo"][0]
        if abs(b.values["ys"][0] - sp) < 1e-6:
            met += 1
            assert abs(a.values["ys"][0] - sp) <= 1e-10 * (1 + abs(sp))
    assert met >= 3
