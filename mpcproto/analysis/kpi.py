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
``steps``          one entry per setpoint change of the CV (a ramp is one change); its WINDOW
                   runs from the change to the next setpoint change of ANY CV (or the end):
                   ``at``, ``size``, ``window_end``, ``band``, ``settling_time``, ``overshoot``,
                   ``iae`` of the window
``settling_time``  per change: time from the change until |e| stays inside the band up to the
                   end of its window (0 if it never leaves; None if still outside at the end of
                   the window); reported: the worst change (None if any is None).  Band:
                   ``band_fraction * |setpoint step|``.  A CV whose setpoint never moves (an
                   upset): from the first sample where |e| leaves the band, band
                   ``band_fraction *`` the width of the CV's limit zone (``hi - lo``, narrowest
                   over the run) where it is finite and narrower than the physical range, else
                   of the physical range (``meta["cv_bounds"]``); None when both are unbounded.
                   A band given per CV in ``bands`` replaces all of these.
                   ``settling_band`` / ``settling_band_basis`` say which band was used.
                   (IAE/ISE/ITAE and the 2 % settling band: Seborg, Edgar & Mellichamp, Process
                   Dynamics and Control; from memory)
``overshoot``      per change: the largest excursion beyond the new setpoint in the direction of
                   the step within its window, as a fraction of the step (0.1 = 10 %); reported:
                   the worst change; ``None`` without a change
``interaction``    the CV's largest |e| in the windows opened by ANOTHER CV's setpoint change
                   (``max_deviation``, ``caused_by``, ``at``); None when no other CV moved
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
from ..validation import fail, shown
from ..model import TIME_UNITS
from ..trajectory import Trajectory

__all__ = ["cv_performance", "mv_usage", "kpis", "violations", "mv_violations", "controller_health",
           "summarize", "run_flags", "cv_range"]


def _none(v: float) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _moves(sp: np.ndarray) -> list[tuple[int, float]]:
    """Setpoint moves of one CV as (index where the move starts, size); a ramp (consecutive
    changes) counts as one move.  Empty when the setpoint never moves."""
    if len(sp) < 2 or not np.isfinite(sp).any():
        return []
    d = np.diff(sp)
    with np.errstate(invalid="ignore"):
        ch = np.flatnonzero(np.isfinite(d) & (np.abs(d) > 1e-12 * np.maximum(1.0, np.abs(sp[1:]))))
    if ch.size == 0:
        return []
    out = []
    for run in np.split(ch, np.flatnonzero(np.diff(ch) > 1) + 1):
        out.append((int(run[0]) + 1, float(sp[run[-1] + 1] - sp[run[0]])))
    return out


def _last_step(sp: np.ndarray) -> tuple[int | None, float]:
    """Index where the last setpoint move starts and its size (None, 0 if it never moves)."""
    mv = _moves(sp)
    return (mv[-1][0], mv[-1][1]) if mv else (None, 0.0)


def cv_range(traj: Trajectory, cv: str) -> float | None:
    """The CV's physical range ``high - low`` (``meta["cv_bounds"]``); None when unbounded."""
    b = (traj.meta.get("cv_bounds") or {}).get(cv)
    if not b:
        return None
    span = float(b[1]) - float(b[0])
    return span if math.isfinite(span) and span > 0 else None


def _zone_width(traj: Trajectory, cv: str) -> float | None:
    """The narrowest finite width ``hi - lo`` of the CV's limit zone over the run (None if none)."""
    if not (traj.has("lo", cv) and traj.has("hi", cv)):
        return None
    with np.errstate(invalid="ignore"):
        w = traj.series("hi", cv) - traj.series("lo", cv)
    w = w[np.isfinite(w) & (w > 0)]
    return float(w.min()) if w.size else None


def _all_moves(traj: Trajectory) -> dict[str, list[tuple[int, float]]]:
    return {c: _moves(traj.series("sp", c)) for c in traj.names("y") if traj.has("sp", c)}


def _settling(t: np.ndarray, ae: np.ndarray, start: int, stop: int, band: float) -> float | None:
    """Time from sample *start* until |e| stays inside *band* up to sample *stop* (excluded);
    0 if it never leaves, None if it is still outside at the end of the window."""
    outside = np.flatnonzero(ae[start:stop] > band) + start
    if outside.size == 0:
        return 0.0
    if outside[-1] >= stop - 1:
        return None
    return float(t[outside[-1] + 1] - t[start])


def cv_performance(traj: Trajectory, cv: str, *, band: float | None = None,
                   band_fraction: float = 0.02,
                   moves: Mapping[str, list[tuple[int, float]]] | None = None
                   ) -> dict[str, Any]:
    """IAE, ISE, ITAE, largest error, settling time and overshoot per setpoint change, and the
    interaction from other CVs' setpoint changes, of one CV (see the module docstring)."""
    if not 0 < band_fraction < 1:
        raise fail("cv_performance()", "band_fraction", "a number in (0, 1)", shown(band_fraction))
    y = traj.series("y", cv)
    sp = traj.series("sp", cv) if traj.has("sp", cv) else np.full(len(traj), np.nan)
    t = traj.t
    Ts = traj.Ts
    n = len(t)
    out: dict[str, Any] = {"iae": None, "ise": None, "itae": None, "settling_time": None,
                           "overshoot": None, "max_abs_error": None, "settling_band": None,
                           "settling_band_basis": None, "steps": [], "interaction": None}
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
    moves = _all_moves(traj) if moves is None else moves
    own = moves.get(cv, [])
    starts = sorted({i for ms in moves.values() for i, _ in ms})

    def window_end(i: int) -> int:
        later = [j for j in starts if j > i]
        return later[0] if later else n

    if own:
        steps = []
        for i, size in own:
            stop = window_end(i)
            b = band if band is not None else band_fraction * abs(size)
            excess = np.sign(size) * (y[i:stop] - sp[i:stop])
            steps.append({"at": float(t[i]), "size": size,
                          "window_end": float(t[stop - 1] + Ts), "band": b,
                          "settling_time": _settling(t, ae, i, stop, b),
                          "overshoot": float(max(0.0, float(np.nanmax(excess))) / abs(size)),
                          "iae": float(ae[i:stop].sum() * Ts)})
        out["steps"] = steps
        st = [s["settling_time"] for s in steps]
        out["settling_time"] = None if any(v is None for v in st) else max(st)
        out["overshoot"] = max(s["overshoot"] for s in steps)
        out["settling_band"] = steps[-1]["band"]
        out["settling_band_basis"] = "given" if band is not None else \
            f"{band_fraction:g} x |setpoint step|"
    else:   # regulatory: from the first time the error leaves the band (the upset) on
        zone = _zone_width(traj, cv)
        span = cv_range(traj, cv)
        if band is not None:
            b, basis = band, "given"
        elif zone is not None and (span is None or zone < span):
            b, basis = band_fraction * zone, f"{band_fraction:g} x CV limit zone"
        elif span is not None:
            b, basis = band_fraction * span, f"{band_fraction:g} x CV range"
        else:
            b, basis = None, "none: the CV has no finite range or limits; give a band"
        out["settling_band"], out["settling_band_basis"] = b, basis
        if b is not None:
            first_out = np.flatnonzero(ae > b)
            start = int(first_out[0]) if first_out.size else 0
            out["settling_time"] = _settling(t, ae, start, n, b)
    # interaction: this CV's largest error in the windows opened by another CV's setpoint change
    own_starts = {i for i, _ in own}
    worst = None
    for other, ms in moves.items():
        if other == cv:
            continue
        for i, _size in ms:
            if i in own_starts:
                continue
            stop = window_end(i)
            w = ae[i:stop][have[i:stop]]
            if w.size and (worst is None or w.max() > worst["max_deviation"]):
                worst = {"max_deviation": float(w.max()), "caused_by": other, "at": float(t[i])}
    out["interaction"] = worst
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
            raise fail("kpis()", f"bands.{k}",
                       f"a CV of the trajectory (one of {', '.join(traj.names('y'))})",
                       f"bands names '{k}', which is not one")
    moves = _all_moves(traj)
    return {"cv": {c: cv_performance(traj, c, band=bands.get(c), band_fraction=band_fraction,
                                     moves=moves)
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
            events += _events(t, Ts, exc, tol, cv, side, "true", cv_range(traj, cv), lim)
    events.sort(key=lambda e: (e["start"], e["variable"], e["side"]))
    return events


def _events(t: np.ndarray, Ts: float, exc: np.ndarray, tol: float, variable: str, side: str,
            signal: str, span: float | None = None, lim: np.ndarray | None = None
            ) -> list[dict[str, Any]]:
    """Runs of consecutive samples with ``exc > tol`` as violation events.

    ``scale`` is what a criterion's relative tolerance multiplies: the variable's physical range
    *span*, or ``max(1, |limit|)`` at the worst sample where the range is unbounded."""
    bad = np.isfinite(exc) & (exc > tol)
    if not bad.any():
        return []
    idx = np.flatnonzero(bad)
    out = []
    for run in np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1):
        ex = exc[run]
        if span is not None:
            scale = float(span)
        else:
            lv = float(lim[run[int(np.argmax(ex))]]) if lim is not None else 1.0
            scale = max(1.0, abs(lv)) if math.isfinite(lv) else 1.0
        out.append({"variable": variable, "side": side, "signal": signal,
                    "start": float(t[run[0]]), "end": float(t[run[-1]] + Ts),
                    "peak_excess": float(ex.max()), "integral": float(ex.sum() * Ts),
                    "scale": scale})
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
        span = float(b[1]) - float(b[0])
        span = span if math.isfinite(span) and span > 0 else None
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
                events += _events(t, Ts, u - hi, 0.0, mv, "high", signal, span, hi)
                events += _events(t, Ts, lo - u, 0.0, mv, "low", signal, span, lo)
    events.sort(key=lambda e: (e["start"], e["variable"], e["side"], e["signal"]))
    return events


def _timing(ms: np.ndarray, Ts_ms: float) -> tuple[float | None, float | None, float | None]:
    fin = ms[np.isfinite(ms)]
    if not fin.size:
        return None, None, None
    return (_none(np.median(fin)), _none(np.percentile(fin, 95)), _none(fin.max() / Ts_ms))


def controller_health(traj: Trajectory, *, slow_fraction: float = 0.5) -> dict[str, Any]:
    """Steps, failures, fallbacks and computing times of the controller over a run.

    The real-time audit reads the WHOLE controller step: ``diag.step_ms``, the simulator's wall
    time of the ``step`` call (estimator, steady target, QP, backup solver, limits).
    ``median_step_ms`` / ``p95_step_ms`` are its median and 95th percentile, ``worst_fraction``
    its longest value as a fraction of the sample time (converted to ms with the model's time
    unit); a step is *slow* above ``slow_fraction`` of the sample time.  The QP time alone
    (``diag.solve_ms``, where the controller reports one) is a separate figure:
    ``median_solve_ms`` / ``p95_solve_ms`` / ``worst_qp_fraction`` (the step time where the
    controller reports no QP time).  ``events`` lists runs of consecutive fallback, failure and
    slow steps as ``{"kind", "start", "end", "steps"}``.

    Faults the controller saw: ``degraded_steps`` (accepted steps whose status says a reading was
    rejected or an MV did not follow, :data:`mpcproto.control.base.DEGRADED`; events of kind
    ``"measurement_rejected"`` / ``"mv_not_following"``), and the totals of the per-step
    counters ``rejected_measurements`` (``diag.n_rejected_measurements``), ``mvs_not_following``
    (``diag.n_mvs_not_following``), ``held_loops`` (PID, ``diag.loops_held``),
    ``dropped_measurements`` (readings older than the estimator's history,
    ``diag.n_dropped_measurements``) and ``backup_solver_rescues`` (steps where the first
    solver failed and the backup solver's answer was used, ``diag.backup_solves``); a counter
    the controller does not report is None.  ``relaxed_cv_steps`` counts, per CV, the steps whose
    plan relaxed that CV's soft limits (``diag.relaxed_cvs.<cv>``; None when not reported).
    ``controller_counts`` is the controller's own
    running count at the end of the run (``meta["controller_counts"]``), where it keeps one.
    """
    if not slow_fraction > 0:
        # (SettingsError spelt out: this function's own 'fail' is the failed-step flags below)
        raise SettingsError(owner="controller_health()", key="slow_fraction",
                            expected="a number > 0", found=shown(slow_fraction))
    status = traj.text.get("status", ["ok"] * len(traj))
    n = len(traj)
    nan = np.full(n, np.nan)
    step = traj.columns.get("diag.step_ms", nan)
    qp = traj.columns.get("diag.solve_ms", nan)
    qp = np.where(np.isfinite(qp), qp, step)
    step = np.where(np.isfinite(step), step, qp)
    unit = str(traj.meta.get("time_unit", "s"))
    Ts_ms = traj.Ts * TIME_UNITS.get(unit, 1.0) * 1e3
    frac = step / Ts_ms
    fail = np.array([s in FATAL for s in status], bool)
    fall = np.array([s in FALLBACK for s in status], bool)
    slow = np.isfinite(frac) & (frac > slow_fraction)
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
    med_s, p95_s, worst_s = _timing(step, Ts_ms)
    med_q, p95_q, worst_q = _timing(qp, Ts_ms)
    return {
        "steps": int(n), "failures": int(fail.sum()), "fallbacks": int(fall.sum()),
        "slow_steps": int(slow.sum()),
        "degraded_steps": int(sum(s in DEGRADED for s in status)),
        **{name: (int(np.nansum(traj.columns[col])) if col in traj.columns else None)
           for name, col in (("rejected_measurements", "diag.n_rejected_measurements"),
                             ("mvs_not_following", "diag.n_mvs_not_following"),
                             ("held_loops", "diag.loops_held"),
                             ("dropped_measurements", "diag.n_dropped_measurements"),
                             ("backup_solver_rescues", "diag.backup_solves"))},
        "median_step_ms": med_s, "p95_step_ms": p95_s, "worst_fraction": worst_s,
        "median_solve_ms": med_q, "p95_solve_ms": p95_q, "worst_qp_fraction": worst_q,
        "relaxed_cv_steps": ({c: int(np.nansum(traj.columns[f"diag.relaxed_cvs.{c}"]))
                              for c in traj.names("y") if f"diag.relaxed_cvs.{c}" in traj.columns}
                             or None),
        "controller_counts": dict(traj.meta.get("controller_counts") or {}),
        "events": events,
    }


#: thresholds of :func:`run_flags` (common practice, no source: judgement, tune as needed)
CHATTER_REVERSALS = 0.5      # share of samples where the move reverses sign
CHATTER_MOVE = 0.02          # ... with a mean reversing move above this fraction of the MV range
TRAVEL_RATIO = 20.0          # travel above this multiple of the MV's net excursion (max - min)
OFF_SETPOINT = 0.05          # mean |error| over the last fifth of the run, fraction of the scale


def run_flags(traj: Trajectory, *, compared: Any = None) -> list[dict[str, Any]]:
    """Things a reader of the run should notice even when every verdict passed.

    ``mv_chatter``: the move of an applied MV reverses sign on more than
    :data:`CHATTER_REVERSALS` of the samples with a mean reversing move above
    :data:`CHATTER_MOVE` of its physical range.  ``mv_travel``: total travel above
    :data:`TRAVEL_RATIO` times its net excursion ``max(u) - min(u)`` (at least 1 % of its
    range): what the setpoint and disturbance changes needed is at most about that excursion.
    ``cv_off_setpoint``: a CV whose mean |setpoint - CV| over the last fifth of the run exceeds
    :data:`OFF_SETPOINT` of its physical range (of its largest setpoint move where the range is
    unbounded); with *compared* (the CVs the criteria check) only the CVs NOT compared are
    looked at.  ``backup_solver``, ``dropped_measurements`` and ``left_valid_range`` repeat the
    counters of the run that say something went wrong behind an "ok" status.
    Each flag is ``{"kind", "variable", "value", "message"}``.
    """
    flags: list[dict[str, Any]] = []
    units = traj.meta.get("units") or {}
    bounds = traj.meta.get("mv_bounds") or {}
    for mv in traj.names("u"):
        u = traj.series("u", mv)
        u = u[np.isfinite(u)]
        if u.size < 3:
            continue
        b = bounds.get(mv)
        span = float(b[1]) - float(b[0]) if b else math.inf
        span = span if math.isfinite(span) and span > 0 else max(1.0, float(np.abs(u).max()))
        du = np.diff(u)
        travel = float(np.abs(du).sum())
        rev = (du[1:] * du[:-1]) < 0
        share = float(rev.sum()) / max(1, du.size - 1)
        mean_rev = float(np.abs(du[1:][rev]).mean()) if rev.any() else 0.0
        unit = units.get(mv, "")
        if share > CHATTER_REVERSALS and mean_rev > CHATTER_MOVE * span:
            flags.append({"kind": "mv_chatter", "variable": mv, "value": share,
                          "message": f"MV {mv} reverses its move on {100 * share:.0f} % of the "
                                     f"samples (mean reversing move {mean_rev:.4g} {unit}): "
                                     f"chatter; detune the loop or filter the measurement"})
        net = max(float(u.max() - u.min()), 0.01 * span)
        if travel > TRAVEL_RATIO * net:
            flags.append({"kind": "mv_travel", "variable": mv, "value": travel,
                          "message": f"MV {mv} travelled {travel:.4g} {unit} for a net excursion "
                                     f"of {float(u.max() - u.min()):.4g} {unit} "
                                     f"({travel / net:.0f}x): far more than the changes need"})
    compared = None if compared is None else set(compared)
    n = len(traj)
    for cv in traj.names("y"):
        if compared is not None and cv in compared or not traj.has("sp", cv) or n < 5:
            continue
        sp, y = traj.series("sp", cv), traj.series("y", cv)
        tail = slice(n - max(1, n // 5), n)
        e = np.abs(sp[tail] - y[tail])
        e = e[np.isfinite(e)]
        if not e.size:
            continue
        scale = cv_range(traj, cv)
        if scale is None:
            moves = _moves(sp)
            scale = max((abs(s) for _, s in moves), default=None)
        if scale is None or not scale > 0:
            continue
        if float(e.mean()) > OFF_SETPOINT * scale:
            why = " (no criterion checks it)" if compared is not None else ""
            flags.append({"kind": "cv_off_setpoint", "variable": cv, "value": float(e.mean()),
                          "message": f"CV {cv} ends {float(e.mean()):.4g} {units.get(cv, '')} "
                                     f"from its setpoint on average over the last fifth of the "
                                     f"run{why}"})
    return flags


def _counter_flags(solver: Mapping[str, Any], traj: Trajectory) -> list[dict[str, Any]]:
    out = []
    k = solver.get("backup_solver_rescues") or 0
    if k:
        out.append({"kind": "backup_solver", "variable": None, "value": float(k),
                    "message": f"the backup solver rescued {k} step(s) where the first solver "
                               f"failed"})
    k = solver.get("dropped_measurements") or 0
    if k:
        out.append({"kind": "dropped_measurements", "variable": None, "value": float(k),
                    "message": f"{k} reading(s) arrived older than the estimator's history and "
                               f"were dropped"})
    for ev in traj.meta.get("range_events") or []:
        out.append({"kind": "left_valid_range", "variable": ev["variable"], "value": ev["value"],
                    "message": f"{ev['kind']} {ev['variable']} left its physical range at "
                               f"t={ev['time']:g}: reached {ev['value']:.4g} against its "
                               f"{ev['side']} bound {ev['bound']:g}"})
    return out


def summarize(traj: Trajectory, *, bands: Mapping[str, float] | None = None,
              band_fraction: float = 0.02, tolerance: float | Mapping[str, float] = 0.0,
              slow_fraction: float = 0.5, compared: Any = None) -> dict[str, Any]:
    """The per-controller block of ``summary.json``: ``kpi``, ``violations``, ``solver``, ``run``.

    ``violations`` holds the CV events (:func:`violations`, ``signal`` ``"true"``) and the MV
    hard-limit events (:func:`mv_violations`, ``signal`` ``"commanded"`` / ``"applied"``).

    ``run`` carries the run's ``status`` (``"completed"``/``"failed"``), its ``outcome``
    (the status, or ``"left_valid_range"`` when the true plant left its model's physical bounds,
    with the events in ``range_events``), ``message``, ``failed_at`` and the controller name.
    ``flags`` lists what a reader should notice (:func:`run_flags`: MV chatter and travel, CVs
    left off setpoint, backup-solver rescues, dropped readings, values out of range).  Every
    value is JSON-able (no NaN or inf).
    """
    solver = controller_health(traj, slow_fraction=slow_fraction)
    return {
        "kpi": kpis(traj, bands=bands, band_fraction=band_fraction),
        "violations": sorted(violations(traj, tolerance=tolerance) + mv_violations(traj),
                             key=lambda e: (e["start"], e["variable"], e["side"], e["signal"])),
        "solver": solver,
        "run": {"controller": traj.meta.get("controller"), "status": traj.status,
                "outcome": traj.outcome, "range_events": list(traj.meta.get("range_events") or []),
                "message": traj.message, "failed_at": traj.meta.get("failed_at"),
                "steps": len(traj), "faults": list(traj.meta.get("faults", []))},
        "flags": run_flags(traj, compared=compared) + _counter_flags(solver, traj),
    }
