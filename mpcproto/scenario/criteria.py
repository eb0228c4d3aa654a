"""Pass/fail criteria of a scenario: from per-controller results to verdicts.

The vocabulary (``check`` names and their keys) is listed in
:data:`mpcproto.scenario.schema.CRITERION_CHECKS` and documented in ``docs/scenario-format.md``.
Each verdict is plain data ``{"name", "check", "value", "limit", "passed"}`` (plus ``controller`` /
``than`` where they apply); ``value`` is ``None`` when the figure does not exist (e.g. the IAE of a
CV that has no setpoint), and a criterion on a missing figure fails.

The figures come from :func:`mpcproto.analysis.summarize` (KPIs, violation events, solver health)
and, for ``peak_below`` / ``low_above`` and a ``settling_time_below`` with its own ``band``, from
the trajectory's true values.  ``no_limit_violation``
counts CV events and MV hard-limit events (commanded and applied) whose peak excess passes the
criterion's ``tolerance`` (a fraction of the variable's physical range, default
:data:`LIMIT_TOLERANCE`); its message gives the worst excess.  Besides the scenario's own
criteria, a controller that sent an MV command outside a hard limit always gets the failed verdict
``mv_commands_within_limits`` (as a run that did not complete gets ``run_completed`` and a run
whose true plant left its model's physical bounds gets ``within_valid_range``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = ["evaluate_controller", "evaluate_comparisons", "applies_to", "LIMIT_TOLERANCE"]

#: default tolerance of ``no_limit_violation``: an excess counts when it passes the limit by more
#: than this fraction of the variable's physical range (``max(1, |limit|)`` where unbounded).  A
#: controller that rides a soft limit sits on it within its solver's tolerance; 1e-4 of the range
#: is far below any instrument's resolution (common practice, no source).
LIMIT_TOLERANCE = 1e-4

_KPI_OF = {"iae_below": "iae", "ise_below": "ise", "itae_below": "itae",
           "max_error_below": "max_abs_error", "settling_time_below": "settling_time",
           "overshoot_below": "overshoot"}


def _num(v: Any) -> float | None:
    if v is None or isinstance(v, bool):
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def applies_to(criterion: Mapping[str, Any], label: str) -> bool:
    """True when a per-controller criterion concerns the controller *label*."""
    return criterion["check"] != "better_than" and criterion.get("controller", label) == label


def _verdict(cr: Mapping[str, Any], value: float | None, limit: float, ok: bool | None,
             **extra: Any) -> dict[str, Any]:
    out = {"name": cr["name"], "check": cr["check"], "value": value, "limit": limit,
           "passed": bool(ok) if value is not None else False}
    out.update(extra)
    return out


def _series_extreme(traj: Any, variable: str, high: bool) -> float | None:
    for kind in ("y", "u", "x", "d"):
        if traj.has(kind, variable):
            s = np.asarray(traj.series(kind, variable), float)
            s = s[np.isfinite(s)]
            if s.size == 0:
                return None
            return float(s.max() if high else s.min())
    return None


def evaluate_controller(criteria: Sequence[Mapping[str, Any]], label: str, block: Mapping[str, Any],
                        traj: Any = None) -> list[dict[str, Any]]:
    """Verdicts of every criterion that concerns controller *label*.

    Parameters
    ----------
    criteria : sequence of dict
        Validated ``criteria`` entries of a scenario.
    label : str
        Controller label.
    block : dict
        The controller's result (``kpi``, ``violations``, ``solver``, ``run``) from
        :func:`mpcproto.analysis.summarize`.
    traj : Trajectory, optional
        Needed by ``peak_below`` and ``low_above``.
    """
    out = []
    kpi = block.get("kpi", {})
    solver = block.get("solver", {})
    run = block.get("run", {})
    if run.get("status", "completed") != "completed":
        out.append({"name": "run_completed", "check": "run_completed", "value": 0.0, "limit": 1.0,
                    "passed": False, "message": run.get("message", "")})
    left = run.get("range_events") or []
    if left:          # the true plant left its model's physical bounds: the figures describe no unit
        ev = left[0]
        out.append({"name": "within_valid_range", "check": "within_valid_range",
                    "value": float(len(left)), "limit": 0.0, "passed": False,
                    "message": f"{len(left)} variable(s) left their physical range; first: "
                               f"{ev['kind']} {ev['variable']} at t={ev['time']:g} reached "
                               f"{ev['value']:.4g} against its {ev['side']} bound {ev['bound']:g}"})
    sent = [e for e in block.get("violations", []) if e.get("signal") == "commanded"]
    if sent:          # a command outside a hard MV limit fails the run, criteria or not
        worst = max(sent, key=lambda e: e.get("peak_excess") or 0.0)
        out.append({"name": "mv_commands_within_limits", "check": "mv_commands_within_limits",
                    "value": float(len(sent)), "limit": 0.0, "passed": False,
                    "message": f"{len(sent)} event(s) of an MV command outside its hard limits; "
                               f"worst: {worst['variable']} beyond its {worst['side']} limit by "
                               f"{worst['peak_excess']:.4g} from t={worst['start']:g} to "
                               f"{worst['end']:g}"})
    for cr in criteria:
        if not applies_to(cr, label):
            continue
        check = cr["check"]
        if check in _KPI_OF:
            extra = {}
            if "band" in cr:      # a settling band stated by the criterion (CV units)
                from ..analysis import cv_performance

                v = None if traj is None else _num(
                    cv_performance(traj, cr["cv"], band=cr["band"])["settling_time"])
                extra["band"] = cr["band"]
            else:
                v = _num(kpi.get("cv", {}).get(cr["cv"], {}).get(_KPI_OF[check]))
            out.append(_verdict(cr, v, cr["limit"], v is not None and v <= cr["limit"], **extra))
        elif check == "travel_below":
            v = _num(kpi.get("mv", {}).get(cr["mv"], {}).get("total_travel"))
            out.append(_verdict(cr, v, cr["limit"], v is not None and v <= cr["limit"]))
        elif check in ("peak_below", "low_above"):
            v = None if traj is None else _series_extreme(traj, cr["variable"], check == "peak_below")
            ok = v is not None and (v < cr["limit"] if check == "peak_below" else v > cr["limit"])
            out.append(_verdict(cr, v, cr["limit"], ok))
        elif check == "no_limit_violation":
            rel = cr.get("tolerance", LIMIT_TOLERANCE)
            events = [e for e in block.get("violations", [])
                      if ("variable" not in cr or e.get("variable") == cr["variable"])
                      and (e.get("peak_excess") or 0.0) > rel * (e.get("scale") or 1.0)]
            v = float(len(events))
            extra: dict[str, Any] = {"tolerance": rel}
            if events:
                worst = max(events, key=lambda e: (e.get("peak_excess") or 0.0)
                            / (e.get("scale") or 1.0))
                what = worst["variable"] + (f" ({worst['signal']})" if worst.get("signal") in
                                            ("commanded", "applied") else "")
                scale = worst.get("scale") or 1.0
                extra["message"] = (f"{len(events)} event(s) beyond the tolerance ({rel:g} x "
                                    f"{scale:.4g}); worst: {what} beyond its {worst['side']} "
                                    f"limit by {worst['peak_excess']:.4g} "
                                    f"({worst['peak_excess'] / scale:.3g} of {scale:.4g}) from "
                                    f"t={worst['start']:g} to {worst['end']:g}")
            out.append(_verdict(cr, v, 0.0, v == 0.0, **extra))
        elif check == "no_solver_failure":
            v = float((solver.get("failures") or 0) + (solver.get("fallbacks") or 0))
            out.append(_verdict(cr, v, 0.0, v == 0.0))
        elif check == "solve_time_below":
            v = _num(solver.get("worst_fraction"))
            out.append(_verdict(cr, v, cr["fraction"], v is not None and v < cr["fraction"]))
    return out


def evaluate_comparisons(criteria: Sequence[Mapping[str, Any]],
                         blocks: Mapping[str, Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Verdicts of the ``better_than`` criteria (controller A's KPI at least X % below B's).

    ``value`` is the improvement in percent, ``100 * (kpi_B - kpi_A) / kpi_B``; the criterion
    passes when it is at least ``by_percent``.
    """
    out = []
    for cr in criteria:
        if cr["check"] != "better_than":
            continue
        a, b = cr["controller"], cr["than"]
        va = _num(blocks.get(a, {}).get("kpi", {}).get("cv", {}).get(cr["cv"], {}).get(cr["kpi"]))
        vb = _num(blocks.get(b, {}).get("kpi", {}).get("cv", {}).get(cr["cv"], {}).get(cr["kpi"]))
        if va is None or vb is None or vb == 0:
            v = None
        else:
            v = 100.0 * (vb - va) / abs(vb)
        out.append({"name": cr["name"], "check": "better_than", "controller": a, "than": b,
                    "kpi": cr["kpi"], "cv": cr["cv"], "value": v, "limit": cr["by_percent"],
                    "passed": v is not None and v >= cr["by_percent"],
                    "values": {a: va, b: vb}})
    return out
