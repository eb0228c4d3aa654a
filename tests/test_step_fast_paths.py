"""The controller step's cheap common paths give what the general ones give.

The step keeps a lean path for the usual sample (every CV measured now, nothing at a limit,
targets unchanged) beside the general code.  Each check here drives both through the real
components and compares them with an outside reference: the textbook Kalman filter recursion
with per-sample measurement masks, the rule of the MV projection written with ``np.clip``, and
the controller's limit intersection written out from its definition.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.control.limits import limit_activity, project_command, project_with_activity
from mpcproto.control.mpc_results import StepDiagnostics, blank_diagnostics


def feedthrough_model(Ts=1.0):
    """A 3-state unit with two MVs, one DV and direct terms everywhere (D, Dd, Bd not zero):
    the common path's correction and prediction must carry all of them."""
    A = np.array([[0.85, 0.10, 0.0], [0.0, 0.9, 0.05], [0.0, 0.0, 0.7]])
    B = np.array([[0.2, 0.0], [0.0, 0.1], [0.3, 0.2]])
    Bd = np.array([[0.1], [0.05], [0.0]])
    C = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.5]])
    D = np.array([[0.05, 0.0], [0.0, -0.02]])
    Dd = np.array([[0.03], [0.0]])
    op = mp.OperatingPoint(model="unit", x=np.zeros(3), u=np.zeros(2), d=np.zeros(1),
                           y=np.zeros(2), p=np.zeros(0), state_names=("a", "b", "c"),
                           mv_names=("feed", "steam"), dv_names=("load",),
                           cv_names=("flow", "purity"))
    return mp.DiscreteLinearModel(A=A, B=B, Bd=Bd, C=C, D=D, Dd=Dd, Ts=Ts, op=op,
                                  state_names=("a", "b", "c"), n_plant_states=3)


def masked_kalman_pass(est, Y, M, U, Dv):
    """Reference: the steady-state Kalman filter run forward from sample 0 with the values
    each sample holds (Kalman 1960; the gain of a measured subset S is P C_S' (C_S P C_S' +
    R_S)^-1 with the steady-state prior P, the estimator's documented approximation):
    ``post_j = prior_j + L_S (y_j - C prior_j - D u_{j-1} - Dd d_j)_S`` and
    ``prior_{j+1} = A post_j + B u_j + Bd d_j``, the input before sample 0 zero.  Returns the
    posterior of the last sample."""
    A, B, Bd, C, P, R = est.A_, est.Ba_, est.Bda_, est.C_, est.P_, est.R_
    D, Dd = est.D_, est.Dd_
    x = np.zeros(A.shape[0])
    u_before = np.zeros(B.shape[1])
    for j in range(len(Y)):
        S = M[j]
        if S.any():
            Cs = C[S]
            L = P @ Cs.T @ np.linalg.inv(Cs @ P @ Cs.T + R[np.ix_(S, S)])
            innov = Y[j] - C @ x - D @ u_before - Dd @ Dv[j]
            x = x + L @ innov[S]
        if j == len(Y) - 1:
            return x
        x = A @ x + B @ U[j] + Bd @ Dv[j]
        u_before = U[j]


def test_estimator_common_path_matches_the_masked_kalman_recursion():
    # Most samples take the common path (every CV measured now); mixed in are samples that take
    # the general one: an analyzer value missing, a NaN reading (rejected), a late value stored
    # at the sample it was taken (the filter re-run from there) and one older than the history
    # (dropped).  A history of 6 samples makes the ring buffers wrap many times.
    m = feedthrough_model()
    est = mp.DisturbanceEstimator(m, history=6).build()
    est.reset(None, 0.0)
    rng = np.random.default_rng(7)
    n = 90
    Ytrue = rng.normal(scale=0.3, size=(n, 2))
    U = rng.normal(scale=0.5, size=(n, 2))
    Dv = rng.normal(scale=0.2, size=(n, 1))
    Y = np.zeros((n, 2))               # what the filter holds per sample (the reference's data)
    M = np.zeros((n, 2), bool)
    common = 0
    for k in range(n):
        y, taken, fresh = Ytrue[k].copy(), np.full(2, float(k)), np.ones(2, bool)
        mode = rng.choice(["now"] * 7 + ["missing", "nan", "late", "too_old"]) if k > 2 else "now"
        want = {"rejected": [], "late": [], "too_old": []}
        if mode == "missing":
            fresh[1] = False
        elif mode == "nan":
            y[1] = np.nan
            want["rejected"] = [1]
        elif mode == "late":
            j = k - int(rng.integers(1, 4))
            y[1], taken[1] = Ytrue[j, 1] + 0.01, float(j)
            Y[j, 1], M[j, 1] = y[1], True
            want["late"] = [1]
        elif mode == "too_old":
            y[1], taken[1] = 5.0, float(k - 8)                 # older than the history: dropped
            want["too_old"] = [1]
        Y[k, 0], M[k, 0] = y[0], True
        if fresh[1] and mode in ("now",):
            Y[k, 1], M[k, 1] = y[1], True
        info = est.update(float(k), y, taken, fresh, Dv[k])
        common += mode == "now"
        assert {key: list(info[key]) for key in want} == want
        ref = masked_kalman_pass(est, Y[:k + 1], M[:k + 1], U[:k + 1], Dv[:k + 1])
        got = np.concatenate([est.state, est.disturbance_estimate])
        np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-12)
        x, w, finite = est.estimate()
        assert finite and np.array_equal(np.concatenate([x, w]), got)
        est.predict(U[k])
    assert 40 < common < n                      # both paths really ran


def test_estimator_predict_with_an_offset_equals_predict_of_the_difference():
    # predict(u, less=op) subtracts into the filter's own buffer: the same prior as
    # predict(u - op) (the subtraction is exact arithmetic on the same floats).
    m = feedthrough_model()
    a, b = (mp.DisturbanceEstimator(m).build() for _ in range(2))
    op = np.array([0.3, -1.2])
    for est in (a, b):
        est.reset(None, 0.0)
    for k in range(5):
        y, u = np.array([0.1 * k, -0.05 * k]), np.array([0.4 + k, -1.0])
        for est in (a, b):
            est.update(float(k), y, np.full(2, float(k)), np.ones(2, bool), np.array([0.1]))
        a.predict(u, less=op)
        b.predict(u - op)
        np.testing.assert_array_equal(a.state, b.state)
        np.testing.assert_array_equal(a.disturbance_estimate, b.disturbance_estimate)


def test_a_copied_estimator_runs_on_as_the_original():
    # A copy (copy.deepcopy, pickle) keeps its own ring buffers: fed the same data, the copy and
    # the original give the same estimates and neither disturbs the other.
    import copy
    import pickle

    m = feedthrough_model()
    est = mp.DisturbanceEstimator(m, history=4).build()
    est.reset(None, 0.0)
    rng = np.random.default_rng(3)

    def feed(e, k, y, u):
        e.update(float(k), y, np.full(2, float(k)), np.ones(2, bool), np.array([0.1]))
        e.predict(u)

    data = [(rng.normal(size=2), rng.normal(size=2)) for _ in range(12)]
    for k in range(3):
        feed(est, k, *data[k])
    copies = [copy.deepcopy(est), pickle.loads(pickle.dumps(est))]
    for k in range(3, 12):
        for e in [est] + copies:
            feed(e, k, *data[k])
        for c in copies:
            np.testing.assert_array_equal(c.state, est.state)
            np.testing.assert_array_equal(c.disturbance_estimate, est.disturbance_estimate)
            assert c._posts[k % c._H].base is c._post      # its views are of its own buffers


@pytest.mark.parametrize("bad", [np.inf, -np.inf, np.nan])
def test_estimate_finite_flag_agrees_with_numpy_isfinite(bad):
    # Reference: numpy.isfinite over the whole estimate, for a non-finite entry at each place.
    m = feedthrough_model()
    est = mp.DisturbanceEstimator(m).build()
    for i in range(m.nx):
        x0 = np.zeros(m.nx)
        x0[i] = bad
        est.reset(x0, 0.0)
        x, w, finite = est.estimate()
        assert finite is False and not np.isfinite(np.concatenate([x, w])).all()
    est.reset(np.full(m.nx, 1e300), 0.0)
    assert est.estimate()[2] is True


@pytest.mark.parametrize("bad", [np.inf, -np.inf, np.nan])
def test_a_non_finite_value_measured_now_is_rejected_as_the_masked_recursion(bad):
    # Every CV fresh and taken now, one value not finite: the common path's cheap test passes
    # and the value's finiteness is read from the correction; the value must still be rejected
    # and the estimate be the masked Kalman recursion's without it (Kalman 1960, the
    # estimator's subset gain; reference: masked_kalman_pass).
    m = feedthrough_model()
    rng = np.random.default_rng(5)
    for i in range(2):
        est = mp.DisturbanceEstimator(m, history=5).build()
        est.reset(None, 0.0)
        n = 6
        Y, U, Dv = rng.normal(size=(n, 2)), rng.normal(size=(n, 2)), rng.normal(size=(n, 1))
        M = np.ones((n, 2), bool)
        for k in range(n):
            y = Y[k].copy()
            if k == 3:
                y[i], M[k, i] = bad, False
            info = est.update(float(k), y, np.full(2, float(k)), np.ones(2, bool), Dv[k])
            assert list(info["rejected"]) == ([i] if k == 3 else [])
            x, w, finite = est.estimate()
            ref = masked_kalman_pass(est, Y[:k + 1], M[:k + 1], U[:k + 1], Dv[:k + 1])
            np.testing.assert_allclose(np.concatenate([x, w]), ref, rtol=1e-9, atol=1e-12)
            assert finite is True and np.isfinite(ref).all()
            est.predict(U[k])
        assert est.counts["rejected_nonfinite"] == 1


def test_estimate_finite_flag_when_the_sum_of_a_finite_estimate_overflows():
    # Entries near the largest double (numpy.finfo) are finite although their sum is not: the
    # flag then comes from numpy.isfinite (the reference), on the common path of update too.
    m = feedthrough_model()
    est = mp.DisturbanceEstimator(m).build()
    big = np.finfo(float).max / 2
    est.reset(np.full(m.nx, big), 0.0)
    x, w, finite = est.estimate()
    assert finite is True and np.isfinite(np.concatenate([x, w])).all()
    est.update(0.0, np.zeros(2), np.zeros(2), np.ones(2, bool), np.zeros(1))
    x, w, finite = est.estimate()
    assert finite is bool(np.isfinite(np.concatenate([x, w])).all())
    assert finite is True


# ------------------------------------------------------------------ the projection
def clip_rule(u, p, lo, hi, r):
    """Reference (common practice, no source): the rate window around the previous MV, then the
    hard limits, which win: ``clip(clip(u, p - r, p + r), lo, hi)``; a NaN request holds."""
    u = np.where(np.isnan(u), p, u)
    return np.clip(np.clip(u, p - r, p + r), lo, hi)


def test_projection_summary_equals_the_clip_rule_and_the_general_projection():
    rng = np.random.default_rng(11)
    for _ in range(400):
        n = int(rng.integers(1, 6))
        lo = rng.uniform(-2.0, 1.0, n)
        hi = lo + rng.uniform(0.0, 2.0, n) * (rng.random(n) > 0.1)     # some one-point ranges
        p = rng.uniform(-4.0, 4.0, n)                    # often outside the limits (crossing)
        r = rng.uniform(0.0, 1.5, n)
        u = p + rng.normal(scale=1.5, size=n)
        pick = rng.random(n)
        u[pick < 0.1] = np.nan                           # no request: hold
        r[(pick > 0.9)] = np.inf                         # no rate limit
        near = rng.random(n) < 0.2                       # commands that sit on a limit
        u[near] = hi[near]
        out, clipped, at_limit, n_rate, n_over = project_with_activity(u, p, lo, hi, r,
                                                                       summary=True)
        np.testing.assert_array_equal(out, clip_rule(u, p, lo, hi, r))
        general = project_command(u, p, lo, hi, r)
        np.testing.assert_array_equal(out, general)
        act, rate_, over = limit_activity(general, p, lo, hi, r)
        assert at_limit == np.flatnonzero(act).tolist()
        assert (n_rate, n_over) == (int(rate_.sum()), int(over.sum()))
        want = float(np.abs(general - u).max(initial=0.0))
        assert clipped == want or (math.isnan(clipped) and math.isnan(want))
        # the same from lists of floats (the controller's own form)
        again = project_with_activity(u.tolist(), p.tolist(), lo.tolist(), hi.tolist(),
                                      r.tolist(), summary=True)
        np.testing.assert_array_equal(again[0], out)
        assert again[1:] == (clipped, at_limit, n_rate, n_over) or math.isnan(clipped)
        # mixed forms: a list request with an array of previous MVs (the controller's), and
        # limits some as lists, some as arrays (converted)
        mixed = project_with_activity(u.tolist(), p, lo.tolist(), hi, r.tolist(), summary=True)
        np.testing.assert_array_equal(mixed[0], out)
        assert mixed[1:] == (clipped, at_limit, n_rate, n_over) or math.isnan(clipped)


def test_projection_summary_nan_cases_and_refusals_as_the_general_projection():
    nan = math.nan
    # no request and no previous MV: no command (NaN), and the difference is NaN (numpy's max)
    out, clipped, at_limit, n_rate, n_over = project_with_activity(
        [nan, 0.5], [nan, 0.2], [0.0, 0.0], [1.0, 1.0], [0.1, 0.1], summary=True)
    assert math.isnan(out[0]) and out[1] == pytest.approx(0.3)
    assert math.isnan(clipped) and at_limit == [] and (n_rate, n_over) == (1, 0)
    # NaN limits and rates are none
    out, clipped, *_ = project_with_activity([3.0], [0.0], [nan], [nan], [nan], summary=True)
    assert out.tolist() == [3.0] and clipped == 0.0
    for args in (([0.0, 0.0], [0.0, 0.0], [0.0, 2.0], [1.0, 1.0], [1.0, 1.0]),
                 ([0.0], [0.0], [0.0], [1.0], [-1.0])):
        with pytest.raises(mp.SettingsError) as general:
            project_command(*args, what="X")
        with pytest.raises(mp.SettingsError) as lean:
            project_with_activity(*args, what="X", summary=True)
        assert str(lean.value) == str(general.value)
        assert (lean.value.owner, lean.value.key) == (general.value.owner, general.value.key)


# ------------------------------------------------------------------ the step's limits
def _ctrl():
    m = feedthrough_model()
    ctrl = mp.PredictiveController(m, horizon=8, mv={"feed": {"low": -2.0, "high": 2.0},
                                                     "steam": {"max_move": 0.5}}).build()
    ctrl.reset()
    return ctrl


def _targets(**kw):
    base = dict(setpoint=np.array([1.0, np.nan]), cv_low=np.array([-np.inf, -1.0]),
                cv_high=np.array([np.inf, 1.0]), mv_low=np.full(2, -5.0),
                mv_high=np.full(2, 5.0))
    base.update(kw)
    return mp.Targets(**base)


def test_step_limits_follow_targets_changed_in_place_and_stay_refused():
    # Reference: the limits' definition -- the targets intersected with the settings
    # (max of the low limits, min of the high ones, the smaller rate).
    ctrl = _ctrl()
    tg = _targets(mv_rate=np.array([1.0, 1.0]))
    first = ctrl._limits(tg)
    np.testing.assert_array_equal(first[0], [-2.0, -5.0])
    np.testing.assert_array_equal(first[1], [2.0, 5.0])
    np.testing.assert_array_equal(first[2], [1.0, 0.5])
    assert not first[0].flags.writeable                  # handed out again: read-only
    tg.mv_high[:] = [0.25, 0.1]                          # the caller's arrays changed in place
    tg.mv_rate[0] = 0.05
    tg.cv_low[1] = -0.5
    second = ctrl._limits(tg)
    np.testing.assert_array_equal(second[1], [0.25, 0.1])
    np.testing.assert_array_equal(second[2], [0.05, 0.5])
    np.testing.assert_array_equal(second[3], [-np.inf, -0.5])
    out = ctrl.step(0.0, mp.Measurement.now(np.zeros(2), 0.0), [0.0], tg)
    assert np.all(out.u <= [0.25, 0.1])                  # the changed hard limits hold
    assert np.all(np.abs(out.u) <= [0.05, 0.5])          # and the changed rate (from 0)
    # the activity counted against the changed rate (definition: |move - rate| <= 1e-6 max(1, |u|))
    at_rate = np.abs(np.abs(out.u) - [0.05, 0.5]) <= 1e-6 * np.maximum(1.0, np.abs(out.u))
    assert out.diagnostics["active_rate_limits"] == int(at_rate.sum()) >= 1
    bad = _targets(mv_low=np.array([3.0, 0.0]))         # low above the settings' high limit
    for _ in range(2):                                   # refused every time, not remembered
        with pytest.raises(mp.SettingsError) as e:
            ctrl._limits(bad)
        assert e.value.key == "targets.mv_low.feed"
    tg.mv_rate[1] = 0.0
    for _ in range(2):
        with pytest.raises(mp.SettingsError) as e:
            ctrl._limits(tg)
        assert e.value.key == "targets.mv_rate.steam"


def test_step_diagnostics_of_the_common_path_read_as_a_fresh_mapping():
    blank = blank_diagnostics()
    assert isinstance(blank, StepDiagnostics) and len(blank) == 0 and blank.to_dict() == {}
    assert blank.get("solve_ms", "none") == "none"
    ctrl = _ctrl()
    tg = _targets()
    outs = [ctrl.step(float(k), mp.Measurement.now(np.zeros(2), float(k)), [0.0], tg)
            for k in range(3)]
    d0, d1 = outs[0].diagnostics, outs[1].diagnostics
    assert d0 is not d1 and d0.relaxed_cvs is not d1.relaxed_cvs
    assert d0.rejected_measurements == [] and d0["n_rejected_measurements"] == 0
    assert d0["counts"]["steps"] == 1 and d1["counts"]["steps"] == 2   # copies, not one dict
    assert d0["slack_max"] == 0.0 and d0["cv_limits_relaxed"] is False
    # the MVs sent are the caller's to keep: changing them changes nothing in the controller
    u_prev = ctrl._u_prev.copy()
    outs[-1].u[:] = 99.0
    np.testing.assert_array_equal(ctrl._u_prev, u_prev)
