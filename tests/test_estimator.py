"""Offset-free estimator: Kalman gain, late analyzer values, bad values, disturbance estimates."""

from __future__ import annotations

import numpy as np
import pytest

import mpcproto as mp


def two_cv_model(Ts=1.0):
    """A 3-state unit with two MVs, one DV, a fast CV and a slow (analyzer) CV."""
    A = np.array([[0.85, 0.10, 0.0], [0.0, 0.9, 0.05], [0.0, 0.0, 0.7]])
    B = np.array([[0.2, 0.0], [0.0, 0.1], [0.3, 0.2]])
    Bd = np.array([[0.1], [0.05], [0.0]])
    C = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.5]])
    op = mp.OperatingPoint(model="unit", x=np.zeros(3), u=np.zeros(2), d=np.zeros(1),
                           y=np.zeros(2), p=np.zeros(0), state_names=("a", "b", "c"),
                           mv_names=("feed", "steam"), dv_names=("load",),
                           cv_names=("flow", "purity"))
    return mp.DiscreteLinearModel(A=A, B=B, Bd=Bd, C=C, D=np.zeros((2, 2)), Dd=np.zeros((2, 1)),
                                  Ts=Ts, op=op, state_names=("a", "b", "c"), n_plant_states=3)


def test_gain_and_covariance_match_python_control_dlqe():
    # Reference: python-control's dlqe (discrete linear quadratic estimator): the prior
    # covariance P solves the filter Riccati equation and the predictor gain is A P C'(CPC'+R)^-1.
    import control

    m = two_cv_model()
    est = mp.DisturbanceEstimator(m, disturbance={"flow": "output", "purity": "input"},
                                  state_noise=1e-3, disturbance_noise={"flow": 1e-2, "purity": 1e-3},
                                  measurement_noise={"flow": 1e-2, "purity": 4e-2}).build()
    Q = np.diag([1e-3] * 3 + [1e-2, 1e-3])
    R = np.diag([1e-2, 4e-2])
    L, P, _ = control.dlqe(est.A_, np.eye(5), est.C_, Q, R)
    np.testing.assert_allclose(est.P_, P, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(est.A_ @ est.gain_, L, rtol=1e-8, atol=1e-12)


def _simulate(m, n, rng):
    """Plant with an unmeasured load step and measurement noise; returns inputs and outputs."""
    x = np.zeros(m.nx)
    U = rng.normal(scale=0.5, size=(n, m.nu))
    Y = np.zeros((n, m.ny))
    for k in range(n):
        d = np.array([1.0 if k >= 10 else 0.0])
        Y[k] = m.C @ x + rng.normal(scale=0.01, size=m.ny)
        x = m.A @ x + m.B @ U[k] + m.Bd @ d
    return U, Y


def test_late_analyzer_value_is_used_at_the_time_it_was_taken():
    # Reference: the Kalman filter recursion (Kalman 1960) with each measurement applied at its
    # own sample: once a late value has arrived, the estimate must be exactly the one of a filter
    # that had the value on time (same data, same order of corrections), and differ from using
    # the value as if it had been taken at arrival.
    m = two_cv_model()
    rng = np.random.default_rng(42)
    n, every, delay = 60, 5, 3
    U, Y = _simulate(m, n, rng)

    def run(mode):
        est = mp.DisturbanceEstimator(m, history=20).build()
        est.reset(None, 0.0)
        states = []
        for k in range(n):
            y = np.array([Y[k, 0], np.nan])
            taken = np.array([float(k), np.nan])
            fresh = np.array([True, False])
            if mode == "on_time" and k % every == 0:
                y[1], taken[1], fresh[1] = Y[k, 1], float(k), True
            if mode in ("late", "naive") and k >= delay and (k - delay) % every == 0:
                j = k - delay
                y[1], fresh[1] = Y[j, 1], True
                taken[1] = float(j) if mode == "late" else float(k)
            info = est.update(float(k), y, taken, fresh, np.zeros(1))
            if mode == "late" and fresh[1]:
                assert info["late"] == [1]
            states.append(np.concatenate([est.state, est.disturbance_estimate]))
            est.predict(U[k])
        return np.array(states), est

    on_time, _ = run("on_time")
    late, est_late = run("late")
    naive, _ = run("naive")
    arrivals = [k for k in range(n) if k >= delay and (k - delay) % every == 0]
    for k in arrivals:
        np.testing.assert_allclose(late[k], on_time[k], rtol=1e-12, atol=1e-12)
        # after every arrival until the next sample of the analyzer both filters agree
    assert est_late.counts["late_used"] == len(arrivals)
    assert np.max(np.abs(naive[arrivals[-1]] - on_time[arrivals[-1]])) > 1e-4


def test_too_old_values_are_dropped_and_counted():
    m = two_cv_model()
    est = mp.DisturbanceEstimator(m, history=5).build()
    est.reset(None, 0.0)
    for k in range(10):
        est.update(float(k), np.zeros(2), np.full(2, float(k)), np.ones(2, bool), np.zeros(1))
        est.predict(np.zeros(2))
    info = est.update(10.0, np.array([0.0, 1.0]), np.array([10.0, 2.0]), np.ones(2, bool),
                      np.zeros(1))
    assert info["too_old"] == [1] and est.counts["too_old"] == 1


def test_non_finite_values_are_rejected_and_flagged_by_the_controller():
    # Reference: common practice, no source -- a bad reading must not reach the estimate.
    m = two_cv_model()
    ctrl = mp.PredictiveController(m, horizon=8).build()
    ctrl.reset()
    tg = mp.Targets(setpoint=np.zeros(2), cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=np.full(2, -1.0), mv_high=np.full(2, 1.0))
    for k, bad in enumerate([np.nan, np.inf, -np.inf]):
        y = np.array([0.0, bad])
        out = ctrl.step(float(k), mp.Measurement.now(y, float(k)), [0.0], tg)
        assert out.diagnostics["rejected_measurements"] == ["purity"]
        # the step's answer is accepted, and its status says a reading was rejected
        assert np.all(np.isfinite(out.u)) and out.status == "measurement_rejected"
        assert out.diagnostics["n_rejected_measurements"] == 1
        assert np.all(np.isfinite(ctrl.estimator_.state))
    assert ctrl.counts["rejected_measurements"] == 3


@pytest.mark.parametrize("kind", ["output", "input"])
def test_disturbance_estimate_converges_to_a_constant_sensor_bias(kind):
    # Reference: offset-free estimation (Pannocchia & Rawlings 2003): for a constant disturbance
    # the augmented filter's predicted outputs converge to the measurements; for an output
    # model the disturbance estimate equals the bias itself.
    m = two_cv_model()
    est = mp.DisturbanceEstimator(m, disturbance=kind).build()
    est.reset(None, 0.0)
    bias = np.array([0.3, -0.2])
    for k in range(400):
        est.update(float(k), bias, np.full(2, float(k)), np.ones(2, bool), np.zeros(1))
        est.predict(np.zeros(2))
    yhat = est.C_ @ np.concatenate([est.state, est.disturbance_estimate])
    np.testing.assert_allclose(yhat, bias, atol=1e-6)
    if kind == "output":
        np.testing.assert_allclose(est.disturbance_estimate, bias, atol=1e-6)
