"""Closed-loop simulator: analytic responses, conservation, reproducibility, failures, faults."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.sim import OpenLoop


def first_order(K=2.0, tau=50.0, dead_time=0.0):
    m = mp.Model("lag1", time_unit="s")
    k = m.parameter("gain", K)
    t = m.parameter("tau", tau, low=1e-6)
    x = m.state("x", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-10, high=10)
    m.dv("d", nominal=0.0, measured=False)
    uu = m.delayed(u, dead_time) if dead_time else u
    m.derivative(x, (k * uu - x) / t)
    m.cv("y", x, low=-100, high=100)
    return m.build()


def op_of(m, x=None, u=None, d=None):
    return mp.OperatingPoint.at(m, m.nominal("state") if x is None else x,
                                m.nominal("mv") if u is None else u,
                                m.nominal("dv") if d is None else d)


def tank_op():
    m = mp.make_model("blending_tank")
    return m, op_of(m)


def test_first_order_step_matches_analytic_solution():
    # Reference: analytic step response of dx/dt = (K u - x)/tau: x = K du (1 - exp(-(t-t1)/tau))
    K, tau, du, t1 = 2.0, 50.0, 0.5, 20.0
    m = first_order(K, tau)
    tr = mp.simulate(m, OpenLoop(m.mv_names, {"u": {"kind": "step", "at": t1, "size": du}}),
                     op=op_of(m), Ts=5.0, duration=400.0)
    assert tr.success and len(tr) == 80
    t, y = tr.t, tr.series("y", "y")
    exact = np.where(t >= t1, K * du * (1 - np.exp(-(t - t1) / tau)), 0.0)
    # scipy-style tolerance check: |err| <= atol + rtol*|exact|, tied to the integrator tolerances
    assert np.all(np.abs(y - exact) <= 1e-7 + 1e-6 * np.abs(exact))
    # MVs are held over each sample: applied u is the commanded step
    assert np.allclose(tr.series("u", "u"), np.where(t >= t1, du, 0.0))


def test_plant_dead_time_is_exact_whatever_the_sample_time():
    # Reference: a pure transport delay shifts the analytic first-order step response by the dead
    # time: y = K du (1 - exp(-(t - t1 - theta)/tau)) for t > t1 + theta (common practice, no
    # source).  40 s is 4 samples of 10 s but 2.67 samples of 15 s and 5.71 of 7 s: the plant
    # splits the sample in which the delayed step arrives, for the cvodes and the exact stepper.
    K, tau, theta, du = 1.0, 30.0, 40.0, 1.0
    m = first_order(K, tau, dead_time=theta)
    for Ts in (10.0, 15.0, 7.0):
        for integrator in ("cvodes", "exact"):
            with warnings.catch_warnings():
                warnings.simplefilter("error")      # nothing is rounded
                tr = mp.simulate(m, OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 0.0, "size": du}}),
                                 op=op_of(m), Ts=Ts, duration=300.0, integrator=integrator)
            t, y = tr.t, tr.series("y", "y")
            exact = np.where(t > theta, K * du * (1 - np.exp(-(t - theta) / tau)), 0.0)
            # cvodes at its default tolerances (abstol 1e-9, reltol 1e-8); the exact map to rounding
            tol = 1e-6 if integrator == "cvodes" else 1e-13
            np.testing.assert_allclose(y, exact, atol=tol)
    assert mp.sim.Plant(m, 10.0).delay_split_ == [(4, 0.0)]
    n, f = mp.sim.Plant(m, 15.0).delay_split_[0]
    assert n == 2 and f == pytest.approx(2.0 / 3.0)
    with pytest.raises(mp.SettingsError, match="key 'integrator': expected a model linear .* for integrator 'exact'.*not linear"):
        mp.sim.Plant(mp.make_model("henson_seborg_cstr"), 1.0, integrator="exact")


def test_blending_tank_composition_responds_exponentially_with_time_constant_M_over_w():
    # Reference: NaOH balance M dx/dt = w1 (xc - x) - w2 x (model docstring). Stepping the water
    # feed and the draw-off by the same amount keeps M constant, so x relaxes exponentially with
    # time constant M/w (w = w1 + w2) towards w1 xc / w.
    m, op = tank_op()
    dw = 0.2
    t1 = 10.0
    kw = dict(op=op, Ts=10.0, duration=3000.0, dvs={"draw_off": {"kind": "step", "at": t1, "size": dw}})
    ol = OpenLoop(m.mv_names, {"water_flow": {"kind": "step", "at": t1, "size": dw}})
    tr = mp.simulate(m, ol, **kw)
    tight = mp.simulate(m, ol, integrator_options={"abstol": 1e-13, "reltol": 1e-12}, **kw)
    p = m.parameters
    M = p["density"] * p["area"] * op.x[0]
    w1 = op.u[0]
    w = w1 + op.u[1] + dw
    xc = op.d[1]
    x0 = op.x[1]
    x_inf = w1 * xc / w
    t = tr.t
    exact = np.where(t >= t1, x_inf + (x0 - x_inf) * np.exp(-(t - t1) / (M / w)), x0)
    assert np.allclose(tr.series("x", "h"), op.x[0], rtol=1e-9)   # hold-up really constant
    # default tolerances (abstol 1e-9 on a 0.02 fraction) accumulate over 300 samples to ~1e-6
    assert np.allclose(tr.series("y", "concentration"), 100 * exact, rtol=1e-5, atol=0)
    assert np.allclose(tight.series("y", "concentration"), 100 * exact, rtol=1e-8, atol=0)


def test_blending_tank_conserves_mass_naoh_and_energy_under_disturbances():
    # Reference: the mass, NaOH and energy balances of the model docstring (conservation laws).
    # With inputs held over each sample the mass balance closes exactly; the NaOH and energy
    # balances are checked with the trapezoid rule on a 1 s grid (error O(Ts^2)).
    m, op = tank_op()
    Ts = 1.0
    loops = [mp.PIDLoop("level", "water_flow", gain=5.0, integral_time=300.0),
             mp.PIDLoop("temperature", "heater_duty", gain=30.0, integral_time=600.0)]
    tr = mp.simulate(m, mp.PIDController.for_model(m, loops), op=op, Ts=Ts, duration=1800.0, rng=4,
                     dvs={"draw_off": [{"kind": "random_walk", "step_std": 0.05, "interval": 60},
                                       {"kind": "pulse", "at": 300, "duration": 200, "size": 0.4}],
                          "water_temperature": {"kind": "sine", "amplitude": 5, "period": 900},
                          "caustic_strength": {"kind": "ramp", "start": 600, "duration": 600,
                                               "size": -0.05}},
                     instruments={"temperature": {"noise_std": 0.05}})
    assert tr.success
    p = m.parameters
    rho, A, cp = p["density"], p["area"], p["heat_capacity"]
    h = tr.series("x", "h")
    x = tr.series("x", "x_naoh")
    T = tr.series("x", "T_tank")
    w1, w2, Q = (tr.series("u", n) for n in ("caustic_flow", "water_flow", "heater_duty"))
    w, xc, T2 = (tr.series("d", n) for n in ("draw_off", "caustic_strength", "water_temperature"))
    M = rho * A * h
    # total mass: exact with held inputs
    dM = M[1:] - M[:-1]
    assert np.allclose(dM, (w1 + w2 - w)[:-1] * Ts, rtol=1e-7, atol=1e-6)
    # NaOH
    naoh = M * x
    inflow = w1 * xc
    out = w * x
    rate = inflow[:-1] * Ts - 0.5 * (out[:-1] + w[:-1] * x[1:]) * Ts
    resid = (naoh[-1] - naoh[0]) - rate.sum()
    assert abs(resid) < 1e-4 * np.sum(np.abs(inflow[:-1])) * Ts
    # energy, reference temperature 0 degC
    E = M * cp * T
    T1, Ta, UA = p["caustic_temperature"], p["ambient_temperature"], p["loss_coefficient"]
    Tm = 0.5 * (T[:-1] + T[1:])
    flux = (w1[:-1] * cp * T1 + w2[:-1] * cp * T2[:-1] - w[:-1] * cp * Tm + Q[:-1]
            - UA * (Tm - Ta)) * Ts
    resid_e = (E[-1] - E[0]) - flux.sum()
    assert abs(resid_e) < 1e-4 * np.sum(np.abs(Q[:-1])) * Ts


def test_same_seed_same_run_and_another_seed_differs():
    # Reference: reproducibility by seed (numpy SeedSequence), common practice
    m, op = tank_op()
    kw = dict(op=op, Ts=10.0, duration=600.0,
              dvs={"draw_off": {"kind": "random_walk", "step_std": 0.05, "interval": 30}},
              instruments={"level": {"noise_std": 0.002}, "concentration": {"noise_std": 0.01}})
    ctl = lambda: mp.PIDController.for_model(m, [mp.PIDLoop("level", "water_flow", 5.0, 300.0)])  # noqa: E731
    a = mp.simulate(m, ctl(), rng=11, **kw)
    b = mp.simulate(m, ctl(), rng=11, **kw)
    c = mp.simulate(m, ctl(), rng=12, **kw)
    for k in a.columns:
        if k != "diag.step_ms":
            assert np.array_equal(a.columns[k], b.columns[k], equal_nan=True), k
    assert not np.array_equal(a.series("ym", "level"), c.series("ym", "level"))
    assert a.meta["seed"] == 11


def test_plant_parameters_mismatch_changes_the_plant_only():
    m = first_order(K=2.0, tau=50.0)
    ol = OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 0.0, "size": 1.0}})
    tr = mp.simulate(m, ol, op=op_of(m), Ts=10.0, duration=1000.0, plant_parameters={"gain": 3.0})
    assert tr.series("y", "y")[-1] == pytest.approx(3.0, rel=1e-6)
    assert m.parameters["gain"] == 2.0 and tr.meta["plant_parameters"]["gain"] == 3.0


def blowup_model():
    m = mp.Model("blowup", time_unit="s")
    x = m.state("x", nominal=1.0)
    m.mv("u", nominal=0.0)
    m.derivative(x, x * x)       # x(t) = 1/(1 - t): finite escape at t = 1
    m.cv("y", x)
    return m.build()


def test_integration_failure_mid_run_is_recorded_and_keeps_the_trajectory():
    # Reference: dx/dt = x^2, x(0) = 1 has the solution 1/(1 - t), which escapes at t = 1
    m = blowup_model()
    op = mp.OperatingPoint.at(m, [1.0], [0.0])
    tr = mp.simulate(m, OpenLoop(m.mv_names), op=op, Ts=0.1, duration=5.0,
                     integrator_options={"max_num_steps": 2000})
    assert not tr.success and tr.status == "failed"
    assert "integrator" in tr.message or "non-finite" in tr.message
    assert 5 <= len(tr) <= 11
    assert tr.meta["failed_at"] == pytest.approx(tr.t[-1])
    t = tr.t[:-1]
    assert np.allclose(tr.series("x", "x")[:-1], 1.0 / (1.0 - t), rtol=1e-5)


def test_faults_run_to_the_end_and_are_flagged():
    m, op = tank_op()
    loops = [mp.PIDLoop("level", "water_flow", gain=5.0, integral_time=300.0),
             mp.PIDLoop("temperature", "heater_duty", gain=30.0, integral_time=600.0),
             mp.PIDLoop("concentration", "caustic_flow", gain=0.1, integral_time=600.0)]
    faults = [
        {"kind": "sensor_frozen", "variable": "level", "at": 300, "until": 600},
        {"kind": "sensor_drift", "variable": "temperature", "at": 200, "until": 800, "rate": 0.01},
        {"kind": "sensor_nan", "variable": "concentration", "at": 900, "until": 1000},
        {"kind": "valve_stuck", "variable": "water_flow", "at": 1200, "until": 1400},
        {"kind": "valve_saturation", "variable": "heater_duty", "at": 1500, "high": 380.0},
    ]
    tr = mp.simulate(m, mp.PIDController.for_model(m, loops), op=op, Ts=10.0, duration=1800.0,
                     dvs={"draw_off": {"kind": "step", "at": 100, "size": 0.2}}, faults=faults, rng=1)
    assert tr.success and len(tr) == 180
    t = tr.t
    flag = tr.series("fault", "level")
    assert np.array_equal(flag > 0, (t >= 300) & (t < 600))
    win = (t >= 300) & (t < 600)
    assert np.ptp(tr.series("ym", "level")[win]) == 0.0          # frozen reading
    assert np.ptp(tr.series("y", "level")[win]) > 0.0            # while the level moves
    drift = (tr.series("ym", "temperature") - tr.series("y", "temperature"))
    dwin = (t >= 200) & (t < 800)
    assert np.allclose(drift[dwin], 0.01 * (t[dwin] - 200))
    assert np.all(np.isnan(tr.series("ym", "concentration")[(t >= 900) & (t < 1000)]))
    st = np.array(tr.text["status"])
    assert np.all(st[(t >= 900) & (t < 1000)] == "fallback_hold")
    assert mp.controller_health(tr)["fallbacks"] == 10
    swin = (t >= 1200) & (t < 1400)
    assert np.ptp(tr.series("u", "water_flow")[swin]) == 0.0
    assert np.all(tr.series("u", "heater_duty")[t >= 1500] <= 380.0)
    assert [f["kind"] for f in tr.meta["faults"]] == [f["kind"] for f in faults]


def test_actuator_rate_and_travel_limits():
    m = first_order()
    ol = OpenLoop(m.mv_names, {"u": {"kind": "step", "at": 0.0, "size": 5.0}})
    tr = mp.simulate(m, ol, op=op_of(m), Ts=2.0, duration=40.0,
                     actuators={"u": {"rate": 0.25, "high": 3.0}})
    u = tr.series("u", "u")
    assert np.all(np.diff(np.concatenate([[0.0], u])) <= 0.25 * 2.0 + 1e-12)
    assert u.max() == pytest.approx(3.0) and tr.series("ucmd", "u")[-1] == 5.0


def test_bad_inputs_are_named():
    m, op = tank_op()
    ol = OpenLoop(m.mv_names)
    base = dict(op=op, Ts=10.0, duration=100.0)
    with pytest.raises(mp.SettingsError, match=r"faults\[0\].*'levle'.*did you mean 'level'"):
        mp.simulate(m, ol, faults=[{"kind": "sensor_nan", "variable": "levle", "at": 10}], **base)
    with pytest.raises(mp.SettingsError, match=r"key 'faults\[0\].variable': expected the name of a CV .* found 'water_flow'"):
        mp.simulate(m, ol, faults=[{"kind": "sensor_nan", "variable": "water_flow", "at": 10}], **base)
    with pytest.raises(mp.SettingsError, match=r"key 'dvs': expected the name of a DV .* found 'draw'.*did you mean 'draw_off'"):
        mp.simulate(m, ol, dvs={"draw": 1.0}, **base)
    with pytest.raises(mp.SettingsError, match=r"dvs.draw_off \(pulse\): key 'duration': expected a number > 0, found -5"):
        mp.simulate(m, ol, dvs={"draw_off": {"kind": "pulse", "at": 1, "duration": -5, "size": 1}}, **base)
    with pytest.raises(mp.SettingsError, match=r"mv_limits.heater_duty: key 'hihg': .*found the unknown key 'hihg'"):
        mp.simulate(m, ol, mv_limits={"heater_duty": {"hihg": 1}}, **base)
    with pytest.raises(mp.SettingsError, match=r"duration"):
        mp.simulate(m, ol, op=op, Ts=10.0, duration=-1.0)
    with pytest.raises(mp.SettingsError, match=r"rng"):
        mp.simulate(m, ol, rng="seven", **base)


def test_closed_loop_can_be_stepped_by_hand():
    m = first_order()
    loop = mp.ClosedLoop(m, OpenLoop(m.mv_names), op=op_of(m), Ts=1.0, duration=5.0)
    loop.reset()
    assert loop.step() and len(loop.trajectory()) == 1
    while loop.step():
        pass
    assert len(loop.trajectory()) == 5 and loop.trajectory().success
    plant_fn = loop.plant.step_
    loop.run()
    assert loop.plant.step_ is plant_fn          # integrator built once per (model, Ts)


def test_trajectory_csv_round_trip(tmp_path):
    m, op = tank_op()
    tr = mp.simulate(m, OpenLoop(m.mv_names), op=op, Ts=10.0, duration=200.0, rng=2,
                     instruments={"concentration": {"noise_std": 0.01, "period": 60, "dead_time": 30}},
                     faults=[{"kind": "sensor_nan", "variable": "level", "at": 50}])
    path = tr.to_csv(tmp_path / "run.csv")
    back = mp.Trajectory.from_csv(path)
    assert np.array_equal(back.t, tr.t)
    assert set(back.columns) == set(tr.columns)
    for k in tr.columns:
        assert np.array_equal(back.columns[k], tr.columns[k], equal_nan=True), k
    assert back.text == tr.text and back.meta["model"] == "blending_tank"
    assert back.status == "completed" and back.Ts == 10.0
    with pytest.raises(mp.SettingsError, match="not written by Trajectory.to_csv"):
        (tmp_path / "x.csv").write_text("t,a\n0,1\n")
        mp.Trajectory.from_csv(tmp_path / "x.csv")


def test_integrator_is_shared_by_runs_of_the_same_model_and_sample_time():
    m = first_order()
    mism = m.with_parameters(gain=5.0)
    a = mp.ClosedLoop(m, OpenLoop(m.mv_names), op=op_of(m), Ts=1.0, duration=5.0)
    b = mp.ClosedLoop(mism, OpenLoop(m.mv_names), op=op_of(m), Ts=1.0, duration=5.0)
    c = mp.ClosedLoop(m, OpenLoop(m.mv_names), op=op_of(m), Ts=2.0, duration=5.0)
    assert a.plant.step_out_ is b.plant.step_out_        # parameters are inputs: same code
    assert a.plant.step_out_ is not c.plant.step_out_    # another sample time: another integrator
    other = first_order()                                # rebuilt model: new compiled Functions
    d = mp.ClosedLoop(other, OpenLoop(m.mv_names), op=op_of(other), Ts=1.0, duration=5.0)
    assert d.plant.step_out_ is not a.plant.step_out_


def test_cstr_ignition_transient_matches_scipy_radau():
    # Reference: scipy.integrate.solve_ivp (Radau, rtol 1e-10) on the same balances (Henson-Seborg
    # CSTR, model docstring) with the same held coolant step: open loop from the unstable middle
    # steady state, the reactor ignites (T from 350 K to ~440 K and back to ~384 K).
    from scipy.integrate import solve_ivp

    m = mp.make_model("henson_seborg_cstr")
    op = mp.steady_state(m)
    tr = mp.simulate(m, OpenLoop(m.mv_names, {"coolant_temperature": {"kind": "step", "at": 0.5, "size": 5.0}}),
                     op=op, Ts=0.05, duration=10.0)
    p = m.parameters
    q, V, CAf, Tf = op.d[2], p["volume"], op.d[0], op.d[1]

    def f(t, s):
        CA, T = s
        Tc = op.u[0] + (5.0 if t >= 0.5 else 0.0)
        r = p["rate_constant"] * math.exp(-p["activation_temperature"] / T) * CA
        rc = p["density"] * p["heat_capacity"]
        return [q / V * (CAf - CA) - r,
                q / V * (Tf - T) + (-p["heat_of_reaction"]) / rc * r + p["heat_transfer"] / (V * rc) * (Tc - T)]

    ref_a = solve_ivp(f, (0.0, 0.5), op.x, method="Radau", rtol=1e-10, atol=1e-10, dense_output=True)
    ref_b = solve_ivp(f, (0.5, 10.0), ref_a.y[:, -1], method="Radau", rtol=1e-10, atol=1e-10,
                      dense_output=True)
    t = tr.t
    ref = np.where(t < 0.5, ref_a.sol(np.minimum(t, 0.5)), ref_b.sol(np.maximum(t, 0.5)))
    assert tr.series("x", "T").max() > 430.0                    # it really ran away
    # cvodes at abstol 1e-9 / reltol 1e-8 through a strongly amplifying transient: within 0.05 K
    err_T = np.max(np.abs(tr.series("x", "T") - ref[1]))
    assert err_T < 0.05, err_T
    assert np.max(np.abs(tr.series("x", "CA") - ref[0])) < 5e-4


class _Recorder(OpenLoop):
    """Open loop that keeps what the simulator hands the controller."""

    def __init__(self, mv_names):
        super().__init__(mv_names)
        self.seen = []

    def step(self, t, meas, dv, targets, dv_forecast=None):
        self.seen.append((t, dv.copy(), None if dv_forecast is None else dv_forecast.copy(),
                          targets.setpoint.copy()))
        return super().step(t, meas, dv, targets, dv_forecast)


def test_controller_sees_measured_dvs_only_and_a_perfect_forecast_when_asked():
    m, op = tank_op()
    rec = _Recorder(m.mv_names)
    mp.simulate(m, rec, op=op, Ts=10.0, duration=100.0, forecast=True, forecast_steps=3,
                dvs={"draw_off": {"kind": "ramp", "start": 0, "duration": 100, "size": 1.0},
                     "caustic_strength": {"kind": "step", "at": 0, "size": -0.1}},
                setpoints={"temperature": None, "level": {"kind": "step", "at": 50, "size": 0.1}})
    t, dv, fc, sp = rec.seen[2]
    j = m.dv_names.index("draw_off")
    assert dv[j] == pytest.approx(op.d[j] + 0.2)
    assert np.isnan(dv[m.dv_names.index("caustic_strength")])          # unmeasured
    assert fc.shape == (3, m.nd) and np.allclose(fc[:, j], op.d[j] + np.array([0.2, 0.3, 0.4]))
    assert np.isnan(sp[m.cv_names.index("temperature")])                # no setpoint: zone only
    assert rec.seen[5][3][0] == pytest.approx(op.y[0] + 0.1)
