"""Exact dead times: the plant's own whatever the sample time, and the controller's discrete model.

References used here:

* FOPDT step response ``y = K M (1 - exp(-(t - theta)/tau))`` for ``t > theta``, 0 before
  (common practice, no source).
* Overdamped second-order step response
  ``y = K M (1 - (tau1 exp(-t/tau1) - tau2 exp(-t/tau2)) / (tau1 - tau2))`` (Seborg, Edgar &
  Mellichamp, Process Dynamics and Control, second-order step response; from memory), shifted by
  the dead time.
* The split-sample (modified z-transform) discrete FOPDT: closed form derived below, in
  :func:`fopdt_split_coefficients`; the discrete model's transfer function is read back with
  ``scipy.signal.ss2tf`` (reference library).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.signal as sig

import mpcproto as mp
from mpcproto.sim import OpenLoop


def fopdt_split_coefficients(K: float, tau: float, theta: float, Ts: float):
    """(a, b1, b2, d) of y[k+1] = a y[k] + b1 u[k-d] + b2 u[k-d-1] for K e^{-theta s}/(tau s + 1).

    Derivation: write theta = (d + eps) Ts with d whole and 0 <= eps < 1.  With u held over each
    sample, over [k Ts, (k+1) Ts) the delayed input is u[k-d-1] for the first eps Ts and u[k-d]
    for the remaining (1 - eps) Ts.  Solving tau dy/dt = -y + K v piece by piece with v constant:
    after a time h, y -> exp(-h/tau) y + K (1 - exp(-h/tau)) v.  Chaining the two pieces:
        y[k+1] = a y[k] + K (1 - exp(-(1-eps) Ts/tau)) u[k-d]
                        + K (exp(-(1-eps) Ts/tau) - a) u[k-d-1],   a = exp(-Ts/tau),
    i.e. G(z) = (b1 z^-1 + b2 z^-2) z^-d / (1 - a z^-1).
    """
    r = theta / Ts
    d = int(math.floor(r + 1e-12))
    eps = r - d
    a = math.exp(-Ts / tau)
    m = math.exp(-(1 - eps) * Ts / tau)
    return a, K * (1 - m), K * (m - a), d


def fopdt_step(t, K, tau, theta, size=1.0):
    return np.where(t > theta, size * K * (1 - np.exp(-(np.asarray(t) - theta) / tau)), 0.0)


@pytest.mark.parametrize("K, tau, theta, Ts", [
    (2.0, 5.0, 2.7, 1.0),          # d = 2, eps = 0.7
    (-18.9, 21.0, 3.0, 2.5),       # Wood & Berry steam -> top at 2.5 min: d = 1, eps = 0.2
    (3.8, 14.9, 8.1, 5.0),         # Wood & Berry feed -> top at 5 min: d = 1, eps = 0.62
    (1.0, 3.0, 0.4, 1.0),          # less than one sample: d = 0, eps = 0.4
    (6.6, 10.9, 7.0, 1.0),         # whole samples: b2 = 0
])
def test_discrete_fopdt_with_fractional_delay_has_the_split_sample_coefficients(K, tau, theta, Ts):
    m = mp.transfer_matrix_model("el", mvs=["u"], cvs=["y"],
                                 elements={"y": {"u": {"gain": K, "tau": tau, "dead_time": theta}}})
    lin = mp.linearize(m, mp.steady_state(m))
    with warnings.catch_warnings():
        warnings.simplefilter("error")          # exact is the default: nothing rounded, no warning
        dm = lin.discretize(Ts)
    a, b1, b2, d = fopdt_split_coefficients(K, tau, theta, Ts)
    num, den = sig.ss2tf(dm.A, dm.B, dm.C, dm.D)
    # expected: numerator (b1 z^-1 + b2 z^-2) z^-d over (1 - a z^-1), as polynomials in z of the
    # discrete model's order n: den = z^(n-1) (z - a); num = z^(n-2-d) (b1 z + b2)
    n = dm.nx
    den_ref = np.zeros(n + 1)
    den_ref[0], den_ref[1] = 1.0, -a
    num_ref = np.zeros(n + 1)
    num_ref[1 + d] = b1
    if d + 2 <= n:
        num_ref[2 + d] = b2
    else:
        assert b2 == pytest.approx(0.0, abs=1e-15)
    np.testing.assert_allclose(den, den_ref, atol=1e-12)
    np.testing.assert_allclose(num[0], num_ref, atol=1e-12 * abs(K))
    # step invariance: at the sampling instants the discrete step equals the continuous one
    _, Y = dm.simulate(np.ones((40, 1)))
    np.testing.assert_allclose(Y[:, 0], fopdt_step(np.arange(40) * Ts, K, tau, theta),
                               atol=1e-12 * abs(K))


def test_discrete_sopdt_with_fractional_delay_follows_the_continuous_step():
    K, t1, t2, theta, Ts = 1.5, 8.0, 3.0, 4.3, 1.0
    m = mp.transfer_matrix_model("el2", mvs=["u"], cvs=["y"],
                                 elements={"y": {"u": {"gain": K, "time_constants": [t1, t2],
                                                       "dead_time": theta}}})
    dm = mp.linearize(m, mp.steady_state(m)).discretize(Ts)
    _, Y = dm.simulate(np.ones((60, 1)))
    t = np.arange(60) * Ts
    s = np.maximum(t - theta, 0.0)
    ref = np.where(t > theta, K * (1 - (t1 * np.exp(-s / t1) - t2 * np.exp(-s / t2)) / (t1 - t2)), 0.0)
    np.testing.assert_allclose(Y[:, 0], ref, atol=1e-12)
    # the same element in the plant: the exact stepper and cvodes
    op = mp.steady_state(m)
    for integrator, tol in (("exact", 1e-12), ("cvodes", 1e-6)):
        tr = mp.simulate(m, OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 0.0, "size": 1.0}}),
                         op=op, Ts=Ts, duration=60.0, integrator=integrator)
        np.testing.assert_allclose(tr.series("y", "y"), ref, atol=tol)


def test_round_policy_is_explicit_and_warned_refuse_refuses():
    m = mp.transfer_matrix_model("el", mvs=["u"], cvs=["y"],
                                 elements={"y": {"u": {"gain": 2.0, "tau": 5.0, "dead_time": 2.7}}})
    lin = mp.linearize(m, mp.steady_state(m))
    with pytest.warns(UserWarning, match=r"dead time on 'u' = 2.7 is not a multiple .* rounded to 3"):
        dr = lin.discretize(1.0, dead_time="round")
    assert dr.state_names.count("u[k-3]") == 1 and dr.nx == 4
    with pytest.raises(mp.SettingsError, match=r"'u' = 2.7, not a multiple of the sample time 1"):
        lin.discretize(1.0, dead_time="refuse")
    de = lin.discretize(1.0)
    assert de.state_names == ("y__u_1", "u[k-1]", "u[k-2]", "u[k-3]")   # taps u[k-2] and u[k-3]


def wood_berry_step(t, dR, dS, dF):
    """Analytic Wood & Berry response (gains, time constants, dead times of the model library's
    table, Wood & Berry 1973 from memory) to steps dR, dS, dF at t = 0, as deviations."""
    top = (fopdt_step(t, 12.8, 16.7, 1.0, dR) + fopdt_step(t, -18.9, 21.0, 3.0, dS)
           + fopdt_step(t, 3.8, 14.9, 8.1, dF))
    bot = (fopdt_step(t, 6.6, 10.9, 7.0, dR) + fopdt_step(t, -19.4, 14.4, 3.0, dS)
           + fopdt_step(t, 4.9, 13.2, 3.4, dF))
    return np.column_stack([top, bot])


@pytest.mark.parametrize("integrator, tol", [("exact", 1e-11), ("cvodes", 2e-6)])
def test_wood_berry_plant_dead_times_do_not_depend_on_the_sample_time(integrator, tol):
    # The plant's dead times 1, 3, 7, 8.1 and 3.4 min stay what they are at Ts = 1, 2.5 and 5 min
    # (formerly rounded to [0, 5, 5, 10, 5] min at Ts = 5): the step responses agree at the common
    # instants (multiples of 5 min) and follow the analytic FOPDT sums at every sample.
    m = mp.make_model("wood_berry")
    op = mp.steady_state(m)
    dR, dS, dF = 0.1, -0.05, 0.3
    at_common = {}
    for Ts in (1.0, 2.5, 5.0):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            tr = mp.simulate(m, OpenLoop(m.mv_names, {"reflux": {"kind": "step", "at": 0.0, "size": dR},
                                                      "steam": {"kind": "step", "at": 0.0, "size": dS}}),
                             op=op, Ts=Ts, duration=60.0, integrator=integrator,
                             dvs={"feed": {"kind": "step", "at": 0.0, "size": dF}})
        Y = np.column_stack([tr.series("y", c) for c in m.cv_names]) - op.y
        np.testing.assert_allclose(Y, wood_berry_step(tr.t, dR, dS, dF), atol=tol)
        common = np.isclose(np.mod(tr.t, 5.0), 0.0)
        at_common[Ts] = Y[common]
    np.testing.assert_allclose(at_common[1.0], at_common[5.0], atol=2 * tol)
    np.testing.assert_allclose(at_common[2.5], at_common[5.0], atol=2 * tol)


def test_controller_model_and_plant_agree_on_fractional_dead_times():
    # the discretized linear model (split-sample taps) and the plant (split integration) are two
    # independent computations of the same sampled response
    m = mp.make_model("wood_berry")
    op = mp.steady_state(m)
    dm = mp.linearize(m, op).discretize(5.0)
    N = 14
    u = np.zeros((N, 2))
    u[2:, 0] = 0.1
    u[6:, 1] = -0.05
    dd = np.zeros((N, 1))
    dd[3:, 0] = 0.3
    _, Ylin = dm.simulate(u, dd)
    plant = mp.sim.Plant(m, 5.0, integrator="cvodes", options={"abstol": 1e-12, "reltol": 1e-12})
    plant.reset(op.x, op.u, op.d)
    Ypl = np.zeros((N, 2))
    for k in range(N):
        Ypl[k] = plant.output(op.u + u[k], op.d + dd[k]) - op.y
        plant.advance(op.u + u[k], op.d + dd[k])
    np.testing.assert_allclose(Ypl, Ylin, atol=1e-9)


def test_exact_plant_equals_cvodes_plant_in_closed_loop():
    m = mp.make_model("wood_berry")
    op = mp.steady_state(m)
    ctl = mp.PIDController.for_model(m, [mp.PIDLoop("top_composition", "reflux", 0.2, 10.0)])
    kw = dict(op=op, Ts=2.5, duration=100.0, setpoints={"top_composition": {"kind": "step", "at": 5.0,
                                                                             "size": 0.5}},
              dvs={"feed": {"kind": "step", "at": 40.0, "size": 0.2}})
    a = mp.simulate(m, ctl, integrator="exact", **kw)
    b = mp.simulate(m, ctl, integrator="cvodes", integrator_options={"abstol": 1e-12, "reltol": 1e-12}, **kw)
    assert a.meta["integrator"] == "exact" and a.success and b.success
    for c in m.cv_names:
        np.testing.assert_allclose(a.series("y", c), b.series("y", c), atol=1e-8)


def test_pure_gain_and_dead_time_elements_need_no_state():
    # y = K u(t - theta): a matrix of such elements is a model without states; the plant steps it
    # exactly and the controller's model has only delay taps
    m = mp.transfer_matrix_model("pure", mvs=["u", "v"], cvs=["y", "w"],
                                 elements={"y": {"u": {"gain": 3.0, "dead_time": 2.5},
                                                 "v": {"gain": 1.0, "dead_time": 1.0}},
                                           "w": {"v": {"gain": -1.0, "dead_time": 0.3}}})
    assert m.nx == 0 and m.nz == 3 and m.is_linear_
    op = mp.steady_state(m)
    for integrator in ("exact", "cvodes"):        # cvodes: no state to integrate, outputs only
        tr = mp.simulate(m, OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 0.0, "size": 1.0},
                                                  "v": {"kind": "step", "at": 2.0, "size": 2.0}}),
                         op=op, Ts=1.0, duration=8.0, integrator=integrator)
        t = tr.t
        # held inputs are right-continuous: v(t - 1) at t = 3 is v's value from t = 2 on
        np.testing.assert_allclose(tr.series("y", "y"), 3.0 * (t >= 2.5) + 2.0 * (t >= 3.0))
        np.testing.assert_allclose(tr.series("y", "w"), -2.0 * (t >= 2.3))
    dm = mp.linearize(m, op).discretize(1.0)
    _, Y = dm.simulate(np.tile([1.0, 0.0], (6, 1)))
    np.testing.assert_allclose(Y[:, 0], 3.0 * (np.arange(6) > 2.5))
    # an MPC on the stateless model (delay taps only) reaches a setpoint through the dead times
    # (offset-free MPC, Pannocchia & Rawlings 2003, as in tests/test_mpc.py)
    ctrl = mp.PredictiveController(dm, horizon=20, control_horizon=4).build()
    tr = mp.simulate(m, ctrl, op=op, Ts=1.0, duration=40.0,
                     setpoints={"y": {"kind": "step", "at": 2.0, "size": 1.0}})
    assert tr.success
    assert tr.series("y", "y")[-1] == pytest.approx(1.0, abs=1e-5)
    assert tr.series("y", "w")[-1] == pytest.approx(0.0, abs=1e-5)
    with pytest.raises(mp.ModelError, match="declares no state"):
        bare = mp.Model("nothing")
        bare.mv("u", nominal=0.0)
        bare.cv("y", 2.0)
        bare.build()


@pytest.mark.filterwarnings("ignore:the dead time on 'feed'")
def test_dead_time_mismatch_study_runs_and_shows_the_cost_of_the_mismatch():
    # scenarios/wood_berry_dead_time_mismatch.toml: controllers designed on the published dead
    # times; the study runs the matched plant and one whose dead times are 20 % longer
    from pathlib import Path

    from mpcproto.scenario import expand, load_scenario, plant_model, run_case

    path = Path(__file__).resolve().parents[1] / "scenarios" / "wood_berry_dead_time_mismatch.toml"
    scn = load_scenario(path)
    plant = plant_model(scn)
    # one delay per (input, dead time): steam reaches both compositions after the same 3 min
    assert sorted(dl.dead_time for dl in plant.delays) == pytest.approx(
        sorted(1.2 * t for t in (1.0, 3.0, 7.0, 8.1, 3.4)))
    cases = {c.params["plant.parameters.dead_time_scale"]: c for c in expand(scn)}
    assert sorted(cases) == [1.0, 1.2]
    rec = {s: run_case(c) for s, c in cases.items()}
    assert all(r["status"] == "ok" and r["passed"] for r in rec.values())
    iae = {s: {lab: r["controllers"][lab]["kpi"]["cv"]["top_composition"]["iae"] for lab in ("mpc", "pid")}
           for s, r in rec.items()}
    # the MPC's prediction is off by the extra dead time: its setpoint tracking gets worse
    assert iae[1.2]["mpc"] > 1.2 * iae[1.0]["mpc"]
    # it still beats the PI loops on the top composition
    assert iae[1.2]["mpc"] < iae[1.2]["pid"]
