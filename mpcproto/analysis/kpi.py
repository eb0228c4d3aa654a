"""Performance figures, constraint violations and controller health from a Trajectory.

Every function here is pure: a :class:`mpcproto.Trajectory` in, plain JSON-able data out
(``None`` where a figure does not exist, e.g. the overshoot of a CV whose setpoint never moved).
All figures use the TRUE plant values (``y.*`` columns), not what the instruments reported: the
question is what the unit really did.

Definitions (sums over samples, each sample of length ``Ts``; ``e = setpoint - y``)
-------------------------------------------------------------------------------------
``iae``            sum |e| Ts                       (integral of absolute error)
``ise``            sum e^2 Ts                       (integral of squared error)
``itae``           sum (t - t0) |e| Ts              (time-weighted; t0 = start of the run)
``max_abs_error``  max |e|
``settling_time``  time from the last setpoint change (if the setpoint never moves: from the
                   first sample where |e| leaves the band, i.e. the upset) until |e| stays inside
                   the band for good; 0 if it never leaves; ``None`` if it never settles.  Band: ``band_fraction * |setpoint step|`` after a step, otherwise
                   ``band_fraction * |setpoint|``, unless given per CV in ``bands``.
``overshoot``      after the last setpoint step, the largest excursion beyond the new setpoint in
                   the direction of the step, as a fraction of the step (0.1 = 10 %); ``None``
                   without a step
``total_travel``   sum |u[k] - u[k-1]| of an applied MV
``time_at_limit``  time an applied MV spends at its operating limit (within a small tolerance)

Samples without a setpoint (NaN, zone control) add nothing to the error sums; a CV with no
setpoint at all gets ``None`` for every error figure.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..control.base import DEGRADED, FALLBACK, FATAL
from ..exceptions import SettingsError
from ..model import TIME_UNITS
from ..trajectory import Trajectory

__all__ = ["cv_performance", "mv_usage", "kpis", "violations", "mv_violations", "controller_health",
           "summarize"]


def _none(v: float) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _last_step(sp: np.ndarray) -> tuple[int | None, float]:
    """Index where the last setpoint move starts and its size (None, 0 if it never moves).

    Consecutive changes (a ramp) count as one move.
    """
    if not np.isfinite(sp).any():
        return None, 0.0
    d = np.diff(sp)
    ch = np.flatnonzero(np.isfinite(d) & (np.abs(d) > 1e-12 * np.maximum(1.0, np.abs(sp[1:]))))
    if ch.size == 0:
        return None, 0.0
    c = int(ch[-1])
    k = ch.size - 1
    while k > 0 and ch[k - 1] == ch[k] - 1:
        k -= 1
    c0 = int(ch[k])
    return c0 + 1, float(sp[c + 1] - sp[c0])


def cv_performance(traj: Trajectory, cv: str, *, band: float | None = None,
                   band_fraction: float = 0.02) -> dict[str, float | None]:
    """IAE, ISE, ITAE, settling time, overshoot and largest error of one CV (see module docstring)."""
    if not 0 < band_fraction < 1:
        raise SettingsError(f"cv_performance: band_fraction must be in (0, 1); found {band_fraction!r}.")
    y = traj.series("y", cv)
    sp = traj.series("sp", cv) if traj.has("sp", cv) else np.full(len(traj), np.nan)
    t = traj.t
    Ts = traj.Ts
    out: dict[str, float | None] = {"iae": None, "ise": None, "itae": None, "settling_time": None,
                                    "overshoot": None, "max_abs_error": None}
    have = np.isfinite(sp) & np.isfinite(y)
    if not have.any():
        return out
    e = np.where(have, sp - y, 0.0)
    ae = np.abs(e)
    t0 = float(t[0])
    out["iae"] = float(ae.sum() * Ts)
    out["ise"] = float((e * e).sum() * Ts)
    out["itae"] = float(((t - t0) * ae).sum() * Ts)
    out["max_abs_error"] = float(ae[have].max())
    i_step, size = _last_step(sp)
    if band is None:
        ref = abs(size) if i_step is not None else float(np.nanmax(np.abs(sp)))
        band = band_fraction * ref if ref > 0 else band_fraction
    if i_step is not None:
        start = i_step
    else:   # regulatory: from the first time the error leaves the band (the upset) on
        first_out = np.flatnonzero(ae > band)
        start = int(first_out[0]) if first_out.size else 0
    outside = np.flatnonzero(ae[start:] > band) + start
    if outside.size == 0:
        out["settling_time"] = 0.0
    elif outside[-1] < len(t) - 1:
        out["settling_time"] = float(t[outside[-1] + 1] - t[start])
    if i_step is not None and size != 0:
        excess = np.sign(size) * (y[i_step:] - sp[i_step:])
        out["overshoot"] = float(max(0.0, np.nanmax(excess)) / abs(size))
    return out


def mv_usage(traj: Trajectory, mv: str, *, rel_tol: float = 1e-6) -> dict[str, float]:
    """Total travel and time at an operating limit of one applied MV."""
    u = traj.series("u", mv)
    Ts = traj.Ts
    lo = traj.series("mvlo", mv) if traj.has("mvlo", mv) else np.full(len(traj), -np.inf)
    hi = traj.series("mvhi", mv) if traj.has("mvhi", mv) else np.full(len(traj), np.inf)
    span = np.where(np.isfinite(hi - lo), hi - lo, np.maximum(1.0, np.abs(u)))
    tol = rel_tol * np.maximum(span, 1e-12)
    at_lo = np.isfinite(lo) & (u <= lo + tol)
    at_hi = np.isfinite(hi) & (u >= hi - tol)
    travel = float(np.nansum(np.abs(np.diff(u)))) if len(u) > 1 else 0.0
    return {"total_travel": travel, "time_at_limit": float((at_lo | at_hi).sum() * Ts),
            "time_at_low": float(at_lo.sum() * Ts), "time_at_high": float(at_hi.sum() * Ts)}


def kpis(traj: Trajectory, *, bands: Mapping[str, float] | None = None,
         band_fraction: float = 0.02) -> dict[str, dict[str, dict[str, Any]]]:
    """``{"cv": {name: cv_performance}, "mv": {name: mv_usage}}`` for every CV and MV recorded."""
    bands = dict(bands or {})
    for k in bands:
        if k not in traj.names("y"):
            raise SettingsError(f"kpis: bands names '{k}', which is not a CV of the trajectory; "
                                f"CVs: {', '.join(traj.names('y'))}.")
    return {"cv": {c: cv_performance(traj, c, band=bands.get(c), band_fraction=band_fraction)
                   for c in traj.names("y")},
            "mv": {m: mv_usage(traj, m) for m in traj.names("u")}}


def violations(traj: Trajectory, *, tolerance: float | Mapping[str, float] = 0.0
               ) -> list[dict[str, Any]]:
    """Constraint-violation events of the TRUE CVs against their low/high limits.

    An event is a run of consecutive samples where ``y > hi + tol`` (side ``"high"``) or
    ``y < lo - tol`` (side ``"low"``).  Each is reported as ``{"variable", "side", "signal",
    "start", "end", "peak_excess", "integral"}`` (``signal`` = ``"true"``: the true CV; MV events
    of :func:`mv_violations` say ``"commanded"`` or ``"applied"``): ``start`` is the time of the
    first violating sample, ``end`` the end of the last one (its time + Ts), ``peak_excess`` the
    largest distance beyond the limit, ``integral`` the sum of the excess times Ts.  Sorted by
    start time.
    """
    Ts = traj.Ts
    t = traj.t
    events: list[dict[str, Any]] = []
    for cv in traj.names("y"):
        tol = tolerance.get(cv, 0.0) if isinstance(tolerance, Mapping) else float(tolerance)
        y = traj.series("y", cv)
        for side, kind in (("high", "hi"), ("low", "lo")):
            if not traj.has(kind, cv):
                continue
            lim = traj.series(kind, cv)
            with np.errstate(invalid="ignore"):
                exc = (y - lim) if side == "high" else (lim - y)
            events += _events(t, Ts, exc, tol, cv, side, "true")
    events.sort(key=lambda e: (e["start"], e["variable"], e["side"]))
    return events


def _events(t: np.ndarray, Ts: float, exc: np.ndarray, tol: float, variable: str, side: str,
            signal: str) -> list[dict[str, Any]]:
    """Runs of consecutive samples with ``exc > tol`` as violation events."""
    bad = np.isfinite(exc) & (exc > tol)
    if not bad.any():
        return []
    idx = np.flatnonzero(bad)
    out = []
    for run in np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1):
        ex = exc[run]
        out.append({"variable": variable, "side": side, "signal": signal,
                    "start": float(t[run[0]]), "end": float(t[run[-1]] + Ts),
                    "peak_excess": float(ex.max()), "integral": float(ex.sum() * Ts)})
    return out


def mv_violations(traj: Trajectory) -> list[dict[str, Any]]:
    """MV hard-limit events: the commanded (``ucmd``) and the applied (``u``) MVs against the hard
    MV limits, the run-time operating limits ``mvlo``/``mvhi`` intersected with the physical
    bounds (``meta["mv_bounds"]``).

    Events have the keys of :func:`violations` with ``signal`` = ``"commanded"`` or ``"applied"``;
    ``integral`` is in MV unit x time unit.  No tolerance: a command is projected exactly onto
    its limits (:mod:`mpcproto.control.limits`), so any excess at all is an event.  A commanded
    event means the controller sent a command outside a hard limit: a failure.  An applied event
    with no commanded one is the final element's doing (a valve stuck beyond a limit that moved).
    """
    Ts, t, n = traj.Ts, traj.t, len(traj)
    bounds = traj.meta.get("mv_bounds") or {}
    events: list[dict[str, Any]] = []
    for mv in traj.names("u"):
        b = bounds.get(mv, (-math.inf, math.inf))
        lo = np.full(n, float(b[0]))
        hi = np.full(n, float(b[1]))
        if traj.has("mvlo", mv):
            lo = np.fmax(lo, traj.series("mvlo", mv))
        if traj.has("mvhi", mv):
            hi = np.fmin(hi, traj.series("mvhi", mv))
        for signal, kind in (("commanded", "ucmd"), ("applied", "u")):
            if not traj.has(kind, mv):
                continue
            u = traj.series(kind, mv)
            with np.errstate(invalid="ignore"):
                events += _events(t, Ts, u - hi, 0.0, mv, "high", signal)
                events += _events(t, Ts, lo - u, 0.0, mv, "low", signal)
    events.sort(key=lambda e: (e["start"], e["variable"], e["side"], e["signal"]))
    return events


def controller_health(traj: Trajectory, *, slow_fraction: float = 0.5) -> dict[str, Any]:
    """Steps, failures, fallbacks and solve times of the controller over a run.

    The solve time is the controller's own ``diag.solve_ms`` where it reports one, else the
    simulator's wall time of the step call (``diag.step_ms``).  ``worst_fraction`` is the longest
    solve time as a fraction of the sample time (converted to seconds with the model's time unit);
    a step is *slow* above ``slow_fraction`` of the sample time.  ``events`` lists runs of
    consecutive fallback, failure and slow steps as ``{"kind", "start", "end", "steps"}``.

    Faults the controller saw: ``degraded_steps`` (accepted steps whose status says a reading was
    rejected or an MV did not follow, :data:`mpcproto.control.base.DEGRADED`; events of kind
    ``"measurement_rejected"`` / ``"mv_not_following"``), and the totals of the per-step
    counters ``rejected_measurements`` (``diag.n_rejected_measurements``), ``mvs_not_following``
    (``diag.n_mvs_not_following``) and ``held_loops`` (PID, ``diag.loops_held``); a counter the
    controller does not report is None.
    """
    if not slow_fraction > 0:
        raise SettingsError(f"controller_health: slow_fraction must be > 0; found {slow_fraction!r}.")
    status = traj.text.get("status", ["ok"] * len(traj))
    n = len(traj)
    ms = np.full(n, np.nan)
    for key in ("diag.step_ms", "diag.solve_ms"):
        if key in traj.columns:
            col = traj.columns[key]
            ms = np.where(np.isfinite(col), col, ms)
    unit = str(traj.meta.get("time_unit", "s"))
    Ts_ms = traj.Ts * TIME_UNITS.get(unit, 1.0) * 1e3
    frac = ms / Ts_ms
    fail = np.array([s in FATAL for s in status], bool)
    fall = np.array([s in FALLBACK for s in status], bool)
    slow = np.isfinite(frac) & (frac > slow_fraction)
    fin = ms[np.isfinite(ms)]
    events: list[dict[str, Any]] = []
    kinds = [("failure", fail), ("fallback", fall), ("slow_solve", slow)]
    kinds += [(st, np.array([s == st for s in status], bool)) for st in sorted(DEGRADED)]
    for kind, mask in kinds:
        idx = np.flatnonzero(mask)
        if idx.size == 0:
            continue
        for run in np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1):
            events.append({"kind": kind, "start": float(traj.t[run[0]]),
                           "end": float(traj.t[run[-1]] + traj.Ts), "steps": int(run.size)})
    events.sort(key=lambda e: (e["start"], e["kind"]))
    return {
        "steps": int(n), "failures": int(fail.sum()), "fallbacks": int(fall.sum()),
        "slow_steps": int(slow.sum()),
        "degraded_steps": int(sum(s in DEGRADED for s in status)),
        **{name: (int(np.nansum(traj.columns[col])) if col in traj.columns else None)
           for name, col in (("rejected_measurements", "diag.n_rejected_measurements"),
                             ("mvs_not_following", "diag.n_mvs_not_following"),
                             ("held_loops", "diag.loops_held"))},
        "median_solve_ms": _none(np.median(fin)) if fin.size else None,
        "p95_solve_ms": _none(np.percentile(fin, 95)) if fin.size else None,
        "worst_fraction": _none(np.nanmax(frac)) if fin.size else None,
        "events": events,
    }


def summarize(traj: Trajectory, *, bands: Mapping[str, float] | None = None,
              band_fraction: float = 0.02, tolerance: float | Mapping[str, float] = 0.0,
              slow_fraction: float = 0.5) -> dict[str, Any]:
    """The per-controller block of ``summary.json``: ``kpi``, ``violations``, ``solver``, ``run``.

    ``violations`` holds the CV events (:func:`violations`, ``signal`` ``"true"``) and the MV
    hard-limit events (:func:`mv_violations`, ``signal`` ``"commanded"`` / ``"applied"``).

    ``run`` carries the run's ``status`` (``"completed"``/``"failed"``), ``message``,
    ``failed_at`` and the controller name.  Every value is JSON-able (no NaN or inf).
    """
    return {
        "kpi": kpis(traj, bands=bands, band_fraction=band_fraction),
        "violations": sorted(violations(traj, tolerance=tolerance) + mv_violations(traj),
                             key=lambda e: (e["start"], e["variable"], e["side"], e["signal"])),
        "solver": controller_health(traj, slow_fraction=slow_fraction),
        "run": {"controller": traj.meta.get("controller"), "status": traj.status,
                "message": traj.message, "failed_at": traj.meta.get("failed_at"),
                "steps": len(traj), "faults": list(traj.meta.get("faults", []))},
    }
