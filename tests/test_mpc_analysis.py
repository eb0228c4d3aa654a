"""Linear analysis of the unconstrained MPC (mpcproto.control.mpc_analysis).

References: scipy.linalg.solve_discrete_are (LQR gain and cost), python-control (closed-loop poles
and the frequency response of the output sensitivity), and the controller's own ``step()`` run
against a linear plant with no constraint active (the closed-loop matrix must reproduce it).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

import mpcproto as mp
from mpcproto.control.mpc_analysis import (closed_loop_matrix, optimal_cost, sensitivity_peak,
                                           unconstrained_analysis, unconstrained_law)
from mpcproto.exceptions import NotBuiltError, SettingsError

from test_mpc import free_targets, make_dlm, random_stable


def _lqr_controller(rng, N):
    A, B, _, _ = random_stable(rng, 3, 2, 3)
    dm = make_dlm(A, B, np.eye(3))
    qw, rw = np.array([1.0, 2.0, 0.5]), np.array([0.3, 0.7])
    ctrl = mp.PredictiveController(
        dm, horizon=N, control_horizon=N, terminal_cost=True, steady_target=True,
        cv={f"y{i}": {"weight": float(qw[i]), "scale": 1.0} for i in range(3)},
        mv={f"u{j}": {"preferred_weight": float(rw[j]), "move_weight": 0.0, "scale": 1.0}
            for j in range(2)}).build()
    return ctrl, A, B, qw, rw


@pytest.mark.parametrize("N", [1, 5, 20])
def test_unconstrained_mpc_with_riccati_terminal_weight_is_lqr_with_its_cost(N):
    # Reference: standard receding-horizon / LQR equivalence (common practice, no source): with the
    # DARE terminal weight the finite-horizon optimum equals the infinite-horizon one, so the first
    # move is -K x0 and the optimal cost (stage 0 included) is x0' P x0;
    # P, K from scipy.linalg.solve_discrete_are.
    rng = np.random.default_rng(11)
    ctrl, A, B, qw, rw = _lqr_controller(rng, N)
    P = sla.solve_discrete_are(A, B, np.diag(qw), np.diag(rw))
    K = np.linalg.solve(np.diag(rw) + B.T @ P @ B, B.T @ P @ A)
    for _ in range(3):
        x0 = rng.standard_normal(3)
        r = optimal_cost(ctrl, x0)
        np.testing.assert_allclose(r["u"], -K @ x0, rtol=1e-7, atol=1e-10)
        assert r["cost"] == pytest.approx(float(x0 @ P @ x0), rel=1e-7)
    law = unconstrained_law(ctrl)
    np.testing.assert_allclose(law.Kx, -K, rtol=1e-7, atol=1e-10)


def _simulate_step(ctrl, dm, plant, x0, sp, n):
    """MVs (deviation) of ctrl.step() against plant (A, B, C, D) from plant state x0."""
    A, B, C, D = plant
    x, up, out_u = x0.copy(), np.zeros(dm.nu), []
    ctrl.reset(dm.op)
    tg = free_targets(dm.ny, dm.nu, sp=sp)
    for k in range(n):
        y = C @ x + D @ up + dm.op.y
        o = ctrl.step(float(k), mp.Measurement.now(y, float(k)), np.zeros(dm.nd), tg)
        assert o.status == "ok" and o.diagnostics["active_mv_limits"] == 0
        u = o.u - dm.op.u
        x = A @ x + B @ u
        up = u
        out_u.append(u)
    return np.array(out_u)


@pytest.mark.parametrize("steady_target, with_d", [(True, False), (False, False), (True, True)])
def test_closed_loop_matrix_reproduces_the_controllers_own_steps(steady_target, with_d):
    # Reference: the controller's step() on a linear plant, no constraint active (independent of the
    # law's derivation): u_k from s[k+1] = Acl s[k] + Bsp sp must be the MVs step() applied, on the
    # nominal plant, with the gains x1.3 and with one more sample of dead time.
    rng = np.random.default_rng(5)
    A, B, C, _ = random_stable(rng, 3, 2, 2)
    D0 = 0.3 * rng.standard_normal((2, 2)) if with_d else np.zeros((2, 2))   # y = Cx + D u[k-1]
    dm = make_dlm(A, B, C, D=D0)
    ctrl = mp.PredictiveController(
        dm, horizon=15, control_horizon=4, steady_target=steady_target,
        cv={f"y{i}": {"weight": 1.0 + i, "scale": 1.0} for i in range(2)},
        mv={f"u{j}": {"move_weight": 0.2, "scale": 1.0} for j in range(2)}).build()
    law = unconstrained_law(ctrl)
    sp = np.array([0.5, -0.3])
    nd_ = A.shape[0]
    # plant with one more sample of dead time on each MV: states (x, u[k-1])
    Ad = np.block([[A, B], [np.zeros((2, nd_)), np.zeros((2, 2))]])
    Bd_ = np.vstack([np.zeros((nd_, 2)), np.eye(2)])
    Cd = np.hstack([C, np.zeros((2, 2))])
    plants = [(A, B, C, D0), (A, 1.3 * B, C, 1.3 * D0)]
    if not with_d:
        plants.append((Ad, Bd_, Cd, D0))
    for plant in plants:
        x0 = 0.4 * rng.standard_normal(plant[0].shape[0])
        U = _simulate_step(ctrl, dm, plant, x0, sp + dm.op.y, 25)
        Acl, Bsp = closed_loop_matrix(law, plant)
        s = np.concatenate([x0, np.zeros(Acl.shape[0] - x0.size)])
        pred = []
        for _ in range(25):
            s = Acl @ s + Bsp @ sp
            pred.append(s[-2:])
        np.testing.assert_allclose(np.array(pred), U, rtol=1e-6, atol=1e-8)


def _aggressive_siso():
    # first-order lag 0.9, gain 1 (b = 0.1); little move suppression: a near-deadbeat controller
    dm = make_dlm([[0.9]], [[0.1]], [[1.0]])
    return dm, mp.PredictiveController(
        dm, horizon=10, control_horizon=3, cv={"y0": {"weight": 1.0, "scale": 1.0}},
        mv={"u0": {"move_weight": 1e-4, "scale": 1.0}}).build()


def test_large_gain_error_on_an_aggressive_tuning_is_reported_unstable_and_diverges():
    # Reference: a near-deadbeat loop on a first-order lag loses stability when the process gain is
    # several times the model's (common practice, no source); confirmed here by running step()
    # against that plant: the MVs grow without bound.
    dm, ctrl = _aggressive_siso()
    an = unconstrained_analysis(ctrl, gain_errors=(0.7, 3.0), extra_delay=0)
    nominal, low, high = an.cases
    assert nominal.stable and an.stable and an.spectral_radius < 1
    assert low.stable and not high.stable and high.spectral_radius > 1
    assert any("x3" in w and "UNSTABLE" in w for w in an.warnings)
    plant = (dm.A, 3.0 * dm.B, dm.C, dm.D)
    U = _simulate_step(ctrl, dm, plant, np.array([0.1]), np.array([0.0]) + dm.op.y, 60)
    assert np.abs(U[-10:]).max() > 100 * np.abs(U[:10]).max()


def test_sensitivity_peak_matches_python_control_siso():
    # Reference: python-control (control.ss, control.feedback, frequency_response): the output
    # sensitivity S = 1 / (1 - P Kc) of the loop u = Kc y, its peak over a dense grid, and the
    # closed-loop poles of that interconnection against our eigenvalues.
    control = pytest.importorskip("control")
    dm = make_dlm([[0.95, 0.0], [0.05, 0.9]], [[0.05], [0.0]], [[0.0, 1.0]])
    ctrl = mp.PredictiveController(
        dm, horizon=20, control_horizon=3, cv={"y0": {"weight": 1.0, "scale": 1.0}},
        mv={"u0": {"move_weight": 0.05, "scale": 1.0}}).build()
    an = unconstrained_analysis(ctrl)
    law = an.law
    # the controller from y to u, written out here: a+ = (I - L Ca) a + L y; u = Kxa a+ + Ku up;
    # a' = Aa a+ + Ba u; up' = u (states a, up)
    na = law.Aa.shape[0]
    Kxa = np.hstack([law.Kx, law.Kw])
    E = np.eye(na) - law.L @ law.Ca
    Cc = np.hstack([Kxa @ E, law.Ku])
    Dc = Kxa @ law.L
    Ac = np.vstack([np.hstack([law.Aa @ E, np.zeros((na, 1))]) + law.Ba @ Cc, Cc])
    Bc = np.vstack([law.Aa @ law.L + law.Ba @ Dc, Dc])
    Kc = control.ss(Ac, Bc, Cc, Dc, 1.0)
    P = control.ss(dm.A, dm.B, dm.C, dm.D, 1.0)
    S = control.feedback(control.ss([], [], [], [[1.0]], 1.0), P * Kc, sign=1)
    w = np.pi * np.logspace(-5, 0, 20000)
    mag = np.abs(np.squeeze(S(np.exp(1j * w))))
    assert an.sensitivity_peak == pytest.approx(mag.max(), rel=1e-4)
    assert an.sensitivity_peak_w == pytest.approx(w[np.argmax(mag)], rel=2e-2)
    poles = np.sort_complex(control.feedback(P, Kc, sign=1).poles())
    ours = np.sort_complex(an.eigenvalues)
    np.testing.assert_allclose(np.abs(ours), np.abs(poles), atol=1e-6)
    # the peak of the raw function on the same plant agrees with the analysis
    assert sensitivity_peak(law, (dm.A, dm.B, dm.C, dm.D))[0] == pytest.approx(an.sensitivity_peak)


def test_bad_arguments_are_named():
    dm, ctrl = _aggressive_siso()
    with pytest.raises(SettingsError, match="gain_errors"):
        unconstrained_analysis(ctrl, gain_errors=(0.0,))
    with pytest.raises(SettingsError, match="extra_delay"):
        unconstrained_analysis(ctrl, extra_delay=0.5)
    with pytest.raises(SettingsError, match="extra_delay"):
        unconstrained_analysis(ctrl, extra_delay="one")
    with pytest.raises(SettingsError, match="plant"):
        unconstrained_analysis(ctrl, plant=(np.eye(2), np.ones((2, 2)), np.eye(2), np.zeros((2, 2))))
    with pytest.raises(NotBuiltError):
        unconstrained_analysis(mp.PredictiveController(dm))


def test_assess_prints_the_mpc_mismatch_table(capsys):
    # the Wood & Berry scenario's MPC through the CLI: the section and its JSON keys are present and
    # the nominal loop is stable (its spectral radius below 1)
    from mpcproto.cli import main

    import json

    rc = main(["assess", "scenarios/wood_berry_column.toml", "--json"])
    rep = json.loads(capsys.readouterr().out)
    assert rc == 0
    mpc = rep["mpc"]
    assert mpc["stable"] and mpc["spectral_radius"] < 1
    assert [c["kind"] for c in mpc["cases"]] == ["nominal", "gain", "gain", "dead_time"]
    assert mpc["sensitivity_peak"] > 1
    rc = main(["assess", "scenarios/wood_berry_column.toml"])
    out = capsys.readouterr().out
    assert rc == 0 and "MV gains x0.7" in out and "dead time +1 sample" in out
    assert "sensitivity peak" in out
