r"""Frequency-domain check of a PID loop on its process model, and Skogestad's half rule.

:func:`loop_margins` evaluates the loop transfer function ``L(jw) = G(jw) C(jw)`` of one loop,
dead time included exactly, with the PID of :class:`~mpcproto.control.pid.PIDLoop` in its ideal form
with the derivative filtered as the loop implements it:

.. math:: C(s) = K\left(1 + \frac{1}{T_i s} + \frac{T_d s}{(T_d/N) s + 1}\right)

and returns the classic robustness figures (definitions: Skogestad & Postlethwaite, *Multivariable
Feedback Control*, 2nd ed., 2005, section 2.4; common practice):

* gain margin ``GM = 1/|L(jw180)|`` at the phase crossover(s) where the phase of L is -180 deg (the
  smallest if there are several; ``inf`` when the phase never gets there);
* phase margin ``PM = 180 deg + angle L(jwc)`` at the gain crossover(s) where ``|L| = 1``;
* peak sensitivity ``Ms = max_w |1/(1 + L(jw))|`` (the inverse of the shortest distance from L to the
  critical point -1); Ms below about 1.6-2 is the usual target (Skogestad 2003, from memory);
* the process's own ultimate gain and period (``Ku``, ``Pu``) and phase-crossover frequency ``wu``.

:func:`half_rule` reduces a higher-order model with real poles, inverse-response zeros and a dead time
to a FOPDT or SOPDT model by Skogestad's half rule (Skogestad 2003, "Simple analytic rules for model
reduction and PID controller tuning", J. Process Control 13:291-309, section 2): the largest
neglected time constant is split, half to the smallest retained time constant and half to the dead
time; every smaller neglected time constant and every inverse-response (right-half-plane zero) time
constant goes into the dead time; with a digital controller half the sample time is added.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import brentq, minimize_scalar

from ..exceptions import SettingsError
from ..validation import fail
from .pid import PIDLoop
from .tuning import ProcessFit, ultimate_point

__all__ = ["LoopMargins", "loop_margins", "pid_frequency_response", "half_rule"]


@dataclass
class LoopMargins:
    """Robustness figures of one loop (frequencies in rad per time unit of the model)."""

    gain_margin: float
    phase_margin_deg: float
    peak_sensitivity: float
    crossover_frequency: float | None
    phase_crossover_frequency: float | None
    peak_frequency: float
    ultimate_gain: float | None
    ultimate_period: float | None
    ultimate_frequency: float | None

    def as_dict(self) -> dict[str, Any]:
        def fin(v):
            return None if v is None or not math.isfinite(v) else float(v)

        return {k: fin(v) for k, v in self.__dict__.items()}


def pid_frequency_response(loop: PIDLoop | tuple[float, float, float, float],
                           w: np.ndarray) -> np.ndarray:
    """``C(jw)`` of a :class:`PIDLoop` (or a tuple ``(K, Ti, Td, N)``), as the loop implements it."""
    if isinstance(loop, PIDLoop):
        K, Ti, Td, N = loop.gain, loop.integral_time, loop.derivative_time, loop.derivative_filter
    else:
        K, Ti, Td, N = (float(v) for v in loop)
    s = 1j * np.asarray(w, float)
    c = np.ones_like(s)
    if Ti is not None and math.isfinite(Ti):
        c = c + 1.0 / (Ti * s)
    if Td:
        c = c + Td * s / (Td / N * s + 1.0)
    return K * c


def _process(G: Any) -> tuple[Callable[[np.ndarray], np.ndarray], float, ProcessFit | None]:
    """(G(jw) callable, a characteristic time, the fit if any)."""
    if isinstance(G, ProcessFit):
        scale = max(list(G.time_constants) + [G.dead_time, 1e-9])
        return G.frequency_response, scale, G
    if isinstance(G, tuple) and len(G) == 3:
        num, den, theta = np.atleast_1d(np.asarray(G[0], float)), np.atleast_1d(np.asarray(G[1], float)), float(G[2])
        if not (math.isfinite(theta) and theta >= 0):
            raise fail("loop_margins()", "process", "a (num, den, dead_time) tuple with a finite "
                       "dead time >= 0", f"dead time {theta!r}")
        roots = np.roots(den)
        mags = np.abs(roots[np.abs(roots) > 0])
        scale = max([1.0 / m for m in mags] + [theta, 1e-9])

        def Gf(w):
            s = 1j * np.asarray(w, float)
            return np.polyval(num, s) / np.polyval(den, s) * np.exp(-s * theta)

        return Gf, scale, None
    if callable(G):
        return G, 1.0, None
    raise fail("loop_margins()", "process",
               "a ProcessFit, a (num, den, dead_time) tuple or a callable G(w)", type(G).__name__)


def loop_margins(process: Any, loop: PIDLoop | tuple[float, float, float, float], *,
                 w_range: tuple[float, float] | None = None, points: int = 20000) -> LoopMargins:
    """Gain margin, phase margin, peak sensitivity and the process's ultimate point (module doc).

    Parameters
    ----------
    process : ProcessFit, (num, den, dead_time) or callable
        The process the loop acts on, in the loop's own sign convention (the product of the process
        gain and the controller gain must be positive: negative feedback).
    loop : PIDLoop or (K, Ti, Td, N)
    w_range : (w_min, w_max), optional
        Frequencies searched (default: 1e-4 to 1e4 over the process's largest time constant).
    """
    Gf, scale, fit = _process(process)
    lo, hi = w_range if w_range is not None else (1e-4 / scale, 1e4 / scale)
    w = np.logspace(math.log10(lo), math.log10(hi), int(points))

    def L(x):
        x = np.atleast_1d(np.asarray(x, float))
        return Gf(x) * pid_frequency_response(loop, x)

    Lw = L(w)
    # the low-frequency loop gain must be positive (negative feedback): with integral action the
    # phase starts at -90 deg, without at 0 deg
    ph = np.unwrap(np.angle(Lw))
    start = ph[0]
    if not (-math.pi <= start <= math.pi / 4):
        raise fail("loop_margins()", "loop", "a controller gain whose sign matches the process "
                   "gain (negative feedback)", "a loop gain negative at low frequency (positive "
                   "feedback)")
    mag = np.abs(Lw)
    # gain crossovers |L| = 1 (refined)
    pm, wc = math.inf, None
    idx = np.flatnonzero(np.diff(np.sign(mag - 1.0)) != 0)
    for i in idx:
        x = brentq(lambda v: abs(L(v)[0]) - 1.0, w[i], w[i + 1], xtol=1e-15, rtol=1e-13)
        phi = ph[i] + np.angle(L(x)[0] / Lw[i])
        m = math.degrees(phi) + 180.0
        if m < pm:
            pm, wc = m, x
    # phase crossovers: unwrapped phase = -180 deg - k 360 deg (refined)
    gm, w180 = math.inf, None
    for k in range(0, 4):
        target = -math.pi * (2 * k + 1)
        idx = np.flatnonzero(np.diff(np.sign(ph - target)) != 0)
        for i in idx:
            x = brentq(lambda v: ph[i] + np.angle(L(v)[0] / Lw[i]) - target, w[i], w[i + 1],
                       xtol=1e-15, rtol=1e-13)
            g = 1.0 / abs(L(x)[0])
            if g < gm:
                gm, w180 = g, x
    # peak sensitivity: grid maximum refined in log frequency
    S = 1.0 / np.abs(1.0 + Lw)
    i = int(np.argmax(S))
    a, b = math.log10(w[max(i - 1, 0)]), math.log10(w[min(i + 1, len(w) - 1)])
    r = minimize_scalar(lambda lw: -1.0 / abs(1.0 + L(10 ** lw)[0]), bounds=(a, b), method="bounded",
                        options={"xatol": 1e-12})
    ms, wms = (-float(r.fun), float(10 ** r.x)) if -r.fun >= S[i] else (float(S[i]), float(w[i]))
    Ku = Pu = wu = None
    try:
        if fit is not None and fit.kind != "integrating":
            Ku, Pu = ultimate_point(ProcessFit(fit.kind, abs(fit.gain), fit.time_constants,
                                               fit.dead_time))
        elif isinstance(process, tuple):
            num, den, theta = process
            sign = math.copysign(1.0, float(np.real(Gf(np.array([1e-6 / scale]))[0])))
            Ku, Pu = ultimate_point(sign * np.atleast_1d(np.asarray(num, float)), den, theta)
        if Pu is not None:
            wu = 2 * math.pi / Pu
    except SettingsError:       # no phase crossover (e.g. a first-order process without dead time)
        Ku = Pu = wu = None
    return LoopMargins(float(gm), float(pm), ms, wc, w180, wms, Ku, Pu, wu)


def half_rule(gain: float, time_constants: Sequence[float], dead_time: float = 0.0, *,
              inverse_response: Sequence[float] = (), order: int = 1,
              sample_time: float = 0.0) -> ProcessFit:
    """Skogestad's half rule: a FOPDT (``order=1``) or SOPDT (``order=2``) model of
    ``k e^{-theta s} prod(-T_j s + 1) / prod(tau_i s + 1)``.

    Parameters
    ----------
    gain : float
    time_constants : sequence of float
        The real, stable lag time constants tau_i (> 0), any order.
    dead_time : float
    inverse_response : sequence of float
        Time constants T_j > 0 of right-half-plane zeros ``(-T_j s + 1)``; each adds T_j to the
        effective dead time.
    order : {1, 2}
    sample_time : float
        With a digital controller, half of it is added to the dead time.
    """
    taus = sorted((float(t) for t in time_constants), reverse=True)
    if any(not (math.isfinite(t) and t > 0) for t in taus):
        raise fail("half_rule()", "time_constants", "finite time constants > 0",
                   repr(list(time_constants)))
    if order not in (1, 2):
        raise fail("half_rule()", "order", "1 or 2", repr(order))
    if len(taus) < order:
        raise fail("half_rule()", "time_constants",
                   f"at least {order} time constants for a model of order {order}", f"{len(taus)}")
    inv = [float(t) for t in inverse_response]
    if any(not (math.isfinite(t) and t > 0) for t in inv):
        raise fail("half_rule()", "inverse_response", "finite time constants > 0", repr(inv))
    if not (math.isfinite(dead_time) and dead_time >= 0 and sample_time >= 0):
        bad = "dead_time" if not (math.isfinite(dead_time) and dead_time >= 0) else "sample_time"
        raise fail("half_rule()", bad, "a finite number >= 0",
                   repr(dead_time if bad == "dead_time" else sample_time))
    kept = taus[:order]
    rest = taus[order:]
    theta = float(dead_time) + sum(inv) + 0.5 * float(sample_time)
    if rest:
        kept[-1] += rest[0] / 2.0
        theta += rest[0] / 2.0 + sum(rest[1:])
    if order == 1:
        return ProcessFit.fopdt(gain, kept[0], theta)
    return ProcessFit.sopdt(gain, kept[0], kept[1], theta)
