"""Condensed dynamic QP solved by DAQP == the cvxpy statement of the same QP solved tight.

Reference for every comparison: the controller's own cvxpy statement (state variables, band
errors, slacks: ``mpcproto/control/dynamic_qp.py``) solved by Clarabel (interior point, through
``cvxpy.Problem.solve``) at tolerances 1e-12, fed the very input vector the condensed path used.
The check is on the plan in scaled units (one MV ``scale`` = 1): agreement to 1e-8 of the MV scale.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sla

import mpcproto as mp
from mpcproto.control.base import STATUS_HOLD
from mpcproto.scenario.runner import build_controller, prepare
from mpcproto.scenario.schema import load_scenario

from test_mpc import free_targets, make_dlm, random_stable

TIGHT_CLARABEL = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12,
                  "max_iter": 500}
SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"


def reference_plan(ctrl, z):
    """The statement solved tight by Clarabel for input vector *z*: plan (nu, M) scaled."""
    values = ctrl.qp_.values_from_inputs(z)
    res = ctrl.qp_.solve_cvxpy(values, solver="CLARABEL", options=TIGHT_CLARABEL)
    if not res.accepted:
        # Clarabel occasionally stops short of 1e-12 on the larger statements (Wood & Berry with
        # its split-sample delay states); 1e-11 still pins the plan far below the 1e-8 checked
        res = ctrl.qp_.solve_cvxpy(values, solver="CLARABEL",
                                   options=dict(TIGHT_CLARABEL, tol_gap_abs=1e-11,
                                                tol_gap_rel=1e-11, tol_feas=1e-11))
    assert res.accepted, res.status
    return res.values["u"], res.values["slack"], res.objective


def compare_last(ctrl, res_u, tol=1e-8):
    z = ctrl._last_inputs.copy()
    u_ref, _s, _obj = reference_plan(ctrl, z)
    np.testing.assert_allclose(res_u, u_ref, rtol=0, atol=tol)


def recorder(ctrl):
    """Keep a copy of every input vector and plan the condensed path solves (a recorder around
    the real solve, not a replacement)."""
    seen = []
    solve = ctrl.condensed_.solve

    def rec(z):
        res = solve(z)
        seen.append((z.copy(), res))
        return res

    ctrl.condensed_.solve = rec
    return seen


def random_model(rng, odd):
    """A random stable 4-state, 2-MV, 3-CV, 1-DV model; with a direct feedthrough D when *odd*."""
    nx, nu, ny, nd = 4, 2, 3, 1
    A, B, C, Bd = random_stable(rng, nx, nu, ny, nd)
    D = 0.1 * rng.standard_normal((ny, nu)) if odd else None
    return make_dlm(A, B, C, Bd=Bd, D=D), (nx, nu, ny, nd)


@pytest.mark.parametrize("seed", range(6))
def test_condensed_equals_statement_on_random_systems(seed):
    # Reference: the cvxpy statement solved tight by Clarabel (see module docstring).
    rng = np.random.default_rng(100 + seed)
    dm, (nx, nu, ny, nd) = random_model(rng, seed % 2)
    quad = 0.0 if seed == 2 else 10.0                  # a linear-only exact penalty too
    ctrl = mp.PredictiveController(
        dm, horizon=12, control_horizon=4, terminal_cost=seed % 3 == 0,
        cv={"y0": {"weight": 2.0, "high": 0.3, "limit_penalty_quadratic": quad},
            "y1": {"low": -0.2, "priority": 2}, "y2": {"disturbance": "input"}},
        mv={"u0": {"low": -1.0, "high": 1.0, "max_move": 0.3, "preferred_weight": 0.1},
            "u1": {"low": -2.0, "high": 0.5, "preferred_weight": 0.1}}).build()
    assert ctrl.solver_ == "daqp" and ctrl.condensed_ is not None
    seen_active = 0
    for k in range(5):
        x = 0.5 * rng.standard_normal(nx)
        sp = np.array([rng.normal(), np.nan, rng.normal() if k % 2 else np.nan])   # zones too
        lo2 = 0.3 if k == 4 else -0.5                   # k = 4: crossed run-time limits on y2
        tg = mp.Targets(setpoint=sp, cv_low=np.array([-np.inf, rng.uniform(-2, 0), lo2]),
                        cv_high=np.array([np.inf, np.inf, rng.uniform(-0.2, 0.2) if k == 4
                                          else rng.uniform(0, 2)]),
                        mv_low=np.array([-1.0, -np.inf]), mv_high=np.array([np.inf, 0.5]))
        fc = np.array([[0.0], [0.4], [0.8]]) + rng.normal()        # a DV forecast
        out = ctrl.plan(x, tg, disturbance=rng.normal(size=3) * 0.3, dv=rng.normal(size=1),
                        dv_forecast=fc if k % 2 == 0 else None, u_prev=rng.uniform(-0.5, 0.5, 2))
        assert out["accepted"]
        u_s = (out["u_plan"][:, :ctrl._M] - ctrl._op_u[:, None]) / ctrl._su[:, None]
        z = ctrl._last_inputs.copy()
        u_ref, s_ref, obj_ref = reference_plan(ctrl, z)
        np.testing.assert_allclose(u_s, u_ref, rtol=0, atol=1e-8)
        np.testing.assert_allclose(out["slack"] / ctrl._sy[:, None], s_ref, rtol=0, atol=1e-7)
        assert out["objective"] == pytest.approx(obj_ref, rel=1e-8, abs=1e-8)
        seen_active += int(np.max(s_ref) > 1e-6)
    assert seen_active >= 1          # soft limits were really active in some of these problems


def test_dead_times_cost_no_variables():
    # Reference: the statement solved tight (module docstring); dead times are delay states of
    # the discrete model (common practice, no source), the condensed QP has nu*M variables.
    rng = np.random.default_rng(8)
    A, B, C, _ = random_stable(rng, 2, 2, 2)
    nd_ = 3                                  # a three-sample dead time on u0: a shift register
    nx = 2 + nd_
    Af = np.zeros((nx, nx))
    Af[:2, :2] = A
    Af[:2, 2 + nd_ - 1] = B[:, 0]
    Af[3:, 2:-1] += np.eye(nd_ - 1)
    Bf = np.zeros((nx, 2))
    Bf[2, 0] = 1.0
    Bf[:2, 1] = B[:, 1]
    Cf = np.hstack([C, np.zeros((2, nd_))])
    dm = make_dlm(Af, Bf, Cf)
    ctrl = mp.PredictiveController(dm, horizon=15, control_horizon=3,
                                   cv={"y0": {"high": 0.2}},
                                   mv={"u0": {"low": -1, "high": 1, "max_move": 0.2}}).build()
    assert ctrl.condensed_.n_variables_ == 2 * 3
    x = rng.standard_normal(nx)
    out = ctrl.plan(x, free_targets(2, 2, sp=[0.5, -0.5]))
    assert out["accepted"]
    u_s = (out["u_plan"][:, :3] - ctrl._op_u[:, None]) / ctrl._su[:, None]
    compare_last(ctrl, u_s)


@pytest.mark.parametrize("N", [1, 5, 30])
def test_condensed_unconstrained_is_lqr(N):
    # Reference: with the discrete-Riccati terminal weight the finite-horizon optimum is the
    # infinite-horizon LQR law u = -K x for every horizon (standard LQ theory; K from
    # scipy.linalg.solve_discrete_are) -- here to round-off, the solver being exact.
    rng = np.random.default_rng(17)
    A, B, _, _ = random_stable(rng, 3, 2, 3)
    dm = make_dlm(A, B, np.eye(3))
    qw, rw = np.array([1.0, 2.0, 0.5]), np.array([0.3, 0.7])
    ctrl = mp.PredictiveController(
        dm, horizon=N, terminal_cost=True,
        cv={f"y{i}": {"weight": float(qw[i])} for i in range(3)},
        mv={f"u{j}": {"preferred_weight": float(rw[j]), "move_weight": 0.0}
            for j in range(2)}).build()
    assert ctrl.solver_ == "daqp"
    P = sla.solve_discrete_are(A, B, np.diag(qw), np.diag(rw))
    K = np.linalg.solve(np.diag(rw) + B.T @ P @ B, B.T @ P @ A)
    x = rng.standard_normal(3)
    np.testing.assert_allclose(ctrl.plan(x, free_targets(3, 2))["u"], -K @ x, rtol=1e-9, atol=1e-10)


def test_condensed_unconstrained_is_least_squares():
    # Reference: without limits the condensed QP is a linear least-squares problem; its solution
    # by numpy.linalg.lstsq of the stacked, weighted residuals (common practice, no source).
    rng = np.random.default_rng(21)
    A, B, C, _ = random_stable(rng, 3, 2, 2)
    dm = make_dlm(A, B, C)
    ctrl = mp.PredictiveController(dm, horizon=10, control_horizon=3, steady_target=False,
                                   mv={"u0": {"move_weight": 0.2},
                                       "u1": {"move_weight": 0.5}}).build()
    x = rng.standard_normal(3)
    sp = np.array([0.4, -0.3])
    out = ctrl.plan(x, free_targets(2, 2, sp=sp))
    cq = ctrl.condensed_
    z = ctrl._last_inputs
    yf = cq.free_ @ z[:cq._k_end]
    # residuals: y - sp over the horizon (weight 1), and sqrt(r) * moves
    r = np.tile([0.2, 0.5], 3)
    Dm = np.eye(6) - np.eye(6, k=-2)
    Amat = np.vstack([cq.G_, np.sqrt(r)[:, None] * Dm])
    bvec = np.concatenate([np.tile(sp, 10) - yf, np.zeros(6)])
    U, *_ = np.linalg.lstsq(Amat, bvec, rcond=None)
    np.testing.assert_allclose(out["u_plan"][:, :3].ravel(order="F"), U, rtol=0, atol=1e-9)


def _mpc_scenarios():
    out = []
    for path in sorted(SCENARIOS.glob("*.toml")):
        scn = load_scenario(path)
        for label, spec in scn.data["controllers"].items():
            if spec["kind"] == "mpc":
                out.append(pytest.param(path, label, id=f"{path.stem}-{label}"))
    return out


@pytest.mark.parametrize("path,label", _mpc_scenarios())
def test_shipped_scenarios_condensed_equals_statement(path, label):
    # Reference: the statement solved tight by Clarabel (module docstring), on the inputs of
    # real closed-loop samples of every shipped scenario's MPC (nonlinear plant, its disturbances).
    scn = load_scenario(path)
    prep = prepare(scn, ci=True)
    ctl = build_controller(label, scn.data["controllers"][label], prep, cache=False)
    if ctl.condensed_ is None:
        pytest.skip("the size rule chose the sparse form")
    seen = recorder(ctl)
    samples = 25
    mp.simulate(prep.plant, ctl, op=prep.op, Ts=scn.sample_time,
                duration=samples * scn.sample_time, rng=1, **prep.sim)
    assert len(seen) >= samples - 1
    worst_first, worst_plan = 0.0, 0.0
    cq = ctl.condensed_
    for z, res in seen[::3]:
        assert res.accepted, res.status
        u_ref, _s, _obj = reference_plan(ctl, z)
        d = np.abs(res.values["u"] - u_ref)
        worst_first = max(worst_first, float(d[:, 0].max()))
        worst_plan = max(worst_plan, float(d.max()))
        # never worse than the reference (where they differ, DAQP's objective is the lower one):
        # both plans costed by the same objective function -- the interior-point solve's own
        # reported value carries its feasibility tolerance (on caustic_blending's last sample it
        # reads 1e-9 below the cost of its own plan, which is above DAQP's)
        obj_ref = cq.objective(z, u_ref)
        assert cq.objective(z, res.values["u"]) <= obj_ref + 1e-10 * max(1.0, abs(obj_ref))
    # the applied move to 1e-8 of the MV scale; later moves of the plan lie along directions in
    # which the objective is nearly flat (it agrees to ~16 digits where they differ by 2e-8 on
    # the blending tank), so an interior-point reference pins them only to ~1e-7
    assert worst_first <= 1e-8, worst_first
    assert worst_plan <= 1e-7, worst_plan


def test_daqp_exit_flag_not_optimal_is_never_applied():
    # Reference: common practice, no source -- a solve that is not optimal is never applied:
    # the backup solver (Clarabel through the cvxpy statement) answers, or the shifted plan / hold.
    dm = make_dlm([[0.9]], [[0.1]], [[1.0]])
    tg = free_targets(1, 1, sp=[10.0])
    tg = mp.Targets(setpoint=tg.setpoint, cv_low=tg.cv_low, cv_high=tg.cv_high,
                    mv_low=np.array([-0.5]), mv_high=np.array([0.5]))
    common = dict(horizon=10, solver_options={"iter_limit": 1}, steady_target=False)
    backed = mp.PredictiveController(dm, **common).build()
    backed.reset()
    out = backed.step(0.0, mp.Measurement.now([0.0], 0.0), [], tg)
    d = out.diagnostics
    assert d["solver"] == "daqp" and d["exit_flag"] == -4          # DAQP: iteration limit
    assert d["first_solver_status"] == "iteration_limit"
    assert backed.counts["backup_solves"] == 1 and out.status == "ok"
    assert out.u[0] == pytest.approx(0.5)                          # Clarabel's answer
    alone = mp.PredictiveController(dm, backup_solver=None, **common).build()
    alone.reset()
    out = alone.step(0.0, mp.Measurement.now([0.0], 0.0), [], tg)
    assert out.diagnostics["fallback"] is True and out.status == STATUS_HOLD
    assert alone.counts["failed_solves"] == 1


def test_size_rule_picks_the_sparse_form_for_large_condensed_qps():
    # Reference: the documented size rule (mpc_settings.CONDENSED_MAX_VARIABLES = 1000 variables
    # nu*M) -- common practice, no source: a dense condensed QP stops paying off when it is large.
    rng = np.random.default_rng(3)
    A, B, C, _ = random_stable(rng, 2, 2, 2)
    dm = make_dlm(A, B, C)
    small = mp.PredictiveController(dm, horizon=600, control_horizon=500).validate()
    large = mp.PredictiveController(dm, horizon=600, control_horizon=501).validate()
    assert small["solver"] == "daqp" and large["solver"] == "osqp"
    chosen = mp.PredictiveController(dm, horizon=600, control_horizon=501, solver="daqp").validate()
    assert chosen["solver"] == "daqp"                 # an explicit choice is kept


@pytest.mark.parametrize("seed", range(4))
def test_preview_condensed_equals_statement(seed):
    # Reference: the cvxpy statement solved tight by Clarabel (module docstring), with a setpoint
    # program over the horizon (per-stage references: the statement's band parameters move stage
    # by stage through its input map; the condensed form only changes its gradient).
    rng = np.random.default_rng(300 + seed)
    dm, (nx, nu, ny, nd) = random_model(rng, seed % 2)
    N = 12
    ctrl = mp.PredictiveController(
        dm, horizon=N, control_horizon=N if seed < 2 else 4, terminal_cost=seed == 0,
        steady_target=seed != 3, setpoint_preview=True,
        cv={"y0": {"weight": 2.0, "high": 0.3}, "y1": {"low": -0.2, "priority": 2},
            "y2": {"disturbance": "input"}},
        mv={"u0": {"low": -1.0, "high": 1.0, "max_move": 0.3, "preferred_weight": 0.1},
            "u1": {"low": -2.0, "high": 0.5, "preferred_weight": 0.1}}).build()
    assert ctrl.condensed_ is not None and ctrl.preview_samples == N + 1
    for k in range(4):
        x = 0.5 * rng.standard_normal(nx)
        sp = np.array([rng.normal(), rng.normal(), np.nan if k % 2 else rng.normal()])
        prog = np.tile(sp, (N - 3, 1))                 # shorter than the horizon: last row held
        prog[5:, 0] += 0.6                              # a step seen ahead
        prog[:, 1] += np.linspace(0.0, -0.5, N - 3)     # a ramp
        prog[7, 1] = np.nan                             # NaN: the setpoint now
        tg = mp.Targets(setpoint=sp, cv_low=np.array([-np.inf, rng.uniform(-2, 0), -0.5]),
                        cv_high=np.array([np.inf, np.inf, rng.uniform(0, 2)]),
                        mv_low=np.array([-1.0, -np.inf]), mv_high=np.array([np.inf, 0.5]))
        out = ctrl.plan(x, tg, disturbance=rng.normal(size=3) * 0.3, dv=rng.normal(size=1),
                        u_prev=rng.uniform(-0.5, 0.5, 2), setpoint_program=prog)
        assert out["accepted"]
        z = ctrl._last_inputs.copy()
        assert np.any(z[ctrl._zsl["ref"]] != 0)
        u_s = (out["u_plan"][:, :ctrl._M] - ctrl._op_u[:, None]) / ctrl._su[:, None]
        check_against_statement(ctrl, z, u_s)
    # a moving band on a zone CV and on a zone whose ends are its limits (not reachable through
    # step(), which previews setpoints only): the two forms still agree for any input vector
    z = ctrl._last_inputs.copy()
    zs = ctrl._zsl
    z[zs["band_lo"]] = [-0.1, -0.2, -np.inf]
    z[zs["band_hi"]] = [0.2, np.inf, 0.3]
    z[zs["lim_lo"]] = [-np.inf, -0.2, -0.5]
    z[zs["ref"]] = 0.1 * rng.standard_normal(N * ny)
    res = ctrl.condensed_.solve(z)
    assert res.accepted, res.status
    check_against_statement(ctrl, z, res.values["u"])


def check_against_statement(ctrl, z, u_s):
    """The condensed plan *u_s* (scaled) against the cvxpy statement for input vector *z*: solved
    by DAQP through cvxpy (an exact active-set solve of the sparse form), the whole plan to 1e-8
    of the MV scale; solved by Clarabel at 1e-12 (module docstring), the applied move to 1e-8 and
    the rest of the plan to 1e-7 (an interior-point solve pins the nearly flat directions of the
    later moves less tightly, see the shipped-scenario test) and the objective never lower."""
    res = ctrl.qp_.solve_cvxpy(ctrl.qp_.values_from_inputs(z), solver="DAQP",
                               options={"primal_tol": 1e-12})
    assert res.accepted, res.status
    np.testing.assert_allclose(u_s, res.values["u"], rtol=0, atol=1e-8)
    u_ref, _s, obj_ref = reference_plan(ctrl, z)
    np.testing.assert_allclose(u_s[:, 0], u_ref[:, 0], rtol=0, atol=1e-8)
    np.testing.assert_allclose(u_s, u_ref, rtol=0, atol=1e-7)
    obj = ctrl.condensed_.objective(z, u_s)
    assert obj <= obj_ref + 1e-10 * max(1.0, abs(obj_ref))
    assert obj == pytest.approx(obj_ref, rel=1e-8, abs=1e-8)


def _restart_run(ctrl, dm, steps=90):
    """A closed loop whose row structure changes: a setpoint given up for a zone between CV
    limits (one row group), then limits the steady target cannot meet (a widened zone: its own
    rows beside the limit's), then the setpoint back."""
    ctrl.reset(dm.op)
    op, x, out = dm.op, np.zeros(dm.nx), []
    rng = np.random.default_rng(5)
    for k in range(steps):
        sp_ = op.y + np.array([0.0, 0.2, 0.0])
        lo, hi = np.full(3, -np.inf), np.full(3, np.inf)
        if 20 <= k < 70:
            sp_[1] = np.nan
            lo[1], hi[1] = op.y[1] - 0.1, op.y[1] + 0.1
        if 45 <= k < 70:
            lo[0], hi[0] = op.y[0] + 0.5, op.y[0] + 0.6      # a level the MVs cannot reach
            sp_[0] = np.nan
        tg = mp.Targets(setpoint=sp_, cv_low=lo, cv_high=hi, mv_low=np.zeros(3),
                        mv_high=np.array([0.2, 3.0, 600.0]))
        y = dm.C @ x + op.y + rng.normal(scale=[0.002, 0.01, 0.05])
        o = ctrl.step(k * dm.Ts, mp.Measurement.now(y, k * dm.Ts), np.array([op.d[0], 0, 0]), tg)
        out.append(o.u)
        x = dm.A @ x + dm.B @ (o.u - op.u)
    return np.array(out)


def test_restart_keeps_the_workspaces_and_repeats_the_run_exactly():
    # Determinism (common practice, no source): reset() keeps each row structure's Hessian, rows
    # and DAQP set-up (they depend on the design alone) but forgets the active sets, so a rerun
    # gives the MVs of the first run and of a freshly built controller to the last bit.
    tank = mp.make_model("blending_tank")
    dm = mp.linearize(tank, mp.steady_state(tank)).discretize(10.0)
    settings = {"horizon": 40, "control_horizon": 8,
                "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5},
                       "concentration": {"scale": 0.2}, "temperature": {"scale": 1.0}},
                "mv": {"caustic_flow": {"scale": 0.01, "max_move": 0.005},
                       "water_flow": {"scale": 0.1, "max_move": 0.1},
                       "heater_duty": {"scale": 20.0, "max_move": 20.0}}}
    ctrl = mp.PredictiveController.from_settings(dm, settings).build()
    first = _restart_run(ctrl, dm)
    cq = ctrl.condensed_
    kept = {k: (st, st.model) for k, st in cq._structs.items()}
    assert len(kept) >= 3, "the loop meets several row structures"
    zones = [st for st in cq._structs.values() if st.n_zone]
    assert zones and any(st.n_lim for st in zones), "a zone with rows of its own beside a limit"
    again = _restart_run(ctrl, dm)
    assert all(cq._structs[k] is st and st.model is mdl for k, (st, mdl) in kept.items())
    fresh = _restart_run(mp.PredictiveController.from_settings(dm, settings).build(), dm)
    assert np.array_equal(first, again)
    assert np.array_equal(first, fresh)


def test_a_controller_pickles_before_and_after_a_run_and_its_copy_repeats_a_fresh_run():
    # A built controller may be sent to another process (pickled) or deep-copied, before or
    # after it ran: the DAQP workspaces it keeps over reset() do not pickle (the copy sets them
    # up again) and the views of its input vectors and signature buffer must be views of the
    # copy's own arrays again (pickled as they were, a copy's MVs were once 240 off).  After
    # reset() every copy gives a fresh controller's MVs to the bit (determinism, common
    # practice, no source).
    import copy as copy_
    import pickle

    tank = mp.make_model("blending_tank")
    dm = mp.linearize(tank, mp.steady_state(tank)).discretize(10.0)
    settings = {"horizon": 30, "control_horizon": 6,
                "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5}},
                "mv": {"caustic_flow": {"scale": 0.01, "max_move": 0.005},
                       "water_flow": {"scale": 0.1, "max_move": 0.1},
                       "heater_duty": {"scale": 20.0, "max_move": 20.0}}}
    ctrl = mp.PredictiveController.from_settings(dm, settings).build()
    before = [pickle.loads(pickle.dumps(ctrl)), copy_.deepcopy(ctrl)]
    first = _restart_run(ctrl, dm, steps=60)
    assert ctrl.condensed_._structs, "workspaces kept after the run"
    after = [pickle.loads(pickle.dumps(ctrl)), copy_.deepcopy(ctrl)]
    for c in before + after:
        assert np.array_equal(_restart_run(c, dm, steps=60), first)
