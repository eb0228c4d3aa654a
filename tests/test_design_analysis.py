"""Design checks: gain-matrix analysis, RGA at frequency, loop margins, half rule, steady-state locus.

Each check names the outside reference it is held against.
"""

import math

import numpy as np
import pytest
from scipy.optimize import brentq

import mpcproto as mp
from mpcproto.continuation import plot_locus, steady_state_locus
from mpcproto.control.loop_analysis import half_rule, loop_margins
from mpcproto.control.tuning import ProcessFit, simc
from mpcproto.design import (gain_matrix_analysis, niederlinski_index, rga_at_frequency,
                             sampling_advice)
from mpcproto.exceptions import SettingsError

# Wood & Berry (1973), "Terminal composition control of a binary distillation column", Chem. Eng.
# Sci. 28:1707: the published transfer matrix (minutes), reflux and steam -> top and bottom purity.
WB_GAIN = np.array([[12.8, -18.9], [6.6, -19.4]])
WB_TAU = np.array([[16.7, 21.0], [10.9, 14.4]])
WB_DEAD = np.array([[1.0, 3.0], [7.0, 3.0]])


def _wb_published(w):
    s = 1j * w
    return WB_GAIN * np.exp(-WB_DEAD * s) / (WB_TAU * s + 1)


@pytest.fixture(scope="module")
def wb_lin():
    col = mp.make_model("wood_berry")
    return mp.linearize(col, mp.steady_state(col))


def test_wood_berry_gain_matrix_figures(wb_lin):
    ga = gain_matrix_analysis(wb_lin.gain(), cv_names=wb_lin.cv_names, mv_names=wb_lin.mv_names,
                              pairing=list(zip(wb_lin.cv_names, wb_lin.mv_names)))
    # det G(0) and the Niederlinski index, by hand from the published gains:
    # det = 12.8 (-19.4) - (-18.9)(6.6) = -123.58; NI = det / (12.8 (-19.4)) = 0.4977
    assert ga.determinant == pytest.approx(-123.58, rel=1e-9)
    assert ga.niederlinski == pytest.approx(-123.58 / (12.8 * -19.4), rel=1e-9)
    # the Wood & Berry RGA, lambda_11 = 2.01 (quoted in process-control textbooks, e.g. Seborg,
    # Edgar & Mellichamp; from memory) = 1 / (1 - g12 g21 / (g11 g22)) (Bristol 1966)
    lam = 1.0 / (1.0 - (-18.9 * 6.6) / (12.8 * -19.4))
    assert ga.rga[0, 0] == pytest.approx(lam, rel=1e-9)
    assert round(ga.rga[0, 0], 2) == 2.01
    # singular values against numpy's SVD of the published gains (reference library)
    np.testing.assert_allclose(ga.singular_values, np.linalg.svd(WB_GAIN, compute_uv=False), rtol=1e-9)
    assert ga.condition_number == pytest.approx(7.4806, rel=1e-4)
    # the reverse pairing has negative relative gains and a negative NI: both are warned about
    rev = gain_matrix_analysis(WB_GAIN, cv_names=("xd", "xb"), mv_names=("r", "s"),
                               pairing=[("xd", "s"), ("xb", "r")])
    assert rev.niederlinski < 0
    assert any("Niederlinski" in w for w in rev.warnings)
    assert any("negative relative gain" in w for w in rev.warnings)


def test_weak_direction_is_the_smallest_singular_direction():
    # a nearly collinear 2x2 (common practice, no source): the weak input direction moves the CVs by
    # sigma_min only, and the two MVs are reported as acting alike
    K = np.array([[1.0, 0.99], [1.0, 1.01]])
    ga = gain_matrix_analysis(K, cv_names=("a", "b"), mv_names=("p", "q"))
    v = np.array([ga.weak_input_direction["p"], ga.weak_input_direction["q"]])
    assert np.linalg.norm(K @ v) == pytest.approx(ga.singular_values[-1], rel=1e-9)
    assert ga.collinear_mvs and ga.collinear_mvs[0]["mvs"] == ["p", "q"]
    assert ga.scaled_condition_number > 100
    assert any("ill-conditioned" in w for w in ga.warnings)


def test_scaling_changes_the_condition_number_as_the_units_do():
    # the same unit in other units: cv 0 in percent instead of fraction multiplies row 0 by 100; scaled
    # by the ranges, the condition number does not move (invariance by construction of D1 K D2)
    K = np.array([[2.0, 1.0], [1.0, 3.0]])
    K2 = K * np.array([[100.0], [1.0]])
    a = gain_matrix_analysis(K, cv_scales=[1.0, 1.0])
    b = gain_matrix_analysis(K2, cv_scales=[100.0, 1.0])
    assert b.condition_number > 30 * a.condition_number
    assert b.scaled_condition_number == pytest.approx(a.scaled_condition_number, rel=1e-12)


def test_niederlinski_refuses_a_bad_pairing():
    with pytest.raises(SettingsError, match="permutation"):
        niederlinski_index(WB_GAIN, [0, 0])


def test_rga_at_frequency_matches_the_published_transfer_matrix(wb_lin):
    for w in (0.0, 0.05, 0.2, 1.0):
        G = _wb_published(w)
        ref = G * np.linalg.inv(G).T
        np.testing.assert_allclose(rga_at_frequency(wb_lin, w), ref, rtol=1e-8, atol=1e-10)
    many = rga_at_frequency(wb_lin, [0.0, 0.1])
    assert many.shape == (2, 2, 2)


def test_simc_loop_margins_on_a_fopdt_process():
    # SIMC with tau_c = theta on a FOPDT with tau1 <= 8 theta (so tau_I = tau1) gives the loop
    # L = exp(-theta s) / (2 theta s): GM = pi, PM = 90 - 180/pi * 0.5 deg = 61.4 deg, Ms = 1.59
    # (Skogestad 2003, J. Process Control 13:291, the robustness table; figures from memory; the
    # closed-form GM and PM are derived in this comment from L).
    fit = ProcessFit.fopdt(2.0, 6.0, 1.5)
    lp = simc(fit)
    mg = loop_margins(fit, lp)
    assert mg.gain_margin == pytest.approx(math.pi, rel=1e-8)
    assert mg.phase_margin_deg == pytest.approx(90.0 - math.degrees(0.5), rel=1e-8)
    assert mg.crossover_frequency == pytest.approx(1.0 / (2 * 1.5), rel=1e-8)
    assert mg.peak_sensitivity == pytest.approx(1.59, abs=0.005)
    # ultimate point of the process: phase -180 deg where w theta + atan(w tau) = pi (closed form)
    wu = brentq(lambda w: w * 1.5 + math.atan(w * 6.0) - math.pi, 1e-6, math.pi / 1.5)
    assert mg.ultimate_frequency == pytest.approx(wu, rel=1e-8)
    assert mg.ultimate_gain == pytest.approx(math.sqrt(1 + (wu * 6.0) ** 2) / 2.0, rel=1e-8)


def test_loop_margins_against_python_control():
    # python-control (reference library) on the same loop with a high-order Pade approximation of the
    # dead time: gain and phase margins agree to the Pade error
    control = pytest.importorskip("control")
    K, Ti, Td, N = 1.2, 8.0, 1.0, 10.0
    num, den = control.pade(2.0, 12)
    G = control.tf([3.0], [10.0, 1.0]) * control.tf(num, den)
    C = K * (1 + control.tf([1.0], [Ti, 0.0]) + control.tf([Td, 0.0], [Td / N, 1.0]))
    gm, pm, _, _ = control.margin(G * C)
    ours = loop_margins((np.array([3.0]), np.array([10.0, 1.0]), 2.0), (K, Ti, Td, N))
    assert ours.gain_margin == pytest.approx(gm, rel=1e-5)
    assert ours.phase_margin_deg == pytest.approx(pm, rel=1e-5)


def test_loop_margins_refuses_positive_feedback():
    with pytest.raises(SettingsError, match="positive"):
        loop_margins(ProcessFit.fopdt(-2.0, 5.0, 1.0), (1.0, 5.0, 0.0, 10.0))


def test_half_rule():
    # Skogestad (2003), section 2, the half rule: g = e^{-s} (-0.3 s + 1) / ((5s+1)(2s+1)(0.4s+1)(0.1s+1))
    # FOPDT: tau1 = 5 + 2/2 = 6, theta = 1 + 2/2 + 0.4 + 0.1 + 0.3 = 2.8
    # SOPDT: tau1 = 5, tau2 = 2 + 0.4/2 = 2.2, theta = 1 + 0.4/2 + 0.1 + 0.3 = 1.6
    # (arithmetic of the published rule, done here by hand)
    f1 = half_rule(1.0, [2, 5, 0.1, 0.4], 1.0, inverse_response=[0.3])
    assert f1.time_constants == pytest.approx((6.0,)) and f1.dead_time == pytest.approx(2.8)
    f2 = half_rule(1.0, [2, 5, 0.1, 0.4], 1.0, inverse_response=[0.3], order=2)
    assert f2.time_constants == pytest.approx((5.0, 2.2)) and f2.dead_time == pytest.approx(1.6)
    # the digital controller's half sample goes into the dead time
    assert half_rule(1.0, [5.0], 1.0, sample_time=0.5).dead_time == pytest.approx(1.25)
    # and the reduced model follows the full one's step response closely (scipy.signal reference)
    from scipy import signal

    t = np.linspace(0, 60, 3001)
    den = np.poly1d([1.0])
    for tau in (5, 2, 0.4, 0.1):
        den = den * np.poly1d([tau, 1.0])
    _, y = signal.step(signal.lti([-0.3, 1.0], den.coeffs), T=t)
    y = np.interp(t - 1.0, t, y, left=0.0)
    assert np.max(np.abs(f1.response(t) - y)) < 0.1
    with pytest.raises(SettingsError, match="order"):
        half_rule(1.0, [5.0], order=2)


def test_sampling_advice_on_wood_berry(wb_lin):
    adv = sampling_advice(wb_lin, 1.0)
    # dominant time constant 21 min (Wood & Berry 1973), largest MV dead time 7 min
    assert adv.dominant_time_constant == pytest.approx(21.0, rel=1e-9)
    assert adv.largest_dead_time == pytest.approx(7.0)
    assert adv.suggested_horizon == math.ceil(4 * 21.0 + 7.0)
    assert not adv.warnings
    coarse = sampling_advice(wb_lin, 5.0)
    assert any("tenth" in w for w in coarse.warnings)


def _cstr_fold_points():
    """Coolant temperatures at the folds from the Henson-Seborg balances, solved by hand.

    At steady state CA = (q/V) CAf / (q/V + k(T)), and the energy balance gives Tc explicitly:
    Tc(T) = T - V rho Cp / UA [q/V (Tf - T) + (-dH)/(rho Cp) k(T) CA(T)].  Folds are where
    dTc/dT = 0 (derivative by central differences, root by scipy's brentq).
    """
    q, V, CAf, Tf, rho, Cp, dH, EoR, k0, UA = 100, 100, 1, 350, 1000, 0.239, -5e4, 8750, 7.2e10, 5e4

    def Tc(T):
        k = k0 * math.exp(-EoR / T)
        CA = (q / V) * CAf / (q / V + k)
        return T - V * rho * Cp / UA * (q / V * (Tf - T) + (-dH) / (rho * Cp) * k * CA)

    def dTc(T, h=1e-4):
        return (Tc(T + h) - Tc(T - h)) / (2 * h)

    grid = np.linspace(300, 420, 2401)
    vals = [dTc(T) for T in grid]
    roots = [brentq(dTc, grid[i], grid[i + 1], xtol=1e-12)
             for i in range(len(grid) - 1) if vals[i] * vals[i + 1] < 0]
    return sorted((Tc(T), T) for T in roots)


def test_cstr_locus_folds_match_the_balances(tmp_path):
    m = mp.make_model("henson_seborg_cstr")
    op = [o for o in mp.steady_states(m) if o.stable][0]
    loc = steady_state_locus(m, "coolant_temperature", 250.0, 350.0, op=op)
    ref = _cstr_fold_points()
    assert len(ref) == 2 and len(loc.folds) == 2
    got = sorted((f["value"], f["states"]["T"]) for f in loc.folds)
    for (tc, T), (tc_r, T_r) in zip(got, ref):
        assert tc == pytest.approx(tc_r, abs=1e-5)
        assert T == pytest.approx(T_r, abs=1e-3)
    # the window of three steady states lies between the folds: Tc = 300 K is inside it, and the
    # multi-start steady-state search finds three steady states there (Henson & Seborg)
    assert got[0][0] < 300.0 < got[1][0]
    assert len(mp.steady_states(m)) == 3
    # stability changes along the branch: the middle part is unstable (Henson & Seborg)
    assert loc.stable[0] and not loc.stable.all()
    png = tmp_path / "locus.png"
    plot_locus(loc, png, cv="temperature")
    assert png.stat().st_size > 10_000


def test_locus_refuses_an_unknown_variable():
    m = mp.make_model("henson_seborg_cstr")
    with pytest.raises(SettingsError, match="coolant_temperature"):
        steady_state_locus(m, "coolant_temp", 250, 350)


def test_assess_command_prints_the_design_checks(tmp_path, capsys):
    from mpcproto.cli import main

    png = tmp_path / "locus.png"
    rc = main(["assess", "scenarios/jacketed_reactor_runaway.toml", "--locus",
               "coolant_temperature", "250", "350", "--plot", str(png)])
    out = capsys.readouterr().out
    assert rc == 0
    assert "condition number" in out and "PID loops" in out and "fold at coolant_temperature" in out
    assert png.stat().st_size > 10_000
    rc = main(["assess", "scenarios/wood_berry_column.toml", "--json"])
    import json

    rep = json.loads(capsys.readouterr().out)
    assert rc == 0
    # the Wood & Berry figures of test_wood_berry_gain_matrix_figures, through the scenario layer
    assert rep["gain_analysis"]["niederlinski"] == pytest.approx(-123.58 / (12.8 * -19.4), rel=1e-9)
    assert [p["cv"] for p in rep["pid"]] == ["top_composition", "bottom_composition"]
    assert all(p["margins"]["gain_margin"] > 1 for p in rep["pid"])
    # half rule on a first-order channel: the published FOPDT itself (Wood & Berry 1973: 12.8,
    # 16.7 min, 1 min) plus half the 1 min sample for the hold (Skogestad 2003's digital rule)
    h = rep["pid"][0]["half_rule"]
    assert h["gain"] == pytest.approx(12.8, rel=1e-9)
    assert h["time_constant"] == pytest.approx(16.7, rel=1e-9)
    assert h["dead_time"] == pytest.approx(1.0 + 0.5, rel=1e-9)


def test_assess_refuses_a_bad_locus_variable(capsys):
    from mpcproto.cli import main

    rc = main(["assess", "scenarios/jacketed_reactor_runaway.toml", "--locus", "coolant", "250", "350"])
    err = capsys.readouterr().err
    assert rc == 2 and "coolant_temperature" in err and "Traceback" not in err
