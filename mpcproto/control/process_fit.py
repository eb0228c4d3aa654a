"""Step tests and the process models fitted to them, for PID tuning (:mod:`mpcproto.control.tuning`).

1. :func:`step_test` moves one MV of the NONLINEAR model by a step and records every CV
   (:func:`mpcproto.responses.open_loop_test`, optionally with measurement noise).
2. :func:`fit_fopdt` / :func:`fit_sopdt` / :func:`fit_integrating` check the shape of the
   response (noise, ramp, inverse response) and fit, by least squares
   (:func:`mpcproto.step_fit.fit_step_response`, the package's one step-response fitter), a
   first- or second-order-plus-dead-time model or an integrator with dead time to it
   (:class:`~mpcproto.step_fit.ProcessFit`); :func:`fit_step` picks the model for one CV of a :class:`StepData`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .._specs import as_float, paired_series, shown
from ..exceptions import SettingsError
from ..validation import Names, Options, check, fail
from ..step_fit import ProcessFit, fit_step_response

__all__ = ["ProcessFit", "StepData", "step_test", "fit_fopdt", "fit_sopdt", "fit_integrating",
           "fit_step"]


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
        check(mv, Names("MV", tuple(model.mv_names)), owner="step_test", key="mv")
    if not (isinstance(size, (int, float)) and math.isfinite(size) and size != 0):
        raise fail("step_test", "size", "a finite non-zero number", shown(size))
    at = float(Ts if at is None else at)
    if not (math.isfinite(at) and 0 <= at < duration):
        raise fail("step_test", "at", f"a time in [0, {duration:g}) (the duration)", f"{at:g}")
    n_pre = int(round(at / Ts))
    at = n_pre * Ts
    try:
        rt = open_loop_test(model, op, mv, kind="step", size=float(size), duration=duration - at, Ts=Ts)
    except SimulationError as exc:
        raise exc.within("step_test", f"the step of {size:g} on '{mv}' made the plant fail; "
                         f"try a smaller step").as_class(SettingsError) from None
    t = np.concatenate([np.arange(n_pre) * Ts, at + rt.t])
    Y = np.vstack([np.tile(np.asarray(op.y, float), (n_pre, 1)), rt.y_nonlinear])
    if isinstance(noise_std, Mapping):
        for c in noise_std:
            if c not in model.cv_names:
                check(c, Names("CV", tuple(model.cv_names)), owner="step_test",
                      key="noise_std")
        std = np.array([float(noise_std.get(c, 0.0)) for c in model.cv_names])
    else:
        std = np.full(len(model.cv_names), float(noise_std))
    if np.any(std < 0) or not np.all(np.isfinite(std)):
        raise fail("step_test", "noise_std", "finite numbers >= 0", shown(noise_std))
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
        raise fail(what, "size", "a finite non-zero step size", shown(size))
    fa = as_float(at)
    if fa is None or not math.isfinite(fa):
        raise fail(what, "at", "the time of the step (a finite number)", shown(at))
    if y0 is not None and (as_float(y0) is None or not math.isfinite(as_float(y0))):
        raise fail(what, "y0", "a finite number or None", shown(y0))
    size, at = fs, fa
    ok = np.isfinite(y)
    if ok.sum() < 5:
        raise fail(what, "y", "at least 5 finite samples of the response", f"{int(ok.sum())}")
    t, y = t[ok], y[ok]
    if y0 is None:
        before = y[t < at]
        y0 = float(before.mean()) if before.size else float(y[0])
    after = t >= at
    if after.sum() < 5:
        raise fail(what, "t", f"at least 5 samples after the step at t={at:g}",
                   f"{int(np.count_nonzero(after))}")
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
        raise fail(what, "size", "a response that rises above the noise",
                   f"a peak of {span:.3g} per unit step, noise {noise:.3g}", "use a larger step",
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
        raise fail(what, "y", "a response that settles by the end of the test",
                   f"one still ramping at the end (slope {slope:.3g} per unit step per time "
                   f"unit): an integrating process (a level?) or a test too short to settle",
                   "Use fit_integrating(), or run the test longer.", code="integrating")
    return final, noise, inverse


def _fit(kind: str, t: Sequence[float], y: Sequence[float], at: float, size: float,
         y0: float | None, cv: str, mv: str) -> ProcessFit:
    """Shape checks here; the least squares is :func:`mpcproto.step_fit.fit_step_response`."""
    what = f"fit_{kind}({cv}<-{mv})" if cv else f"fit_{kind}"
    s, r, _ = _prep(t, y, at, size, y0, what)
    _, _, inverse = _shape_checks(s, r, what, allow_integrating=kind == "integrating")
    if kind == "integrating" and np.polyfit(s[s.size // 2:], r[s.size // 2:], 1)[0] == 0:
        raise fail(what, "y", "an integrating response (a slope at the end)", "no slope")
    # r is the response per unit step measured from y0 at times since the step
    f = fit_step_response(s, r, size=1.0, t_step=0.0, y0=0.0, kind=kind, what=what)
    return replace(f, rmse=f.rmse * abs(size), noise_level=f.noise_level * abs(size),
                   inverse_response=inverse, cv=cv, mv=mv)


def fit_fopdt(t: Sequence[float], y: Sequence[float], *, at: float, size: float,
              y0: float | None = None, cv: str = "", mv: str = "") -> ProcessFit:
    """Least-squares FOPDT fit of a step response (step of *size* at time *at*).

    Refuses a response that is still ramping at the end (use :func:`fit_integrating`) or that
    does not rise above the noise; flags an inverse response.  The fit itself is
    :func:`mpcproto.step_fit.fit_step_response`.
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
        check(cv, Names("CV", tuple(data.y)), owner="fit_step", key="cv")
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
        check(kind, Options(("auto", *fits), noun="a fit kind"), owner="fit_step", key="kind")
    return fits[kind](data.t, data.y[cv], **args)
