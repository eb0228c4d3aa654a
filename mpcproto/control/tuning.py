r"""PID tuning from a step test: fit a low-order model, then apply a published rule.

Steps 1 and 2 live in :mod:`mpcproto.control.process_fit` (re-exported here).

1. :func:`step_test` moves one MV of the NONLINEAR model by a step and records every CV
   (:func:`mpcproto.responses.open_loop_test`, optionally with measurement noise).
2. :func:`fit_fopdt` / :func:`fit_sopdt` / :func:`fit_integrating` check the shape of the
   response (noise, ramp, inverse response) and fit, by least squares
   (:func:`mpcproto.step_fit.fit_step_response`, the package's one step-response fitter), a
   first- or second-order-plus-dead-time model or an integrator with dead time to it.
3. A rule turns the fitted :class:`ProcessFit` into :class:`mpcproto.control.pid.PIDLoop` settings
   (ideal form ``K (1 + 1/(Ti s) + Td s)``):

:func:`simc` -- Skogestad (2003), "Simple analytic rules for model reduction and PID controller
tuning", J. Process Control 13:291-309.  With closed-loop time constant :math:`\tau_c`
(the paper recommends :math:`\tau_c = \theta` for tight, robust control; our default has a floor,
:math:`\tau_c = \max(\theta, \tau_1/10)` for a self-regulating process and
:math:`\tau_c = \max(\theta, \tau_{c,\min})` for an integrating one, :data:`SIMC_FLOOR_FRACTION`
and ``min_tau_c``: a fitted dead time near zero otherwise gives a gain that swings the MV between
its limits on every sample of measurement noise.  The floor is common practice, no source; it is
the same :math:`0.1\tau` floor as the IMC default :math:`\lambda` below.  Skogestad and Grimholt
(2012, "The SIMC method for smooth PID controller tuning", from memory) discuss choosing a larger
:math:`\tau_c` for smooth control):

* FOPDT :math:`k e^{-\theta s}/(\tau_1 s + 1)` -> PI: :math:`K_c = \frac{1}{k}\frac{\tau_1}{\tau_c + \theta}`,
  :math:`\tau_I = \min(\tau_1, 4(\tau_c + \theta))`;
* SOPDT :math:`k e^{-\theta s}/((\tau_1 s + 1)(\tau_2 s + 1))` -> series PID with the same
  :math:`K_c, \tau_I` and :math:`\tau_D = \tau_2`, converted to the ideal form
  (:math:`K = K_c(1 + \tau_D/\tau_I)`, :math:`T_i = \tau_I + \tau_D`,
  :math:`T_d = \tau_I\tau_D/(\tau_I + \tau_D)`);
* integrating :math:`k' e^{-\theta s}/s` -> PI: :math:`K_c = \frac{1}{k'}\frac{1}{\tau_c + \theta}`,
  :math:`\tau_I = 4(\tau_c + \theta)`.

:func:`imc` -- Rivera, Morari & Skogestad (1986), "Internal model control. 4. PID controller
design", Ind. Eng. Chem. Process Des. Dev. 25:252-265, Table 1 (from memory), FOPDT
:math:`k e^{-\theta s}/(\tau s + 1)` with filter time constant :math:`\lambda`:

* PID, with a first-order Pade approximation of the dead time
  :math:`e^{-\theta s} \approx (1 - \theta s/2)/(1 + \theta s/2)`:
  :math:`K k = \frac{2\tau + \theta}{2\lambda + \theta}`, :math:`T_i = \tau + \theta/2`,
  :math:`T_d = \frac{\tau\theta}{2\tau + \theta}`, already in the ideal form (derived: the IMC
  controller :math:`q = (\tau s + 1)(1 + \theta s/2)/(k(\lambda s + 1))` gives the feedback
  controller :math:`q/(1 - G q) = \frac{(\tau s + 1)(1 + \theta s/2)}{k(\lambda + \theta/2)s}`,
  whose loop is :math:`L(s) = \frac{1 - \theta s/2}{(\lambda + \theta/2) s}`; the same entry as the
  FOPDT PID row of Seborg, Edgar & Mellichamp's IMC table, from memory).  Advised
  :math:`\lambda > 0.8\theta`; default :math:`\lambda = \max(\theta, 0.1\tau)`.
* PI ("improved PI"): :math:`K k = \frac{2\tau + \theta}{2\lambda}`, :math:`T_i = \tau + \theta/2`
  (advised :math:`\lambda > 1.7\theta`; default :math:`\lambda = \max(1.7\theta, 0.1\tau)`;
  from memory).

:func:`ziegler_nichols` -- Ziegler & Nichols (1942), "Optimum settings for automatic
controllers", Trans. ASME 64:759-768 (tables from memory; applied in the ideal form, as Astrom &
Hagglund present them):

* ultimate-sensitivity method (``method="ultimate"``, the default) with ultimate gain :math:`K_u`
  and period :math:`P_u` (measured, or from :func:`ultimate_point` of the fitted model):
  P: :math:`K = 0.5K_u`; PI: :math:`K = 0.45K_u, T_i = P_u/1.2`; PID: :math:`K = 0.6K_u,
  T_i = P_u/2, T_d = P_u/8`;
* step-response (reaction-curve) method (``method="reaction_curve"``) with the apparent dead time
  :math:`L = \theta` and the steepest slope per unit step :math:`R = k/\tau` of a FOPDT fit
  (:math:`a = RL = k\theta/\tau`): P: :math:`K = 1/a`; PI: :math:`K = 0.9/a, T_i = 3L`;
  PID: :math:`K = 1.2/a, T_i = 2L, T_d = L/2`.

Each rule refuses a model it was not derived for (an integrating process for IMC, an inverse
response, a model without a phase crossover for Ziegler-Nichols) with a :class:`SettingsError`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy.optimize import brentq

from ..exceptions import SettingsError
from ..validation import Interval, Options, check, fail
from .pid import PIDLoop
from .process_fit import (ProcessFit, StepData, fit_fopdt, fit_integrating, fit_sopdt, fit_step,
                          step_test)

__all__ = ["ProcessFit", "StepData", "step_test", "fit_fopdt", "fit_sopdt", "fit_integrating",
           "fit_step", "ultimate_point", "simc", "imc", "ziegler_nichols", "tune_loop", "RULES",
           "tune_pid_loops", "default_test_duration", "rule_on_fit", "SIMC_FLOOR_FRACTION",
           "SIMC_MIN_SAMPLES"]

RULES = ("simc", "imc", "ziegler_nichols")
ZN_METHODS = ("ultimate", "reaction_curve")


# ---------------------------------------------------------------------------------- rules
def _refuse_inverse(fit: ProcessFit, rule: str) -> None:
    if fit.inverse_response:
        raise fail(rule, "rule", "a monotonic step response (the rule assumes one)",
                   f"an inverse response of {fit.cv or 'this CV'} (it first moves the wrong way)",
                   "Model the right-half-plane zero (e.g. Skogestad's half rule into the dead "
                   "time) before tuning.")


def _loop(fit: ProcessFit, K: float, Ti: float, Td: float, rule: str, cv: str | None,
          mv: str | None, **kw: Any) -> PIDLoop:
    return PIDLoop(cv=cv or fit.cv or "cv", mv=mv or fit.mv or "mv", gain=float(K),
                   integral_time=float(Ti), derivative_time=float(Td), rule=rule, **kw)


#: the default SIMC tau_c is at least this fraction of the largest time constant (common
#: practice, no source; as the IMC default lambda)
SIMC_FLOOR_FRACTION = 0.1
#: :func:`tune_pid_loops` and :func:`rule_on_fit` give SIMC a default tau_c of at least this many
#: sample times (a sampled loop cannot be faster than a few samples; common practice, no source)
SIMC_MIN_SAMPLES = 10


def simc(fit: ProcessFit, *, tau_c: float | None = None, min_tau_c: float = 0.0,
         cv: str | None = None, mv: str | None = None, **loop_kw: Any) -> PIDLoop:
    """SIMC settings (Skogestad 2003; formulas in the module docstring).

    The default ``tau_c`` is ``max(dead time, tau_1 / 10, min_tau_c)`` (``tau_1`` the largest
    time constant; none for an integrating process): Skogestad's ``tau_c = dead time`` with a
    floor (common practice, no source).  ``min_tau_c`` applies only to the default;
    :func:`tune_pid_loops` gives ten samples (:data:`SIMC_MIN_SAMPLES`).
    """
    _refuse_inverse(fit, "simc")
    th = fit.dead_time
    check(min_tau_c, Interval(float, 0, None), owner="simc", key="min_tau_c")
    if tau_c is None:
        floor = SIMC_FLOOR_FRACTION * fit.time_constants[0] if fit.time_constants else 0.0
        tau_c = max(th, floor, float(min_tau_c))
        if tau_c <= 0:
            raise fail("simc", "tau_c", "a tau_c (the desired closed-loop time constant) > 0",
                       "none, and the default tau_c = dead time is 0 (the fitted dead time is 0 "
                       "and the process integrates)", "give tau_c")
    if isinstance(tau_c, bool) or not isinstance(tau_c, (int, float)):
        raise fail("simc", "tau_c", "a number > 0", repr(tau_c))
    check(tau_c, Interval(float, 0, None, closed="neither"), owner="simc", key="tau_c")
    k = fit.gain
    if fit.kind == "integrating":
        return _loop(fit, 1.0 / (k * (tau_c + th)), 4.0 * (tau_c + th), 0.0, "simc", cv, mv, **loop_kw)
    t1 = fit.time_constants[0]
    Kc = t1 / (k * (tau_c + th))
    Ti = min(t1, 4.0 * (tau_c + th))
    if fit.kind == "fopdt":
        return _loop(fit, Kc, Ti, 0.0, "simc", cv, mv, **loop_kw)
    Td = fit.time_constants[1]
    return _loop(fit, Kc * (1 + Td / Ti), Ti + Td, Ti * Td / (Ti + Td), "simc", cv, mv, **loop_kw)


def imc(fit: ProcessFit, *, lam: float | None = None, mode: str = "PID", cv: str | None = None,
        mv: str | None = None, **loop_kw: Any) -> PIDLoop:
    """IMC-PID / IMC-PI settings for a FOPDT model (Rivera, Morari & Skogestad 1986)."""
    if mode not in ("PID", "PI"):
        raise fail("imc", "mode", "'PID' or 'PI'", repr(mode))
    if fit.kind != "fopdt":
        raise fail("imc", "rule", "a first-order-plus-dead-time process (the IMC rules "
                   "implemented here are for one)", f"the {fit.kind} fit of the step test",
                   "Fit a FOPDT (fit_fopdt) or use simc, which covers integrating and "
                   "second-order processes")
    _refuse_inverse(fit, "imc")
    k, tau, th = fit.gain, fit.time_constants[0], fit.dead_time
    if lam is None:
        lam = max(th, 0.1 * tau) if mode == "PID" else max(1.7 * th, 0.1 * tau)
    if not (isinstance(lam, (int, float)) and math.isfinite(lam) and lam > 0):
        raise fail("imc", "lam", "the IMC filter time constant > 0", repr(lam))
    Ti = tau + th / 2.0
    if mode == "PID":     # Rivera, Morari & Skogestad (1986), Table 1, PID row (Pade)
        return _loop(fit, (2 * tau + th) / (k * (2 * lam + th)), Ti, tau * th / (2 * tau + th),
                     "imc", cv, mv, **loop_kw)
    return _loop(fit, (2 * tau + th) / (2 * k * lam), Ti, 0.0, "imc", cv, mv, **loop_kw)


def ultimate_point(fit_or_num: Any, den: Sequence[float] | None = None, dead_time: float = 0.0,
                   *, w_max: float | None = None) -> tuple[float, float]:
    """Ultimate gain and period ``(Ku, Pu)``: the gain at which a P controller brings the loop to
    sustained oscillation, from the first frequency where the phase of G(jw) reaches -180 deg.

    Give a :class:`ProcessFit`, or polynomial coefficients ``num, den`` (highest power first) and a
    dead time.  Raises :class:`SettingsError` if the phase never reaches -180 deg (e.g. a FOPDT
    without dead time) or the gain is negative.
    """
    if isinstance(fit_or_num, ProcessFit):
        fit = fit_or_num
        G = fit.frequency_response
        scale = max(list(fit.time_constants) + [fit.dead_time, 1e-12])
        k_sign = fit.gain
    else:
        num = np.atleast_1d(np.asarray(fit_or_num, float))
        dn = np.atleast_1d(np.asarray(den, float))
        if not (math.isfinite(dead_time) and dead_time >= 0):
            raise fail("ultimate_point", "dead_time", "a finite dead time >= 0", repr(dead_time))

        def G(w):
            s = 1j * np.asarray(w, float)
            return np.polyval(num, s) / np.polyval(dn, s) * np.exp(-s * dead_time)

        roots = np.roots(dn)
        mags = np.abs(roots[np.abs(roots) > 0])
        scale = max([1.0 / m for m in mags] + [dead_time, 1e-12])
        k_sign = float(np.real(G(1e-9 / scale)))
    if k_sign < 0:
        raise fail("ultimate_point", "fit_or_num", "a process with a positive gain",
                   "a negative gain", "use the magnitude (the controller's action is reversed), "
                   "e.g. a fit with -gain")
    w = np.logspace(-4, 4, 4000) / scale
    if w_max is not None:
        w = w[w <= w_max]
    ph = np.unwrap(np.angle(G(w)))
    crossed = np.flatnonzero(ph <= -np.pi)
    if crossed.size == 0 or crossed[0] == 0:
        raise fail("ultimate_point", "fit_or_num",
                   "a process whose phase reaches -180 deg (one with an ultimate gain)",
                   "a phase that never reaches -180 deg (e.g. a first-order process without dead "
                   "time)", "the Ziegler-Nichols ultimate-sensitivity rule does not apply; use "
                   "simc or imc")
    i = crossed[0]
    # refine between the two grid points on the phase continued from the lower one
    lo, hi = w[i - 1], w[i]
    ph_lo = ph[i - 1]

    def phase_at(x):
        return ph_lo + np.angle(G(np.array([x]))[0] / G(np.array([lo]))[0]) + np.pi

    wc = brentq(phase_at, lo, hi, xtol=1e-14 * hi, rtol=1e-14)
    Ku = 1.0 / abs(G(np.array([wc]))[0])
    return float(Ku), float(2 * np.pi / wc)


def ziegler_nichols(fit: ProcessFit | None = None, *, ultimate: tuple[float, float] | None = None,
                    mode: str = "PID", method: str = "ultimate", cv: str | None = None,
                    mv: str | None = None, **loop_kw: Any) -> PIDLoop:
    """Ziegler-Nichols (1942) settings (formulas in the module docstring).

    ``method="ultimate"``: give a :class:`ProcessFit` (its ultimate point is computed) or
    ``ultimate=(Ku, Pu)`` measured on the plant.  ``method="reaction_curve"``: give a FOPDT
    :class:`ProcessFit` (its dead time is the apparent dead time L, gain / time constant the
    steepest slope R).
    """
    table = {"P": (0.5, None, 0.0), "PI": (0.45, 1 / 1.2, 0.0), "PID": (0.6, 0.5, 0.125)}
    if mode not in table:
        raise fail("ziegler_nichols", "mode", "one of P, PI, PID", repr(mode))
    check(method, Options(tuple(ZN_METHODS)), owner="ziegler_nichols", key="method")
    if method == "reaction_curve":
        return _zn_reaction_curve(fit, ultimate, mode, cv, mv, **loop_kw)
    if (fit is None) == (ultimate is None):
        raise fail("ziegler_nichols", "ultimate", "either a fitted model or ultimate=(Ku, Pu)",
                   "both" if fit is not None else "neither")
    sign = 1.0
    if fit is not None:
        _refuse_inverse(fit, "ziegler_nichols")
        sign = math.copysign(1.0, fit.gain)
        pos = ProcessFit(fit.kind, abs(fit.gain), fit.time_constants, fit.dead_time)
        Ku, Pu = ultimate_point(pos)
        _warn_zn_range(fit)
    else:
        Ku, Pu = map(float, ultimate)
        if not (Ku > 0 and Pu > 0 and math.isfinite(Ku) and math.isfinite(Pu)):
            raise fail("ziegler_nichols", "ultimate", "(Ku, Pu) both finite and > 0",
                       repr(ultimate))
    a, b, c = table[mode]
    dummy = fit or ProcessFit.fopdt(1.0, 1.0)
    return _loop(dummy, sign * a * Ku, b * Pu if b else math.inf, c * Pu, "ziegler_nichols",
                 cv, mv, **loop_kw)


def _zn_reaction_curve(fit, ultimate, mode, cv, mv, **loop_kw) -> PIDLoop:
    """Ziegler & Nichols (1942) step-response rule on a FOPDT fit (module docstring)."""
    if fit is None or ultimate is not None or fit.kind != "fopdt":
        raise fail("ziegler_nichols", "ultimate" if ultimate is not None else "fit",
                   "for method 'reaction_curve' a FOPDT fit (the apparent dead time and steepest "
                   "slope of a step response)",
                   "ultimate=(Ku, Pu), which belongs to method 'ultimate'" if ultimate is not None
                   else "no fit" if fit is None else f"a {fit.kind} fit")
    _refuse_inverse(fit, "ziegler_nichols")
    L = fit.dead_time
    if L <= 0:
        raise fail("ziegler_nichols", "fit",
                   "for the reaction-curve rule an apparent dead time > 0 (its gains are 1/(R L))",
                   f"a fit with dead time {L:g}", "Use simc or imc.")
    _warn_zn_range(fit)
    a = abs(fit.gain) * L / fit.time_constants[0]          # R L, R = k / tau
    sign = math.copysign(1.0, fit.gain)
    K, Ti, Td = {"P": (1.0 / a, math.inf, 0.0), "PI": (0.9 / a, 3.0 * L, 0.0),
                 "PID": (1.2 / a, 2.0 * L, 0.5 * L)}[mode]
    return _loop(fit, sign * K, Ti, Td, "ziegler_nichols", cv, mv, **loop_kw)


#: dead time / time constant ratios for which the Ziegler-Nichols rules are meant (from memory:
#: the range usually quoted for them, e.g. in Seborg, Edgar & Mellichamp, Process Dynamics and
#: Control; outside it they give poorly damped or sluggish loops)
ZN_RATIO_RANGE = (0.1, 1.0)


def _warn_zn_range(fit: ProcessFit) -> None:
    """Warn when the fitted dead time / time constant ratio is outside :data:`ZN_RATIO_RANGE`."""
    import warnings

    if fit.kind == "integrating" or not fit.time_constants:
        return
    tau = float(sum(fit.time_constants))
    ratio = fit.dead_time / tau if tau > 0 else math.inf
    lo, hi = ZN_RATIO_RANGE
    if not lo <= ratio <= hi:
        warnings.warn(
            f"ziegler_nichols{f' ({fit.cv}<-{fit.mv})' if fit.cv else ''}: dead time / time "
            f"constant = {ratio:.3g}, outside the range {lo:g}-{hi:g} the Ziegler-Nichols rules "
            f"are meant for (from memory, as usually quoted, e.g. Seborg, Edgar & Mellichamp); "
            f"expect a {'poorly damped' if ratio < lo else 'sluggish or unstable'} loop. SIMC or "
            f"IMC settings hold over a wider range.", UserWarning, stacklevel=3)


def tune_loop(fit: ProcessFit, rule: str, **kw: Any) -> PIDLoop:
    """Apply the rule called *rule* (``"simc"``, ``"imc"`` or ``"ziegler_nichols"``) to *fit*."""
    fns = {"simc": simc, "imc": imc, "ziegler_nichols": ziegler_nichols}
    if rule not in fns:
        check(rule, Options(tuple(RULES), noun="a tuning rule"), owner="tune_loop()",
              key="rule")
    return fns[rule](fit, **kw)


def tune_pid_loops(model: Any, op: Any, Ts: float, pairs: Sequence[tuple[str, str]], *,
                   rule: str = "simc", fit: str = "auto", step_fraction: float = 0.05,
                   test_duration: float | None = None, rule_options: Mapping[str, Any] | None = None,
                   loop_options: Mapping[str, Any] | None = None,
                   extra_dead_time: Mapping[str, float] | None = None,
                   what: str = "tune_pid_loops") -> tuple[list[PIDLoop], list[ProcessFit]]:
    """Step-test each (cv, mv) pair on the nonlinear *model*, fit, and apply *rule*.

    The step is ``step_fraction`` of the MV's physical range (or of its value if the range is
    unbounded), upwards unless that leaves the range.  ``test_duration`` defaults to five times
    the slowest time constant of the linearized model plus its largest dead time (at least 20
    samples; 50 samples for an integrating channel).  ``rule_options`` maps a CV name (or
    ``"*"``) to keyword arguments of the rule (``tau_c``, ``lam``, ``mode``).

    The rule sees the fitted dead time plus half a sample (the zero-order hold of a sampled loop;
    common practice, e.g. Skogestad 2003) plus ``extra_dead_time[cv]`` (or ``["*"]``): what the
    step test of the model does not see, such as an analyzer's dead time and half its cycle.
    The returned fits are the effective ones the rule used.
    """
    from ..linear import linearize

    if rule not in RULES:
        check(rule, Options(tuple(RULES), noun="a tuning rule"), owner=what, key="rule")
    check(step_fraction, Interval(float, 0, 0.5, closed="right"), owner=what,
          key="step_fraction")
    lin = linearize(model, op)
    loops, fits = [], []
    lo, hi = model.bounds("mv")
    for cv, mv in pairs:
        j = model.mv_names.index(mv)
        span = hi[j] - lo[j] if math.isfinite(hi[j] - lo[j]) else max(abs(op.u[j]), 1.0)
        size = step_fraction * span
        if op.u[j] + size > hi[j]:
            size = -size
        dur = test_duration if test_duration is not None else default_test_duration(lin, cv, mv, Ts)
        data = step_test(model, op, mv, size=size, Ts=Ts, duration=dur)
        f = fit_step(data, cv, kind=fit)
        lp, f = rule_on_fit(f, cv, mv, Ts=Ts, rule=rule, rule_options=rule_options,
                            loop_options=loop_options, extra_dead_time=extra_dead_time, what=what)
        loops.append(lp)
        fits.append(f)
    return loops, fits


def default_test_duration(lin: Any, cv: str, mv: str, Ts: float) -> float:
    """Step-test length for the (cv, mv) channel of a linearized model: five times its slowest
    time constant plus its dead time (50 samples for an integrating channel), 20 to 2000 samples."""
    ch = [p for p in lin.pairs() if p["cv"] == cv and p["mv"] == mv][0]
    taus = ch["time_constants"]
    integrating = bool(ch["integrating"])       # the linear layer's classification
    dur = 50 * Ts if integrating or not taus else 5 * max(taus) + ch["dead_time"]
    return float(min(max(dur, 20 * Ts), 2000 * Ts))


def rule_on_fit(f: ProcessFit, cv: str, mv: str, *, Ts: float, rule: str,
                rule_options: Mapping[str, Any] | None = None,
                loop_options: Mapping[str, Any] | None = None,
                extra_dead_time: Mapping[str, float] | None = None,
                what: str = "tune") -> tuple[PIDLoop, ProcessFit]:
    """Apply *rule* to a fitted step response: the rule sees the fitted dead time plus half a
    sample plus ``extra_dead_time[cv]`` (see :func:`tune_pid_loops`); returns the loop and the
    effective fit."""
    extra_dead_time = dict(extra_dead_time or {})
    rule_options = dict(rule_options or {})
    extra = extra_dead_time.get(cv, extra_dead_time.get("*", 0.0))
    if not (isinstance(extra, (int, float)) and not isinstance(extra, bool)
            and math.isfinite(extra) and extra >= 0):
        raise fail(what, f"extra_dead_time.{cv}", "a number >= 0", repr(extra))
    # the sampled loop adds about half a sample of delay (zero-order hold), plus what the
    # measurement adds (analyzer dead time and half its cycle)
    f = ProcessFit(f.kind, f.gain, f.time_constants, f.dead_time + 0.5 * Ts + float(extra),
                   rmse=f.rmse, inverse_response=f.inverse_response, cv=f.cv, mv=f.mv)
    kw: dict[str, Any] = {"min_tau_c": SIMC_MIN_SAMPLES * Ts} if rule == "simc" else {}
    kw.update(rule_options.get("*", {}))
    kw.update(rule_options.get(cv, {}))
    kw.update(loop_options or {})
    try:
        return tune_loop(f, rule, cv=cv, mv=mv, **kw), f
    except SettingsError as exc:
        raise exc.within(what, f"loop {cv}<-{mv}") from None
