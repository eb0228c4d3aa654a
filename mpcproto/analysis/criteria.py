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

What each check's number means, its unit, which way is better and whether a ratio to its limit
makes sense live in one table, :data:`CRITERIA`; the CLI and the reports read it from there
(:func:`utilisation`, :func:`margin`).  The rule by which a baseline comparison calls a number
worse is here too (:func:`regression_bounds`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["evaluate_controller", "evaluate_comparisons", "applies_to", "LIMIT_TOLERANCE",
           "CriterionInfo", "CRITERIA", "check_of", "limit_is_upper", "is_absolute", "utilisation",
           "margin", "REGRESSION_RTOL", "REGRESSION_ATOL", "regression_bounds"]

#: default tolerance of ``no_limit_violation``: an excess counts when it passes the limit by more
#: than this fraction of the variable's physical range (``max(1, |limit|)`` where unbounded).  A
#: controller that rides a soft limit sits on it within its solver's tolerance; 1e-4 of the range
#: is far below any instrument's resolution (common practice, no source).
LIMIT_TOLERANCE = 1e-4



@dataclass(frozen=True)
class CriterionInfo:
    """What a check's verdict means.

    Attributes
    ----------
    meaning : str
        What the check asks, in the words of ``docs/scenario-format.md``.
    value : str
        What the number beside the verdict is, with its unit (the limit is in the same terms).
    better : {"lower", "higher"}
        Which way the value is better: ``"lower"`` when the limit is an upper bound.
    absolute : bool
        A check on the absolute level of a variable (a temperature in K, a level in m): a ratio of
        value to limit means nothing there, so the reports give a margin in the variable's unit.
    """

    meaning: str
    value: str
    better: str
    absolute: bool = False


#: Every check a verdict can carry: the scenario's ``[[criteria]]`` checks
#: (:data:`mpcproto.scenario.schema.CRITERION_CHECKS` lists the keys each needs) and the verdicts
#: added whatever the criteria (``run_completed``, ``within_valid_range``,
#: ``mv_commands_within_limits``).
CRITERIA: dict[str, CriterionInfo] = {
    "iae_below": CriterionInfo("integral of absolute error of a CV below limit",
                               "IAE, CV unit x time unit", "lower"),
    "ise_below": CriterionInfo("integral of squared error of a CV below limit",
                               "ISE, CV unit squared x time unit", "lower"),
    "itae_below": CriterionInfo("time-weighted IAE of a CV below limit",
                                "ITAE, CV unit x time unit squared", "lower"),
    "max_error_below": CriterionInfo("largest |setpoint - CV| below limit",
                                     "largest |setpoint - CV|, CV unit", "lower"),
    "settling_time_below": CriterionInfo("settling time of a CV below limit", "time unit", "lower"),
    "overshoot_below": CriterionInfo("overshoot of a CV below limit",
                                     "fraction of the setpoint step", "lower"),
    "peak_below": CriterionInfo("highest true value a variable reaches below limit",
                                "highest true value, variable's unit", "lower", absolute=True),
    "low_above": CriterionInfo("lowest true value a variable reaches above limit",
                               "lowest true value, variable's unit", "higher", absolute=True),
    "travel_below": CriterionInfo("total travel of an MV below limit", "total MV travel, MV unit",
                                  "lower"),
    "no_limit_violation": CriterionInfo("no limit-violation event beyond the tolerance",
                                        "number of limit-violation events", "lower"),
    "no_solver_failure": CriterionInfo("the controller never failed nor fell back",
                                       "number of failed or fallback steps", "lower"),
    "solve_time_below": CriterionInfo("slowest whole controller step below a fraction of Ts",
                                      "slowest step as a fraction of the sample time", "lower"),
    "better_than": CriterionInfo("this controller's KPI of a CV at least by_percent % lower than "
                                 "the other's",
                                 "% by which the KPI is lower than the other controller's", "higher"),
    "run_completed": CriterionInfo("the simulation ran to its end", "the simulation ended early",
                                   "higher"),
    "within_valid_range": CriterionInfo("the true plant stayed within its model's physical bounds",
                                        "number of variables that left their physical range",
                                        "lower"),
    "mv_commands_within_limits": CriterionInfo(
        "every MV command within its hard limits",
        "number of events of an MV command outside its hard limits", "lower"),
}


def check_of(criterion: Mapping[str, Any]) -> str:
    """The check of a verdict (from ``check``, or the part of its ``name`` before a colon)."""
    chk = criterion.get("check")
    if isinstance(chk, str):
        return chk
    return str(criterion.get("name") or "").split(":", 1)[0]


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def limit_is_upper(criterion: Mapping[str, Any]) -> bool | None:
    """True for an upper limit, False for a lower one, None when unknown.

    From :data:`CRITERIA`; a check not in the table (a record of another version) is read from its
    verdict (value within the limit and passed, or beyond it and failed).
    """
    info = CRITERIA.get(check_of(criterion))
    if info is not None:
        return info.better == "lower"
    v, lim, ok = criterion.get("value"), criterion.get("limit"), criterion.get("passed")
    if not (_is_num(v) and _is_num(lim)) or ok is None:
        return None
    return (v <= lim) == bool(ok)


def is_absolute(criterion: Mapping[str, Any]) -> bool:
    """True for a check on the absolute level of a variable (no ratio to its limit)."""
    info = CRITERIA.get(check_of(criterion))
    return info is not None and info.absolute


def margin(criterion: Mapping[str, Any]) -> float:
    """Distance from the limit in the criterion's unit: positive inside, negative beyond it."""
    v, lim = criterion.get("value"), criterion.get("limit")
    up = limit_is_upper(criterion)
    if up is None or not (_is_num(v) and _is_num(lim)):
        return math.nan
    return float(lim - v) if up else float(v - lim)


def utilisation(criterion: Mapping[str, Any]) -> float:
    """How much of its limit a criterion uses: 1.0 at the limit, above 1.0 when it fails.

    For an upper limit this is value/limit; for a lower limit (a value that must stay above) it is
    limit/value (the direction from :func:`limit_is_upper`).  NaN for checks on an absolute level
    (:func:`is_absolute`: see :func:`margin` for those) and when the numbers do not allow a ratio;
    inf for a failed check whose ratio cannot be formed.
    """
    v, lim, ok = criterion.get("value"), criterion.get("limit"), criterion.get("passed")
    if is_absolute(criterion):
        return math.inf if ok is False else math.nan
    if not (_is_num(v) and _is_num(lim)) or not (math.isfinite(v) and math.isfinite(lim)):
        return math.nan if ok is not False else math.inf
    if lim == 0 or v == 0:
        if ok is False:
            return math.inf
        return 0.0 if (v == 0 and lim != 0) else math.nan
    up = limit_is_upper(criterion)
    if up is None:
        return math.nan
    r = v / lim if up else lim / v
    if r < 0:
        return math.inf if ok is False else math.nan
    return r


#: Default tolerances of a baseline comparison (``mpcproto batch --baseline``): 5 % worse is still
#: accepted (``--tolerance``), and 1e-9 in each number's own unit guards figures near zero
#: (``--abs-tolerance``).
REGRESSION_RTOL = 0.05
REGRESSION_ATOL = 1e-9


def regression_bounds(baseline: float, rtol: float = REGRESSION_RTOL,
                      atol: float = REGRESSION_ATOL) -> tuple[float, float]:
    """``(better_below, worse_above)`` of a lower-is-better number whose earlier value is *baseline*.

    The regression rule of a baseline comparison: a number is worse when
    ``current - baseline > atol + rtol * |baseline|`` (the scaled tolerance of SciPy's
    ``assert_allclose``, one-sided), better when ``baseline - current`` passes the same amount.
    Every number a baseline comparison checks is lower-is-better (KPIs, violation counts and
    integrals, solver failure counters).
    """
    return baseline - atol - rtol * abs(baseline), baseline + atol + rtol * abs(baseline)


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
                from .kpi import cv_performance

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
