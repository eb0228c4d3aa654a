r"""PID tuning from a step test: fit a low-order model, then apply a published rule.

1. :func:`step_test` moves one MV of the NONLINEAR model by a step and records every CV
   (:func:`mpcproto.responses.open_loop_test`, optionally with measurement noise).
2. :func:`fit_fopdt` / :func:`fit_sopdt` / :func:`fit_integrating` check the shape of the
   response (noise, ramp, inverse response) and fit, by least squares
   (:func:`mpcproto.responses.fit_step_response`, the package's one step-response fitter), a
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
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import brentq

from .._specs import as_float, paired_series, shown
from ..exceptions import SettingsError
from ..model import suggest
from .pid import PIDLoop

__all__ = ["ProcessFit", "StepData", "step_test", "fit_fopdt", "fit_sopdt", "fit_integrating",
           "fit_step", "ultimate_point", "simc", "imc", "ziegler_nichols", "tune_loop", "RULES",
           "tune_pid_loops", "default_test_duration", "rule_on_fit", "SIMC_FLOOR_FRACTION",
           "SIMC_MIN_SAMPLES"]

RULES = ("simc", "imc", "ziegler_nichols")
ZN_METHODS = ("ultimate", "reaction_curve")


@dataclass(frozen=True)
class ProcessFit:
    """A low-order process model: ``kind`` ``"fopdt"``, ``"sopdt"`` or ``"integrating"``.

    ``gain`` is the steady-state gain (fopdt/sopdt) or the slope gain (integrating: rate of change
    of the CV per unit MV step).  ``time_constants`` has one (fopdt), two (sopdt, largest first) or
    no entries (integrating).  Times in the model's time unit.
    """

    kind: str
    gain: float
    time_constants: tuple[float, ...] = ()
    dead_time: float = 0.0
    rmse: float | None = None
    inverse_response: bool = False
    cv: str = ""
    mv: str = ""

    def __post_init__(self) -> None:
        n_tau = {"fopdt": 1, "sopdt": 2, "integrating": 0}
        if self.kind not in n_tau:
            raise SettingsError(f"ProcessFit: kind must be one of {', '.join(n_tau)}; found "
                                f"{self.kind!r}{suggest(str(self.kind), list(n_tau))}.")
        if len(self.time_constants) != n_tau[self.kind]:
            raise SettingsError(f"ProcessFit ({self.kind}): needs {n_tau[self.kind]} time "
                                f"constant(s); found {len(self.time_constants)}.")
        if not (math.isfinite(self.gain) and self.gain != 0):
            raise SettingsError(f"ProcessFit ({self.kind}): the gain must be finite and non-zero; "
                                f"found {self.gain!r}.")
        for tau in self.time_constants:
            if not (math.isfinite(tau) and tau > 0):
                raise SettingsError(f"ProcessFit ({self.kind}): time constants must be finite and "
                                    f"> 0; found {tau!r}.")
        if not (math.isfinite(self.dead_time) and self.dead_time >= 0):
            raise SettingsError(f"ProcessFit ({self.kind}): the dead time must be finite and >= 0; "
                                f"found {self.dead_time!r}.")

    @classmethod
    def fopdt(cls, gain: float, time_constant: float, dead_time: float = 0.0, **kw: Any) -> "ProcessFit":
        return cls("fopdt", float(gain), (float(time_constant),), float(dead_time), **kw)

    @classmethod
    def sopdt(cls, gain: float, tau1: float, tau2: float, dead_time: float = 0.0, **kw: Any) -> "ProcessFit":
        t1, t2 = sorted((float(tau1), float(tau2)), reverse=True)
        return cls("sopdt", float(gain), (t1, t2), float(dead_time), **kw)

    @classmethod
    def integrating(cls, slope_gain: float, dead_time: float = 0.0, **kw: Any) -> "ProcessFit":
        return cls("integrating", float(slope_gain), (), float(dead_time), **kw)

    def response(self, t: np.ndarray) -> np.ndarray:
        """Unit-step response (CV change per unit MV step applied at t = 0)."""
        from ..responses import step_model_response

        return step_model_response(t, self.gain, self.time_constants, self.dead_time,
                                   integrating=self.kind == "integrating")

    def frequency_response(self, w: np.ndarray) -> np.ndarray:
        """G(jw)."""
        s = 1j * np.asarray(w, float)
        g = self.gain * np.exp(-s * self.dead_time)
        if self.kind == "integrating":
            return g / s
        for tau in self.time_constants:
            g = g / (tau * s + 1.0)
        return g

    def as_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "gain": self.gain, "time_constants": list(self.time_constants),
                "dead_time": self.dead_time, "rmse": self.rmse,
                "inverse_response": self.inverse_response, "cv": self.cv, "mv": self.mv}


@dataclass
class StepData:
    """Recorded response of a step test: ``t``, CVs by name, the MV step and when it happened."""

    t: np.ndarray
    y: dict[str, np.ndarray]
    mv: str
    size: float
    at: float
    y0: dict[str, float] = field(default_factory=dict)


# ---------------------------------------------------------------------------------- step test
def step_test(model: Any, op: Any, mv: str, *, size: float, Ts: float, duration: float,
              at: float | None = None, noise_std: Mapping[str, float] | float = 0.0,
              rng: Any = None) -> StepData:
    """Step MV *mv* of the nonlinear *model* by *size* at time *at* (default ``Ts``) from *op*.

    Other MVs and the DVs stay at *op* (which should be a steady state: the samples before the
    step are its CVs).  The nonlinear response comes from
    :func:`mpcproto.responses.open_loop_test` (the closed loop's plant stepper: MVs held over each
    sample, dead times exact).  ``noise_std`` (one number or per CV) adds white measurement noise drawn from *rng*
    (an int seed or a ``numpy.random.Generator``).
    """
    from ..exceptions import SimulationError
    from ..responses import open_loop_test

    if mv not in model.mv_names:
        raise SettingsError(f"step_test: '{mv}' is not an MV of model '{model.name}'"
                            f"{suggest(mv, model.mv_names)}; MVs: {', '.join(model.mv_names)}.")
    if not (isinstance(size, (int, float)) and math.isfinite(size) and size != 0):
        raise SettingsError(f"step_test: 'size' must be a finite non-zero number; found {size!r}.")
    at = float(Ts if at is None else at)
    if not (math.isfinite(at) and 0 <= at < duration):
        raise SettingsError(f"step_test: 'at' must be in [0, duration); found {at!r}.")
    n_pre = int(round(at / Ts))
    at = n_pre * Ts
    try:
        rt = open_loop_test(model, op, mv, kind="step", size=float(size), duration=duration - at, Ts=Ts)
    except SimulationError as exc:
        raise SettingsError(f"step_test: the step of {size:g} on '{mv}' made the plant fail: "
                            f"{exc}. Try a smaller step.") from None
    t = np.concatenate([np.arange(n_pre) * Ts, at + rt.t])
    Y = np.vstack([np.tile(np.asarray(op.y, float), (n_pre, 1)), rt.y_nonlinear])
    if isinstance(noise_std, Mapping):
        for c in noise_std:
            if c not in model.cv_names:
                raise SettingsError(f"step_test: noise_std names '{c}', not a CV of model "
                                    f"'{model.name}'{suggest(str(c), model.cv_names)}.")
        std = np.array([float(noise_std.get(c, 0.0)) for c in model.cv_names])
    else:
        std = np.full(len(model.cv_names), float(noise_std))
    if np.any(std < 0) or not np.all(np.isfinite(std)):
        raise SettingsError(f"step_test: noise_std must be finite and >= 0; found {noise_std!r}.")
    if np.any(std > 0):
        gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        Y = Y + gen.standard_normal(Y.shape) * std
    return StepData(t=t, y={c: Y[:, i].copy() for i, c in enumerate(model.cv_names)},
                    mv=mv, size=float(size), at=at,
                    y0={c: float(v) for c, v in zip(model.cv_names, op.y)})


def _prep(t, y, at, size, y0, what):
    t, y = paired_series(t, y, what=what, finite_y=False)
    fs = as_float(size)
    if fs is None or not math.isfinite(fs) or fs == 0:
        raise SettingsError(f"the step size must be finite and non-zero; found {shown(size)}.",
                            owner=what)
    fa = as_float(at)
    if fa is None or not math.isfinite(fa):
        raise SettingsError(f"'at' (the time of the step) must be a finite number; found "
                            f"{shown(at)}.", owner=what)
    if y0 is not None and (as_float(y0) is None or not math.isfinite(as_float(y0))):
        raise SettingsError(f"'y0' must be a finite number or None; found {shown(y0)}.", owner=what)
    size, at = fs, fa
    ok = np.isfinite(y)
    if ok.sum() < 5:
        raise SettingsError("fewer than 5 finite samples of the response.", owner=what)
    t, y = t[ok], y[ok]
    if y0 is None:
        before = y[t < at]
        y0 = float(before.mean()) if before.size else float(y[0])
    after = t >= at
    if after.sum() < 5:
        raise SettingsError(f"fewer than 5 samples after the step at t={at:g}.", owner=what)
    return t[after] - at, (y[after] - y0) / size, y0


def _noise_level(r: np.ndarray) -> float:
    """Robust noise estimate from successive differences (MAD)."""
    d = np.diff(r)
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / math.sqrt(2)) if d.size else 0.0


def _shape_checks(s, r, what, allow_integrating=False):
    n = r.size
    tail = r[int(0.8 * n):]
    final = float(np.mean(tail))
    noise = _noise_level(r)
    span = float(np.max(np.abs(r))) if r.size else 0.0
    if span <= 3 * noise or span == 0:
        raise SettingsError(f"the response does not rise above the noise (peak "
                            f"{span:.3g} per unit step, noise {noise:.3g}); use a larger step.",
                            owner=what,
                            code="no_response")
    # integrating: still moving at the end at a rate comparable to the mean rate
    ts = s[int(0.8 * n):]
    slope = np.polyfit(ts, tail, 1)[0] if ts.size > 2 else 0.0
    mean_rate = abs(final) / max(s[-1], 1e-12)
    integrating = abs(slope) > 0.5 * mean_rate and abs(slope) * (ts[-1] - ts[0]) > 5 * noise
    # inverse response: an early excursion opposite the final direction, beyond the noise
    sign = np.sign(final) if final != 0 else np.sign(r[np.argmax(np.abs(r))])
    inverse = bool(np.min(sign * r) < -max(5 * noise, 0.02 * abs(final)))
    if integrating and not allow_integrating:
        raise SettingsError(
            f"the response is still ramping at the end (slope {slope:.3g} per unit step "
            f"per time unit): an integrating process (a level?) or a test too short to settle. "
            f"Use fit_integrating(), or run the test longer.", owner=what, code="integrating")
    return final, noise, inverse


def _fit(kind: str, t: Sequence[float], y: Sequence[float], at: float, size: float,
         y0: float | None, cv: str, mv: str) -> ProcessFit:
    """Shape checks here; the least squares is :func:`mpcproto.responses.fit_step_response`."""
    from ..responses import fit_step_response

    what = f"fit_{kind}({cv}<-{mv})" if cv else f"fit_{kind}"
    s, r, _ = _prep(t, y, at, size, y0, what)
    _, _, inverse = _shape_checks(s, r, what, allow_integrating=kind == "integrating")
    if kind == "integrating" and np.polyfit(s[s.size // 2:], r[s.size // 2:], 1)[0] == 0:
        raise SettingsError("the response has no slope; it is not integrating.", owner=what)
    # r is the response per unit step measured from y0 at times since the step
    f = fit_step_response(s, r, size=1.0, t_step=0.0, y0=0.0, kind=kind, what=what)
    return ProcessFit(kind, f.gain, f.time_constants, f.dead_time, rmse=f.rms_error * abs(size),
                      inverse_response=inverse, cv=cv, mv=mv)


def fit_fopdt(t: Sequence[float], y: Sequence[float], *, at: float, size: float,
              y0: float | None = None, cv: str = "", mv: str = "") -> ProcessFit:
    """Least-squares FOPDT fit of a step response (step of *size* at time *at*).

    Refuses a response that is still ramping at the end (use :func:`fit_integrating`) or that
    does not rise above the noise; flags an inverse response.  The fit itself is
    :func:`mpcproto.responses.fit_step_response`.
    """
    return _fit("fopdt", t, y, at, size, y0, cv, mv)


def fit_sopdt(t: Sequence[float], y: Sequence[float], *, at: float, size: float,
              y0: float | None = None, cv: str = "", mv: str = "") -> ProcessFit:
    """Least-squares SOPDT fit (two real time constants) of a step response (see
    :func:`fit_fopdt`)."""
    return _fit("sopdt", t, y, at, size, y0, cv, mv)


def fit_integrating(t: Sequence[float], y: Sequence[float], *, at: float, size: float,
                    y0: float | None = None, cv: str = "", mv: str = "") -> ProcessFit:
    """Least-squares fit of ``k' e^{-theta s}/s`` (slope gain and dead time) to a ramp response."""
    return _fit("integrating", t, y, at, size, y0, cv, mv)


def fit_step(data: StepData, cv: str, *, kind: str = "auto") -> ProcessFit:
    """Fit one CV of a :class:`StepData`: ``kind`` "fopdt", "sopdt", "integrating" or "auto"
    (integrating if the response still ramps at the end, else FOPDT)."""
    if cv not in data.y:
        raise SettingsError(f"fit_step: no CV '{cv}' in the step data{suggest(cv, list(data.y))}.")
    args = dict(at=data.at, size=data.size, y0=data.y0.get(cv), cv=cv, mv=data.mv)
    fits = {"fopdt": fit_fopdt, "sopdt": fit_sopdt, "integrating": fit_integrating}
    if kind == "auto":
        try:
            return fit_fopdt(data.t, data.y[cv], **args)
        except SettingsError as exc:
            if exc.code != "integrating":
                raise
            return fit_integrating(data.t, data.y[cv], **args)
    if kind not in fits:
        raise SettingsError(f"fit_step: kind must be one of auto, {', '.join(fits)}; found "
                            f"{kind!r}{suggest(str(kind), list(fits))}.")
    return fits[kind](data.t, data.y[cv], **args)


# ---------------------------------------------------------------------------------- rules
def _refuse_inverse(fit: ProcessFit, rule: str) -> None:
    if fit.inverse_response:
        raise SettingsError(
            f"the step response of {fit.cv or 'this CV'} shows an inverse response (it first "
            f"moves the wrong way); the rule assumes a monotonic response. Model the right-half-"
            f"plane zero (e.g. Skogestad's half rule into the dead time) before tuning.",
            owner=rule)


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
    if not (isinstance(min_tau_c, (int, float)) and not isinstance(min_tau_c, bool)
            and math.isfinite(min_tau_c) and min_tau_c >= 0):
        raise SettingsError(f"simc: min_tau_c must be a finite number >= 0; found {min_tau_c!r}.")
    if tau_c is None:
        floor = SIMC_FLOOR_FRACTION * fit.time_constants[0] if fit.time_constants else 0.0
        tau_c = max(th, floor, float(min_tau_c))
        if tau_c <= 0:
            raise SettingsError("simc: the fitted dead time is 0 and the process integrates, so "
                                "the default tau_c = dead time is 0; give tau_c (the desired "
                                "closed-loop time constant) > 0.")
    if not (isinstance(tau_c, (int, float)) and math.isfinite(tau_c) and tau_c > 0):
        raise SettingsError(f"simc: tau_c must be a finite number > 0; found {tau_c!r}.")
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
        raise SettingsError(f"imc: mode must be 'PID' or 'PI'; found {mode!r}.")
    if fit.kind != "fopdt":
        raise SettingsError(
            f"imc: the IMC rules implemented here are for a first-order-plus-dead-time process; the "
            f"model is {fit.kind}. Fit a FOPDT (fit_fopdt) or use simc, which covers integrating "
            f"and second-order processes.")
    _refuse_inverse(fit, "imc")
    k, tau, th = fit.gain, fit.time_constants[0], fit.dead_time
    if lam is None:
        lam = max(th, 0.1 * tau) if mode == "PID" else max(1.7 * th, 0.1 * tau)
    if not (isinstance(lam, (int, float)) and math.isfinite(lam) and lam > 0):
        raise SettingsError(f"imc: lam (the IMC filter time constant) must be > 0; found {lam!r}.")
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
            raise SettingsError(f"ultimate_point: dead_time must be >= 0; found {dead_time!r}.")

        def G(w):
            s = 1j * np.asarray(w, float)
            return np.polyval(num, s) / np.polyval(dn, s) * np.exp(-s * dead_time)

        roots = np.roots(dn)
        mags = np.abs(roots[np.abs(roots) > 0])
        scale = max([1.0 / m for m in mags] + [dead_time, 1e-12])
        k_sign = float(np.real(G(1e-9 / scale)))
    if k_sign < 0:
        raise SettingsError("ultimate_point: the process gain is negative; use the magnitude "
                            "(the controller's action is reversed), e.g. a fit with -gain.")
    w = np.logspace(-4, 4, 4000) / scale
    if w_max is not None:
        w = w[w <= w_max]
    ph = np.unwrap(np.angle(G(w)))
    crossed = np.flatnonzero(ph <= -np.pi)
    if crossed.size == 0 or crossed[0] == 0:
        raise SettingsError(
            "ultimate_point: the phase of the process never reaches -180 deg (e.g. a first-order "
            "process without dead time), so there is no ultimate gain; the Ziegler-Nichols "
            "ultimate-sensitivity rule does not apply. Use simc or imc.")
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
        raise SettingsError(f"ziegler_nichols: mode must be one of P, PI, PID; found {mode!r}.")
    if method not in ZN_METHODS:
        raise SettingsError(f"ziegler_nichols: method must be one of {', '.join(ZN_METHODS)}; "
                            f"found {method!r}.")
    if method == "reaction_curve":
        return _zn_reaction_curve(fit, ultimate, mode, cv, mv, **loop_kw)
    if (fit is None) == (ultimate is None):
        raise SettingsError("ziegler_nichols: give either a fitted model or ultimate=(Ku, Pu).")
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
            raise SettingsError(f"ziegler_nichols: Ku and Pu must be > 0; found {ultimate!r}.")
    a, b, c = table[mode]
    dummy = fit or ProcessFit.fopdt(1.0, 1.0)
    return _loop(dummy, sign * a * Ku, b * Pu if b else math.inf, c * Pu, "ziegler_nichols",
                 cv, mv, **loop_kw)


def _zn_reaction_curve(fit, ultimate, mode, cv, mv, **loop_kw) -> PIDLoop:
    """Ziegler & Nichols (1942) step-response rule on a FOPDT fit (module docstring)."""
    if fit is None or ultimate is not None or fit.kind != "fopdt":
        raise SettingsError("ziegler_nichols: method 'reaction_curve' needs a FOPDT fit (the "
                            "apparent dead time and steepest slope of a step response); "
                            + ("ultimate=(Ku, Pu) belongs to method 'ultimate'." if ultimate
                               is not None else f"found {'no fit' if fit is None else fit.kind}."))
    _refuse_inverse(fit, "ziegler_nichols")
    L = fit.dead_time
    if L <= 0:
        raise SettingsError("ziegler_nichols: the reaction-curve rule needs an apparent dead time "
                            "> 0 (its gains are 1/(R L)); the fit has none. Use simc or imc.")
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
        raise SettingsError(f"tune_loop: unknown rule {rule!r}{suggest(str(rule), RULES)}; "
                            f"expected one of: {', '.join(RULES)}.")
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
        raise SettingsError(f"unknown rule {rule!r}{suggest(str(rule), RULES)}; expected "
                            f"one of: {', '.join(RULES)}.", owner=what)
    if not (isinstance(step_fraction, (int, float)) and 0 < step_fraction <= 0.5):
        raise SettingsError(f"step_fraction must be in (0, 0.5]; found {step_fraction!r}.",
                            owner=what)
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
        raise SettingsError(f"extra dead time for '{cv}' must be a number >= 0; "
                            f"found {extra!r}.", owner=what)
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
        raise SettingsError(f"loop {cv}<-{mv}: {exc}", owner=what) from None
