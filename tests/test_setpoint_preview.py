"""Setpoint preview: the setpoints known in advance over the horizon as per-stage references.

References: the finite-horizon LQ tracking law with a known future reference, computed here
independently by the backward Riccati recursion with its feedforward term (standard
finite-horizon LQ tracking, from memory); the closed loop on one of our scenarios for the
anticipation and the IAE.  The fast-vs-statement checks with preview are in test_condensed.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.exceptions import SettingsError
from mpcproto.scenario.runner import build_controller, prepare
from mpcproto.scenario.schema import load_scenario
from mpcproto.sim import signal_from_spec

from test_mpc import free_targets, make_dlm, random_stable

SCENARIO = Path(__file__).resolve().parent.parent / "scenarios" / "blending_recipe_change.toml"


def lq_tracking_plan(A, B, C, Q, R, x0, ref):
    """Inputs u_0..u_{N-1} minimizing sum_{k=1..N} (C x_k - r_k)' Q (C x_k - r_k)
    + sum_{k=0..N-1} u_k' R u_k for x_{k+1} = A x_k + B u_k, r_k = ref[k] (k = 1..N).

    Standard finite-horizon LQ tracking, from memory: V_k(x) = x' P_k x - 2 p_k' x + const,
    P_N = C'QC, p_N = C'Q r_N; backwards K_k = S^-1 B'P A, f_k = S^-1 B'p with
    S = R + B'P B (P, p of stage k+1); P_k = A'P (A - B K_k) (+ C'QC for k >= 1),
    p_k = (A - B K_k)' p (+ C'Q r_k for k >= 1); u_k = -K_k x_k + f_k.
    """
    N = ref.shape[0] - 1
    P, p = C.T @ Q @ C, C.T @ Q @ ref[N]
    K, f = [None] * N, [None] * N
    for k in range(N - 1, -1, -1):
        S = R + B.T @ P @ B
        K[k], f[k] = np.linalg.solve(S, B.T @ P @ A), np.linalg.solve(S, B.T @ p)
        Acl = A - B @ K[k]
        P, p = A.T @ P @ Acl, Acl.T @ p
        if k >= 1:
            P, p = P + C.T @ Q @ C, p + C.T @ Q @ ref[k]
    x, U = np.asarray(x0, float).copy(), []
    for k in range(N):
        u = -K[k] @ x + f[k]
        U.append(u)
        x = A @ x + B @ u
    return np.array(U).T


@pytest.mark.parametrize("seed", [5, 6])
def test_preview_unconstrained_is_finite_horizon_lq_tracking(seed):
    # Reference: lq_tracking_plan (standard finite-horizon LQ tracking, from memory), with the
    # same future reference; the MPC without steady target, without move weight, every move
    # free (M = N), the MVs' pull to their preferred value (0) the input weight R.
    rng = np.random.default_rng(seed)
    nx, nu, ny, N = 4, 2, 2, 15
    A, B, C, _ = random_stable(rng, nx, nu, ny)
    q, r = np.array([1.0, 3.0]), np.array([0.2, 0.5])
    ctrl = mp.PredictiveController(
        make_dlm(A, B, C), horizon=N, steady_target=False, setpoint_preview=True,
        cv={f"y{i}": {"weight": float(q[i]), "scale": 1.0} for i in range(ny)},
        mv={f"u{j}": {"preferred_weight": float(r[j]), "move_weight": 0.0, "scale": 1.0}
            for j in range(nu)}).build()
    x0 = rng.standard_normal(nx)
    prog = np.zeros((N + 1, ny))
    prog[6:, 0] = 1.0                                   # a step 6 samples ahead
    prog[:, 1] = np.linspace(0.0, -0.5, N + 1)          # a ramp over the whole horizon
    out = ctrl.plan(x0, free_targets(ny, nu, sp=prog[0]), setpoint_program=prog)
    assert out["accepted"]
    U = lq_tracking_plan(A, B, C, np.diag(q), np.diag(r), x0, prog)
    np.testing.assert_allclose(out["u_plan"], U, rtol=0, atol=1e-9)
    # without preview the same controller holds the setpoint of now: another plan
    held = ctrl.plan(x0, free_targets(ny, nu, sp=prog[0]))
    assert np.abs(held["u_plan"] - U).max() > 0.1
    np.testing.assert_allclose(held["u_plan"], lq_tracking_plan(
        A, B, C, np.diag(q), np.diag(r), x0, np.tile(prog[0], (N + 1, 1))), rtol=0, atol=1e-9)


def test_constant_program_or_preview_off_changes_nothing():
    # Reference: the controller without preview (a constant program previews nothing; a
    # controller with the preview off ignores a program) -- the same QP, so the same plan.
    rng = np.random.default_rng(11)
    A, B, C, _ = random_stable(rng, 3, 2, 2)
    dm = make_dlm(A, B, C)
    kw = dict(horizon=10, control_horizon=3, cv={"y0": {"high": 0.4}},
              mv={"u0": {"low": -1.0, "high": 1.0, "max_move": 0.3}})
    off = mp.PredictiveController(dm, **kw).build()
    on = mp.PredictiveController(dm, setpoint_preview=True, **kw).build()
    assert off.preview_samples == 0 and on.preview_samples == 11
    x = rng.standard_normal(3)
    tg = free_targets(2, 2, sp=[0.5, -0.2])
    base = off.plan(x, tg)["u_plan"]
    np.testing.assert_allclose(on.plan(x, tg, setpoint_program=np.tile([0.5, -0.2], (4, 1)))
                               ["u_plan"], base, rtol=0, atol=1e-12)
    # (a repeat may take the steady target by its re-used active set instead of the DAQP
    # stages: the same optimum to round-off, ~1e-12 here)
    np.testing.assert_allclose(on.plan(x, tg)["u_plan"], base, rtol=0, atol=1e-10)
    step = np.tile([0.5, -0.2], (11, 1))
    step[4:, 0] = 1.0
    np.testing.assert_allclose(off.plan(x, tg, setpoint_program=step)["u_plan"], base, rtol=0,
                               atol=1e-10)
    assert np.abs(on.plan(x, tg, setpoint_program=step)["u_plan"] - base).max() > 1e-3


def test_bad_setting_and_bad_program_are_refused():
    dm = make_dlm(np.array([[0.9]]), np.array([[1.0]]), np.array([[1.0]]))
    with pytest.raises(SettingsError, match="key 'setpoint_preview': expected true or false"):
        mp.PredictiveController.from_settings(dm, {"setpoint_preview": "yes"})
    ctrl = mp.PredictiveController(dm, horizon=5, setpoint_preview=True).build()
    ctrl.reset()
    with pytest.raises(SettingsError, match=r"key 'setpoint_program': expected shape \(n, 1\)"):
        ctrl.step(0.0, mp.Measurement.now([0.0], 0.0), np.zeros(0), free_targets(1, 1),
                  setpoint_program=np.zeros((3, 2)))
    assert ctrl.counts["steps"] == 0          # refused before anything changed


def test_known_shape_leaves_out_random_parts():
    # Reference: the signal definitions (module docstring of mpcproto.sim.signals): a step is
    # known in advance, a random walk is not (common practice, no source).
    t = np.arange(0.0, 100.0, 10.0)
    step = signal_from_spec({"kind": "step", "at": 45.0, "size": 2.0}, what="sp")
    walk = signal_from_spec({"kind": "random_walk", "step_std": 1.0, "interval": 10.0,
                             "seed": 3}, what="sp")
    both = signal_from_spec([{"kind": "step", "at": 45.0, "size": 2.0},
                             {"kind": "random_walk", "step_std": 1.0, "interval": 10.0,
                              "seed": 3}], what="sp")
    np.testing.assert_array_equal(step.known_shape(t), step.shape(t))
    np.testing.assert_array_equal(walk.known_shape(t), np.zeros_like(t))
    np.testing.assert_array_equal(both.known_shape(t), step.shape(t))
    assert np.any(both.shape(t) != step.shape(t))


class _ProgramRecorder:
    """A controller of the protocol that holds the MVs and keeps the setpoint programs it is
    handed (what the closed loop passes, seen from the controller's side)."""

    name = "recorder"
    preview_samples = 6

    def __init__(self):
        self.programs = []

    def reset(self, op, t0=0.0):
        self.u = np.asarray(op.u, float).copy()

    def step(self, t, meas, dv, targets, dv_forecast=None, *, u_applied=None,
             setpoint_program=None):
        self.programs.append((np.asarray(targets.setpoint).copy(), setpoint_program.copy()))
        return mp.ControlOutput(u=self.u.copy())


def test_closed_loop_passes_the_known_setpoint_program():
    # Reference: the setpoint signals themselves (a step known ahead; a random walk's future
    # unknown, so held at its value now; a CV without setpoint not previewed).
    scn = load_scenario(SCENARIO)
    prep = prepare(scn, ci=True)
    rec = _ProgramRecorder()
    Ts = scn.sample_time
    sps = {"level": [{"kind": "step", "at": 100.0, "size": 0.1},
                     {"kind": "random_walk", "step_std": 0.01, "interval": 10.0}],
           "concentration": {"kind": "step", "at": 120.0, "size": 0.5},
           "temperature": None}
    traj = mp.simulate(prep.plant, rec, op=prep.op, Ts=Ts, duration=200.0, rng=4,
                       setpoints=sps)
    iy = {n: j for j, n in enumerate(traj.meta["cvs"])}
    sp_conc = traj["sp.concentration"]
    sp_lev = traj["sp.level"]
    assert len(rec.programs) == len(sp_conc) == 20
    for k, (now, prog) in enumerate(rec.programs):
        assert prog.shape == (6, 3)
        np.testing.assert_array_equal(prog[0], now)
        tk = k * Ts + Ts * np.arange(6)
        # the step: known ahead, also past the end of the run
        np.testing.assert_allclose(prog[:, iy["concentration"]],
                                   sp_conc[0] + 0.5 * (tk >= 120.0), rtol=0, atol=1e-12)
        # step + random walk: the step ahead, the walk held at its value now
        np.testing.assert_allclose(prog[:, iy["level"]],
                                   sp_lev[k] + 0.1 * ((tk >= 100.0) - float(k * Ts >= 100.0)),
                                   rtol=0, atol=1e-12)
        assert np.all(np.isnan(prog[:, iy["temperature"]]))
    assert np.any(np.diff(sp_lev[:9]) != 0)          # the walk did move (before the step)


def _level_runs():
    scn = load_scenario(SCENARIO)
    prep = prepare(scn, ci=True)
    spec = scn.data["controllers"]["mpc"]
    out = {}
    for preview in (False, True):
        ctl = build_controller("mpc", dict(spec, setpoint_preview=preview), prep, cache=False)
        out[preview] = (ctl, mp.simulate(prep.plant, ctl, op=prep.op, Ts=scn.sample_time,
                                         duration=prep.duration, rng=scn.seed, **prep.sim))
    return scn, out


def test_closed_loop_anticipates_the_change_and_lowers_the_iae():
    # Reference: the closed loop itself, with and without preview, on our recipe-change
    # scenario (level step of 0.1 m at 1500 s, seen 30 samples = 300 s ahead).  With preview
    # the level leaves its old setpoint before the step, within the prediction horizon; without
    # it only after.  IAE (sum |y - sp| Ts over the run, Seborg, Edgar & Mellichamp, from
    # memory) is lower with preview for the level and summed over the CVs in their scales.
    scn, runs = _level_runs()
    Ts, t_step, size = scn.sample_time, 1500.0, 0.1
    first, iae = {}, {}
    for preview, (ctl, traj) in runs.items():
        assert traj.status == "completed"
        t = traj.t
        y, sp = traj["y.level"], traj["sp.level"]
        before = t < t_step - ctl._N * Ts - 1e-9
        y0 = np.mean(y[(t > t_step - ctl._N * Ts - 400.0) & before])
        moved = (np.abs(y - y0) > 0.05 * size) & (t > 1000.0)
        first[preview] = float(t[np.argmax(moved)])
        scales = ctl._resolved["cv_scale"]
        iae[preview] = {cv: float(np.sum(np.abs(traj[f"y.{cv}"] - traj[f"sp.{cv}"])) * Ts)
                        for cv in traj.meta["cvs"]}
        iae[preview]["scaled_sum"] = sum(iae[preview][cv] / scales[j]
                                         for j, cv in enumerate(traj.meta["cvs"]))
    N_time = runs[True][0]._N * Ts
    assert first[False] >= t_step
    assert t_step - N_time <= first[True] < t_step - 60.0, first
    assert iae[True]["level"] < 0.8 * iae[False]["level"], iae
    assert iae[True]["scaled_sum"] < 0.8 * iae[False]["scaled_sum"], iae
