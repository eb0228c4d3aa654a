"""Step fits: a first- or second-order-plus-dead-time (or integrating) model of a step response.

One result type, :class:`ProcessFit` (a model given by hand or fitted), and one least-squares
fitter, :func:`fit_step_response`.  The tuning layer's :func:`~mpcproto.fit_fopdt`,
:func:`~mpcproto.fit_sopdt`, :func:`~mpcproto.fit_integrating` and :func:`~mpcproto.fit_step` add
shape checks (noise, ramp, inverse response) around the same fitter; the export's step-response
matrix fits its pairs with it too.
"""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._specs import paired_series
from .validation import Options, check, fail, shown

__all__ = ["ProcessFit", "fit_step_response", "step_model_response", "FIT_KINDS", "FIT_NOISE_RATIO",
           "FIT_CHANGE_FRACTION"]

FIT_KINDS = ("fopdt", "sopdt", "integrating")


@dataclass(frozen=True)
class ProcessFit:
    """A low-order process model, given or fitted to a step response (the package's one kind of
    step fit): ``kind`` ``"fopdt"``, ``"sopdt"`` or ``"integrating"``.

    Attributes
    ----------
    kind : str
        ``"fopdt"``, ``"sopdt"`` or ``"integrating"``.
    gain : float
        Steady-state gain (CV change per unit input step); for ``kind="integrating"`` the slope
        gain (rate of change of the CV per unit input step).
    time_constants : tuple of float
        One (FOPDT), two (SOPDT, largest first) or no (integrating) time constants.
    dead_time : float
        Dead time.  Times are in the time unit of the model or the data.
    rmse : float or None
        Root-mean-square residual of the fit (CV unit); None for a model given by hand.
    inverse_response : bool
        The record first moved the wrong way (:func:`fit_fopdt` and its kin flag it).
    cv, mv : str
        The pair, where known.
    noise_level : float
        Noise level of the record (CV unit), from the residual's successive differences.
    explains_record : bool
        False when the residual is well above the noise level and a few % of the response's
        change (see :data:`FIT_NOISE_RATIO`): the fit warned that the model does not explain
        the data (more than one step in the record, a disturbance, another order).
    """

    kind: str
    gain: float
    time_constants: tuple[float, ...] = ()
    dead_time: float = 0.0
    rmse: float | None = None
    inverse_response: bool = False
    cv: str = ""
    mv: str = ""
    noise_level: float = 0.0
    explains_record: bool = True

    def __post_init__(self) -> None:
        n_tau = {"fopdt": 1, "sopdt": 2, "integrating": 0}
        if self.kind not in n_tau:
            check(self.kind, Options(tuple(n_tau)), owner="ProcessFit", key="kind")
        if len(self.time_constants) != n_tau[self.kind]:
            raise fail(f"ProcessFit ({self.kind})", "time_constants",
                       f"{n_tau[self.kind]} time constant(s)", f"{len(self.time_constants)}")
        if not (math.isfinite(self.gain) and self.gain != 0):
            raise fail(f"ProcessFit ({self.kind})", "gain", "a finite non-zero gain",
                       repr(self.gain))
        for tau in self.time_constants:
            if not (math.isfinite(tau) and tau > 0):
                raise fail(f"ProcessFit ({self.kind})", "time_constants",
                           "finite time constants > 0", repr(tau))
        if not (math.isfinite(self.dead_time) and self.dead_time >= 0):
            raise fail(f"ProcessFit ({self.kind})", "dead_time", "a finite dead time >= 0",
                       repr(self.dead_time))

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

    @property
    def element(self) -> Any:
        """The model as a :class:`~mpcproto.TransferElement`, ready for
        :func:`~mpcproto.transfer_matrix_model`; None for an integrating one (a transfer element has
        no pure integrator)."""
        if self.kind == "integrating":
            return None
        from .models.transfer_matrix import TransferElement

        return TransferElement(gain=self.gain, time_constants=self.time_constants,
                               dead_time=self.dead_time)

    def response(self, t: np.ndarray) -> np.ndarray:
        """Unit-step response (CV change per unit MV step applied at t = 0)."""
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


def step_model_response(t: Any, gain: float, time_constants: Sequence[float], dead_time: float,
                        *, integrating: bool = False) -> np.ndarray:
    """Unit-step response of ``gain e^{-dead_time s} / prod(tau s + 1)`` (or ``/ s``).

    Parameters
    ----------
    t : array_like
        Times since the step.
    gain : float
        Steady-state gain, or the slope gain if *integrating*.
    time_constants : sequence of float
        Zero, one or two time constants > 0 (ignored if *integrating*).
    dead_time : float
        Dead time >= 0.
    integrating : bool
        ``gain e^{-dead_time s}/s``: a ramp of slope *gain* after the dead time.

    Returns
    -------
    ndarray
        CV change per unit input step at each *t* (0 before the dead time has passed).
    """
    s = np.clip(np.asarray(t, float) - dead_time, 0.0, None)
    if integrating:
        return gain * s
    if len(time_constants) == 0:
        return gain * (s > 0).astype(float)
    if len(time_constants) == 1:
        return gain * (1.0 - np.exp(-s / time_constants[0]))
    t1, t2 = time_constants
    if abs(t1 - t2) < 1e-6 * max(t1, t2):  # double pole: the limit of the formula below
        return gain * (1.0 - (1.0 + s / t1) * np.exp(-s / t1))
    return gain * (1.0 - (t1 * np.exp(-s / t1) - t2 * np.exp(-s / t2)) / (t1 - t2))


def _least_squares(resid, x0, lo, hi):
    from scipy.optimize import least_squares

    x0 = np.clip(np.asarray(x0, float), lo, hi)
    return least_squares(resid, x0, bounds=(lo, hi), x_scale="jac", xtol=1e-12, ftol=1e-12,
                         gtol=1e-12)


def _fit_lags(ta: np.ndarray, r: np.ndarray, kind: str) -> tuple[float, tuple[float, ...], float, np.ndarray]:
    """Least-squares fit of the unit-step response *r* (per unit input) at times *ta* since the
    step.  Returns gain, time constants, dead time and the residual vector."""
    span = float(ta[-1])
    tail = r[int(0.8 * r.size):]
    if kind == "integrating":
        half = ta.size // 2
        slope, icpt = np.polyfit(ta[half:], r[half:], 1)
        k0 = float(slope) if slope != 0 else float(r[-1]) / span
        th0 = min(max(0.0, float(-icpt / k0)), 0.9 * span)

        def resid_i(v):
            return step_model_response(ta, v[0], (), v[1], integrating=True) - r

        sol = _least_squares(resid_i, [k0, th0], [-np.inf, 0.0], [np.inf, span])
        return float(sol.x[0]), (), float(sol.x[1]), sol.fun
    final = float(np.mean(tail))
    if final == 0.0:
        final = float(r[-1])
    # graphical start: dead time where the response leaves 2-5 % of its change, time constant at 63 %
    frac = r / final
    moved = np.flatnonzero(frac > 0.02)
    th0 = float(ta[moved[0] - 1]) if moved.size and moved[0] > 0 else 0.0
    hit = np.flatnonzero(frac >= 0.632)
    dt = float(ta[1] - ta[0])
    tau0 = max(float(ta[hit[0]]) - th0, dt) if hit.size else span / 3
    lo_t, hi_t = math.log(1e-6 * span), math.log(100 * span)

    def resid1(v):
        return step_model_response(ta, v[0], (math.exp(v[2]),), v[1]) - r

    best = None
    # the dead time enters non-smoothly (a kink at t = theta): start from several dead times
    for th in (th0, 0.8 * th0, 0.0):
        sol = _least_squares(resid1, [final, th, math.log(tau0)], [-np.inf, 0.0, lo_t], [np.inf, span, hi_t])
        if best is None or sol.cost < best.cost:
            best = sol
    if best.x[1] > 0:
        sol = _least_squares(resid1, [best.x[0], 0.5 * th0 + 0.5 * best.x[1], best.x[2]],
                             [-np.inf, 0.0, lo_t], [np.inf, span, hi_t])
        if sol.cost < best.cost:
            best = sol
    K, theta, logt = best.x
    if kind == "fopdt":
        return float(K), (float(math.exp(logt)),), float(theta), best.fun
    tau = math.exp(logt)

    def resid2(v):
        return step_model_response(ta, v[0], (math.exp(v[2]), math.exp(v[3])), v[1]) - r

    best2 = None
    # from the FOPDT fit, split its time constant between two lags in a few proportions
    for split in (0.5, 0.3, 0.2, 0.05):
        sol = _least_squares(resid2, [K, theta, math.log(tau * (1 - split)), math.log(tau * split)],
                             [-np.inf, 0.0, lo_t, lo_t], [np.inf, span, hi_t, hi_t])
        if best2 is None or sol.cost < best2.cost:
            best2 = sol
    K, theta, l1, l2 = best2.x
    taus = tuple(sorted((float(math.exp(l1)), float(math.exp(l2))), reverse=True))
    return float(K), taus, float(theta), best2.fun


def fit_step_response(t: Sequence[float], y: Sequence[float], *, size: float, order: int = 1,
                      t_step: float = 0.0, y0: float | None = None, kind: str | None = None,
                      what: str = "fit_step_response()") -> ProcessFit:
    """Fit ``K e^{-theta s} / prod(tau_i s + 1)`` (one or two lags) or ``K e^{-theta s}/s`` to a
    recorded step response.

    The way plant step tests become transfer-matrix models: least squares (scipy
    ``least_squares``, bounded: time constants > 0, dead time >= 0) on the analytic step response
    ``y0 + size K (1 - exp(-(t - t_step - theta)/tau))`` (or its two-lag or ramp form), started
    from the usual graphical estimates (gain from the final value, dead time where the response
    leaves 2 % of its change, time constant at 63 %) and, because the dead time enters with a
    kink, from a few dead times; the SOPDT fit starts from the FOPDT fit with its time constant
    split between the two lags.  This is the one fitter of the package:
    :func:`~mpcproto.fit_fopdt`, :func:`~mpcproto.fit_sopdt` and :func:`~mpcproto.fit_integrating`
    call it.

    Parameters
    ----------
    t, y : sequence of float
        Sample times and CV values (same length, at least 5 samples after the step).
    size : float
        Height of the input step (input unit); the gain is per unit of input.
    order : {1, 2}
        FOPDT or SOPDT (ignored when *kind* is given).
    t_step : float
        Time of the step.
    y0 : float, optional
        CV value before the step (default: the first sample at or before ``t_step``).
    kind : {"fopdt", "sopdt", "integrating"}, optional
        The model to fit; default from *order*.
    what : str
        Name put first in error messages.

    Returns
    -------
    ProcessFit
        With ``rmse``, ``noise_level`` and ``explains_record`` of the fit (``cv``/``mv`` empty).
    """
    if kind is None:
        if isinstance(order, bool) or order not in (1, 2):
            raise fail(what, "order", "1 (FOPDT) or 2 (SOPDT)", shown(order))
        kind = FIT_KINDS[order - 1]
    elif kind not in FIT_KINDS:
        check(kind, Options(tuple(FIT_KINDS)), owner=what, key="kind")
    t, y = paired_series(t, y, what=what)
    if np.any(np.diff(t) <= 0):
        raise fail(what, "t", "strictly increasing times", "a time at or before the one before it")
    if isinstance(size, bool) or not isinstance(size, numbers.Real) or not math.isfinite(size) or size == 0:
        raise fail(what, "size", "a finite non-zero number", shown(size))
    for key, v in (("t_step", t_step), ("y0", y0)):
        if (v is not None or key == "t_step") and (isinstance(v, bool) or not isinstance(v, numbers.Real)
                                                   or not math.isfinite(v)):
            raise fail(what, key, "a finite number", shown(v))
    if y0 is None:
        before = np.nonzero(t <= t_step)[0]
        y0 = float(y[before[-1]] if before.size else y[0])
    after = t >= t_step
    if np.count_nonzero(after) < 5:
        raise fail(what, "t", f"at least 5 samples after the step at t = {t_step:g}",
                   f"{np.count_nonzero(after)}")
    ta = t[after] - t_step
    dy = y[after] - y0
    if float(np.max(np.abs(dy))) <= 1e-12 * max(1.0, abs(y0)) or dy[-1] == 0.0:
        raise fail(what, "y", "a response that moves after the step", "none (nothing to fit)")
    K, taus, theta, res = _fit_lags(ta, dy / size, kind)
    span = float(ta[-1])
    theta = 0.0 if theta < 1e-9 * span else theta
    rms = float(np.sqrt(np.mean(res ** 2))) * abs(size)
    noise = _residual_noise(res) * abs(size)
    change = float(np.max(dy) - np.min(dy))
    explains = not (rms > FIT_NOISE_RATIO * noise and rms > FIT_CHANGE_FRACTION * change)
    if not explains:
        warnings.warn(
            f"{what}: the {kind.upper()} model does not explain the record: residual rms "
            f"{rms:.3g} against a noise level of {noise:.3g} ({100 * rms / change:.0f} % of the "
            f"response's change {change:.3g}); the record may hold more than one step, a "
            f"disturbance, or dynamics of another order. Check the record before using the fit "
            f"(gain {K:.4g}, dead time {theta:.4g}).", UserWarning, stacklevel=2)
    return ProcessFit(kind, K, taus, theta, rmse=rms, noise_level=noise, explains_record=explains)


#: a fit "explains" a record unless its residual rms is above BOTH this multiple of the noise level
#: and this fraction of the response's change (common practice, no source: a residual at the noise
#: level is all a right model can do; a few % of the change is what a model of the wrong order
#: leaves on a clean record)
FIT_NOISE_RATIO = 3.0
FIT_CHANGE_FRACTION = 0.05


def _residual_noise(res: np.ndarray) -> float:
    """Noise level of a record from its fit residual: the robust (median absolute deviation)
    spread of successive differences / sqrt(2); a jump the model missed moves the median little."""
    d = np.diff(np.asarray(res, float))
    if d.size == 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / math.sqrt(2))
