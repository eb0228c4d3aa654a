"""The regulatory structures of the PID baseline (mpcproto.control.regulatory), each checked
against a closed-form result on a small linear plant (or the blending tank's mass balances)."""

import math

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.control.pid import PIDLoop
from mpcproto.control.regulatory import (Cascade, Feedforward, Ratio, RegulatoryController, Selector,
                                         SplitRange, Valve, split_range_value)
from mpcproto.control.regulatory_settings import design_feedforward
from mpcproto.control.tuning import ProcessFit
from mpcproto.sim import simulate
from tests._plants import op0


def ff_plant(Kp=2.0, taup=20.0, Kd=1.5, taud=40.0):
    """y = Kp/(taup s + 1) u + Kd/(taud s + 1) d, d measured."""
    m = mp.Model("ffplant", time_unit="s")
    x1 = m.state("x1", nominal=0.0)
    x2 = m.state("x2", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-50, high=50)
    d = m.dv("d", nominal=0.0, measured=True)
    m.derivative(x1, (Kp * u - x1) / taup)
    m.derivative(x2, (Kd * d - x2) / taud)
    m.cv("y", x1 + x2)
    return m.build()


def _final(tr, kind, name):
    return float(tr.series(kind, name)[-1])


def test_static_feedforward_cancels_a_step_dv_exactly():
    # closed form: a P-only loop (gain K) leaves the offset Kd*dd/(1 + K Kp) after a DV step;
    # with the static feedforward -Kd/Kp added to its output the offset is exactly zero
    # (y = Kp u + Kd d at steady state; common practice, no source beyond the algebra)
    m = ff_plant()
    op = op0(m)
    Kp, Kd, K, dd = 2.0, 1.5, 0.4, 1.0
    loop = PIDLoop("y", "u", gain=K)            # P only: no integral to hide the disturbance
    kw = dict(op=op, Ts=1.0, duration=600.0, dvs={"d": {"kind": "step", "at": 10.0, "size": dd}})
    fb = RegulatoryController.for_model(m, loops=[loop])
    tr0 = simulate(m, fb, **kw)
    assert _final(tr0, "y", "y") == pytest.approx(Kd * dd / (1 + K * Kp), rel=1e-4)
    ff = RegulatoryController.for_model(m, loops=[loop],
                                        feedforward=[Feedforward("y", "d", gain=-Kd / Kp)])
    tr1 = simulate(m, ff, **kw)
    assert abs(_final(tr1, "y", "y")) < 1e-6
    assert _final(tr1, "u", "u") == pytest.approx(-Kd * dd / Kp, rel=1e-6)


def test_dynamic_feedforward_design_rule_and_effect():
    # the FOPDT design rule (Seborg, Edgar & Mellichamp, feedforward chapter; from memory):
    # gain -Kd/Kp, lead tau_p, lag tau_d, dead time max(0, theta_d - theta_p)
    f = design_feedforward(ProcessFit.fopdt(2.0, 20.0, 3.0), ProcessFit.fopdt(1.5, 40.0, 8.0),
                           cv="y", source="d")
    assert (f.gain, f.lead, f.lag, f.dead_time) == (pytest.approx(-0.75), 20.0, 40.0, 5.0)
    f2 = design_feedforward(ProcessFit.fopdt(2.0, 20.0, 9.0), ProcessFit.fopdt(1.5, 40.0, 8.0),
                            cv="y", source="d")
    assert f2.dead_time == 0.0
    # with the lead-lag the cancellation is exact for this plant (no dead times): the
    # disturbance barely moves y, far less than with the static gain alone
    m = ff_plant()
    op = op0(m)
    loop = PIDLoop("y", "u", gain=0.4, integral_time=20.0)
    kw = dict(op=op, Ts=0.5, duration=300.0, dvs={"d": {"kind": "step", "at": 5.0, "size": 1.0}})
    peaks = {}
    for lab, fs in (("static", Feedforward("y", "d", -0.75)),
                    ("leadlag", Feedforward("y", "d", -0.75, lead=20.0, lag=40.0))):
        tr = simulate(m, RegulatoryController.for_model(m, loops=[loop], feedforward=[fs]), **kw)
        peaks[lab] = float(np.max(np.abs(tr.series("y", "y"))))
    assert peaks["leadlag"] < 0.1 * peaks["static"]


def test_feedforward_inside_the_anti_windup():
    # a feedforward that drives the valve to its limit must not wind the integral up: after the
    # DV returns the output leaves the limit at once (back-calculation on the total output)
    m = ff_plant()
    op = op0(m)
    loop = PIDLoop("y", "u", gain=0.4, integral_time=20.0)
    ctl = RegulatoryController.for_model(m, loops=[loop], feedforward=[Feedforward("y", "d", -0.75)])
    tr = simulate(m, ctl, op=op, Ts=1.0, duration=900.0, mv_limits={"u": {"low": -5.0, "high": 5.0}},
                  dvs={"d": {"kind": "pulse", "at": 10.0, "duration": 300.0, "size": 20.0}})
    u = tr.series("u", "u")
    assert np.all(u >= -5.0 - 1e-12) and np.all(u <= 5.0 + 1e-12)   # hard limits hold
    t = tr.t
    assert np.all(u[(t > 50) & (t < 300)] == pytest.approx(-5.0))
    # windup would keep u at the limit long after the pulse; with tracking it leaves within
    # a few samples of the DV's return
    assert u[(t > 312) & (t < 316)].max() > -5.0 + 1e-3


def test_split_range_maps_0_50_100():
    # a cooling valve closes over 0-50 %, a heating valve opens over 50-100 % (specified map)
    vs = (Valve("cool", 0.0, 50.0, 1.0, 0.0), Valve("heat", 50.0, 100.0, 0.0, 1.0))
    expected = {0: (1.0, 0.0), 25: (0.5, 0.0), 50: (0.0, 0.0), 75: (0.0, 0.5), 100: (0.0, 1.0),
                -10: (1.0, 0.0), 120: (0.0, 1.0)}
    for c, (a, b) in expected.items():
        got = split_range_value(vs, c)
        assert (got["cool"], got["heat"]) == (pytest.approx(a), pytest.approx(b))


def split_plant():
    """y = (heat - cool)/(10 s + 1) * 10, two valves 0..1."""
    m = mp.Model("splitplant", time_unit="s")
    x = m.state("x", nominal=0.0)
    c = m.mv("cool", nominal=0.0, low=0.0, high=1.0)
    h = m.mv("heat", nominal=0.0, low=0.0, high=1.0)
    m.derivative(x, (10.0 * (h - c) - x) / 10.0)
    m.cv("y", x)
    return m.build()


def test_split_range_loop_uses_both_valves_within_limits():
    m = split_plant()
    op = op0(m)
    vs = (Valve("cool", 0.0, 50.0, 1.0, 0.0), Valve("heat", 50.0, 100.0, 0.0, 1.0))
    loop = PIDLoop("y", "split", gain=5.0, integral_time=10.0)
    ctl = RegulatoryController.for_model(m, split_ranges=[SplitRange(loop, vs)])
    tr = simulate(m, ctl, op=op, Ts=0.5, duration=400.0,
                  setpoints={"y": [{"kind": "step", "at": 5.0, "size": 4.0},
                                   {"kind": "step", "at": 200.0, "size": -9.0}]})
    cool, heat, y = (tr.series("u", "cool"), tr.series("u", "heat"), tr.series("y", "y"))
    t = tr.t
    # at steady state y = 10 (heat - cool): heat 0.4 for y = 4, cool 0.5 for y = -5
    assert y[t < 199][-1] == pytest.approx(4.0, abs=1e-3)
    assert heat[t < 199][-1] == pytest.approx(0.4, abs=1e-3) and cool[t < 199][-1] == 0.0
    assert y[-1] == pytest.approx(-5.0, abs=1e-3)
    assert cool[-1] == pytest.approx(0.5, abs=1e-3) and heat[-1] == 0.0
    assert np.all((cool >= 0) & (cool <= 1) & (heat >= 0) & (heat <= 1))


def selector_plant():
    """Two CVs on one MV: y1 = 1/(20 s + 1) u, y2 = 2/(5 s + 1) u."""
    m = mp.Model("selplant", time_unit="s")
    x1 = m.state("x1", nominal=0.0)
    x2 = m.state("x2", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-100, high=100)
    m.derivative(x1, (u - x1) / 20.0)
    m.derivative(x2, (2.0 * u - x2) / 5.0)
    m.cv("y1", x1)
    m.cv("y2", x2)
    return m.build()


def test_selector_switches_to_the_override_and_the_other_loop_does_not_wind_up():
    m = selector_plant()
    op = op0(m)
    main = PIDLoop("y1", "u", gain=1.0, integral_time=20.0)
    over = PIDLoop("y2", "u", gain=0.25, integral_time=5.0)
    ctl = RegulatoryController.for_model(m, selectors=[Selector("u", "min", (main, over),
                                                                ("setpoint", "high"))])
    # y1's setpoint asks for u = 5 -> y2 = 10, above y2's high limit 6: the override must take
    # over and hold y2 at 6 (u = 3, y1 = 3); then the setpoint comes back down to 2 (u = 2,
    # y2 = 4 inside its limit) and the main loop must take back control
    tr = simulate(m, ctl, op=op, Ts=0.5, duration=800.0,
                  setpoints={"y1": [{"kind": "step", "at": 5.0, "size": 5.0},
                                    {"kind": "step", "at": 400.0, "size": -3.0}]},
                  cv_limits={"y2": {"high": 6.0}})
    t, sel = tr.t, tr.series("diag", "selected.u")
    y1, y2, u = tr.series("y", "y1"), tr.series("y", "y2"), tr.series("u", "u")
    before = t < 399
    assert sel[before][-1] == 1.0                     # the override is in control
    assert y2[before][-1] == pytest.approx(6.0, abs=1e-3)
    assert y1[before][-1] == pytest.approx(3.0, abs=1e-3)
    # no windup of the main loop: at the equilibrium of back-calculation (Astrom & Hagglund,
    # from memory) dI/dt = K e/Ti + (u - v)/Tt = 0, so v - u = K e Tt/Ti = K e (Tt = Ti for PI)
    i_main = tr.series("diag", "integral.u.0")[before][-1]
    v_main = main.gain * (5.0 - y1[before][-1]) + i_main
    assert v_main - u[before][-1] == pytest.approx(main.gain * (5.0 - 3.0), rel=1e-3)
    assert sel[-1] == 0.0                              # main loop back in control
    assert y1[-1] == pytest.approx(2.0, abs=1e-3) and y2[-1] == pytest.approx(4.0, abs=1e-3)
    # and it took over without a long delay (a wound-up integral would need many time constants)
    back = t[(t > 400) & (sel == 0.0)]
    assert back.size and back[0] < 460


def cascade_plant(Ki=2.0, taui=5.0, tauo=60.0):
    """Inner: x2 = Ki/(taui s + 1) u (a jacket temperature); outer: x1 = 1/(tauo s + 1) x2."""
    m = mp.Model("casplant", time_unit="s")
    x1 = m.state("x1", nominal=0.0)
    x2 = m.state("x2", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-100, high=100)
    m.derivative(x2, (Ki * u - x2) / taui)
    m.derivative(x1, (x2 - x1) / tauo)
    m.cv("y", x1)
    m.cv("y_inner", x2)
    return m.build()


def test_cascade_inner_loop_responds_at_its_simc_time_constant():
    # SIMC (Skogestad 2003) on a first-order inner process without dead time gives
    # Kc = tau/(k tau_c), Ti = tau: the closed inner loop is exactly 1/(tau_c s + 1), so its
    # setpoint response reaches 1 - e^-1 = 63.2 % at t = tau_c (closed form)
    Ki, taui, tau_c = 2.0, 5.0, 4.0
    m = cascade_plant(Ki, taui, tauo=6000.0)      # a very slow outer process: y hardly moves
    op = op0(m)
    inner = PIDLoop("y_inner", "u", gain=taui / (Ki * tau_c), integral_time=taui)
    outer = PIDLoop("y", "y_inner", gain=1.0)     # P only: its output is 1 - y, ~1
    ctl = RegulatoryController.for_model(m, cascades=[Cascade(outer, inner)])
    # a step of the outer setpoint with a tiny sample time: the outer loop's output (the inner
    # setpoint) jumps by K * step and then moves slowly; check the inner loop follows it at tau_c
    Ts = 0.02
    tr = simulate(m, ctl, op=op, Ts=Ts, duration=9.0,
                  setpoints={"y": {"kind": "step", "at": 0.5, "size": 1.0}})
    t, yi = tr.t, tr.series("y", "y_inner")
    k0 = int(np.argmin(np.abs(t - 0.5)))
    yi = yi[k0:]
    k = int(round(tau_c / Ts))
    # the inner setpoint is 1 - y ~ 1 (y moves by < 0.1 % over 8 s), so y_inner(tau_c) ~ 0.632
    assert yi[k] == pytest.approx(1 - math.exp(-1), rel=0.02)
    assert yi[2 * k] == pytest.approx(1 - math.exp(-2), rel=0.03)


def test_ratio_holds_the_blend_when_the_wild_flow_moves():
    # NaOH balance of the blending tank at steady state: x = w1 xc / (w1 + w2) -- the
    # concentration depends on the ratio w1/w2 only; with the caustic in ratio to the water the
    # blend comes back to the same concentration after the water flow moves, and the ratio ends
    # where it started (closed form from the model's balances)
    m = mp.make_model("blending_tank")
    op = op0(m)                      # the nominal point: an exact steady state (1.2 m, 2 wt%)
    R0 = op.u[0] / op.u[1]
    level = PIDLoop("level", "water_flow", gain=4.0, integral_time=600.0)
    trim = PIDLoop("concentration", "caustic_flow", gain=0.001 / op.u[1], integral_time=600.0)
    temp = PIDLoop("temperature", "heater_duty", gain=30.0, integral_time=300.0)
    ctl = RegulatoryController.for_model(m, loops=[level, temp],
                                         ratios=[Ratio(trim, "water_flow")])
    tr = simulate(m, ctl, op=op, Ts=10.0, duration=6000.0,
                  dvs={"draw_off": {"kind": "step", "at": 100.0, "size": 0.5}})
    w1, w2 = tr.series("u", "caustic_flow"), tr.series("u", "water_flow")
    assert w2[-1] == pytest.approx(2.0 - w1[-1], rel=1e-3)          # mass balance: in = out
    assert w1[-1] / w2[-1] == pytest.approx(R0, rel=1e-3)
    assert tr.series("y", "concentration")[-1] == pytest.approx(2.0, abs=1e-3)
    lo, hi = m.bounds("mv")
    U = np.column_stack([tr.series("u", n) for n in m.mv_names])
    assert np.all(U >= lo - 1e-12) and np.all(U <= hi + 1e-12)


def test_structures_refuse_bad_wiring():
    m = selector_plant()
    a = PIDLoop("y1", "u", gain=1.0)
    b = PIDLoop("y2", "u", gain=1.0)
    with pytest.raises(mp.SettingsError, match="key 'mv': expected an MV moved by one structure only.*found 'u', already moved by"):
        RegulatoryController.for_model(m, loops=[a, b])
    with pytest.raises(mp.SettingsError, match=r"Selector: key 'select': expected one of min, max, found 'lowest'. \(selector on 'u'\)"):
        Selector("u", "lowest", (a, b))
    with pytest.raises(mp.SettingsError, match=r"Feedforward: key 'lag': expected a lag > 0 with the lead \(3\)"):
        Feedforward("y1", "d", 1.0, lead=3.0)
    with pytest.raises(mp.SettingsError, match=r"key 'source': expected the name of a DV of this model"):
        RegulatoryController.for_model(m, loops=[a], feedforward=[Feedforward("y1", "d", 1.0)])


# ------------------------------------------------------------------------------ from settings
def test_cascade_from_settings_tunes_inner_first_then_outer_on_the_closed_inner_loop():
    # inner y_inner = 2/(5 s + 1) u; outer y = 1/(60 s + 1) y_inner.  The closed inner loop (PI,
    # integral action) has unit steady-state gain, so the step test of the closed inner loop sees
    # the outer process gain 1 (closed form); the outer loop's SIMC gain then follows from it
    m = cascade_plant()
    op = op0(m)
    ctl = mp.pid_from_settings(m, op, 0.5, {"cascade": {"y": {"inner": "y_inner", "mv": "u"}},
                                            "tau_c": {"y_inner": 2.0, "y": 20.0}})
    d = ctl.describe()
    fit = d["tuning"]["fits"]["y<-y_inner (closed inner loop)"]
    assert fit["gain"] == pytest.approx(1.0, rel=0.02)
    (cas,) = ctl.cascades
    # inner SIMC on the MV step test: Kc = tau/(k (tau_c + theta)), theta ~ Ts/2 (Skogestad 2003)
    assert cas.inner.gain == pytest.approx(5.0 / (2.0 * (2.0 + 0.25)), rel=0.03)
    assert cas.outer.mv == "y_inner" and "cascade y -> y_inner -> u" in d["structure"]
    tr = simulate(m, ctl, op=op, Ts=0.5, duration=400.0,
                  setpoints={"y": {"kind": "step", "at": 5.0, "size": 1.0}})
    assert tr.series("y", "y")[-1] == pytest.approx(1.0, abs=1e-3)


def test_override_and_split_range_from_settings():
    m = selector_plant()
    op = op0(m)
    ctl = mp.pid_from_settings(m, op, 0.5, {"override": {"u": {"select": "min", "loops": [
        {"cv": "y1"}, {"cv": "y2", "reference": "high"}]}}})
    (s,) = ctl.selectors
    assert s.references == ("setpoint", "high") and s.select == "min"
    m2 = split_plant()
    ctl2 = mp.pid_from_settings(m2, op0(m2), 0.5, {"split_range": {"y": {"valves": [
        {"mv": "cool", "start": 0, "end": 50, "at_start": 1.0, "at_end": 0.0},
        {"mv": "heat", "start": 50, "end": 100}]}}})
    (sr,) = ctl2.split_ranges
    assert [(v.mv, v.at_start, v.at_end) for v in sr.valves] == [("cool", 1.0, 0.0),
                                                                 ("heat", 0.0, 1.0)]
    # tuned on the first valve (gain -10 per unit cool), converted to % of output: slope -1/50
    assert sr.loop.gain > 0


@pytest.mark.parametrize("settings, fragment", [
    ({"ratio": {"y1": {"mv": "u"}}}, "pid: key 'ratio.y1.wild': expected 'wild'"),
    ({"ratio": {"y1": {"mv": "u", "wild": "nothing"}}}, "pid: key 'ratio.y1.wild': expected the name"),
    ({"feedforward": {"y1": {"dv": "d", "mv": "u"}}}, "pid: key 'feedforward.y1': expected exactly one source"),
    ({"feedforward": {"y1": {"mv": "u", "lead": 3.0}}}, "'gain' must be too"),
    ({"override": {"u": {"select": "lowest", "loops": [{"cv": "y1"}, {"cv": "y2"}]}}},
     "pid: key 'override.u.select': expected one of: min, max, found the unknown select 'lowest'"),
    ({"override": {"u": {"select": "min", "loops": [{"cv": "y1"}]}}},
     "pid: key 'override.u.loops': expected a list of at least two"),
    ({"override": {"u": {"select": "min", "loops": [{"cv": "y1"}, {"cv": "y2", "reference": "top"}]}}},
     "pid: key 'override.u.loops[1].reference': expected one of: setpoint, high, low, found the unknown reference 'top'"),
    ({"split_range": {"y1": {"valves": [{"mv": "u", "start": 60, "end": 40}]}}},
     "pid: key 'split_range.y1.valves[0].end': expected 'end' above 'start'"),
    ({"split_range": {"y1": {"valves": [{"mv": "u", "start": 0, "end": 150}]}}},
     "key 'split_range.y1.valves[0].end': expected a percent <= 100"),
    ({"cascade": {"y1": {"inner": "y1", "mv": "u"}}}, "pid: key 'cascade.y1.inner': expected the name"),
    ({"cascade": {"y9": {"inner": "y2", "mv": "u"}}}, "pid: key 'cascade.y9': expected the name of a CV of this model"),
])
def test_structure_settings_are_checked_with_key_paths(settings, fragment):
    m = selector_plant()
    with pytest.raises(mp.SettingsError) as ei:
        mp.pid_from_settings(m, op0(m), 0.5, settings)
    assert fragment in str(ei.value)


def test_a_reused_controller_gives_the_same_run():
    # reset() restarts every loop, filter and dead-time buffer: the scenario runner caches
    # controllers between cases, so a second run must repeat the first to the last bit
    m = ff_plant()
    op = op0(m)
    ctl = RegulatoryController.for_model(
        m, loops=[PIDLoop("y", "u", gain=0.4, integral_time=20.0)],
        feedforward=[Feedforward("y", "d", -0.75, lead=20.0, lag=40.0, dead_time=3.0)])
    kw = dict(op=op, Ts=1.0, duration=200.0, rng=3, instruments={"y": {"noise_std": 0.01}},
              dvs={"d": {"kind": "step", "at": 10.0, "size": 1.0}})
    a, b = simulate(m, ctl, **kw), simulate(m, ctl, **kw)
    assert np.array_equal(a.series("u", "u"), b.series("u", "u"))
    assert np.std(np.diff(a.series("u", "u"))) > 0
