"""Compare a batch with an earlier one: which KPIs got worse beyond a tolerance.

In CI a study re-runs on every design change; ``mpcproto batch ... --baseline old/results.jsonl``
compares the new results with a kept run, case by case (matched by case id) and controller by
controller, and flags every KPI that got *worse* by more than the tolerance.  All compared numbers are
"lower is better": the KPIs (IAE, ISE, ITAE, settling time, overshoot, largest error, MV travel), the
number and integral of limit-violation events, and the solver's failure and fallback counts.  Solve
*times* are not compared (they depend on the machine).  A case that passed in the baseline and now
fails or errors is a regression too.

A change counts as worse when ``current - baseline > atol + rtol * |baseline|`` (the scaled
tolerance SciPy's ``assert_allclose`` uses, one-sided; the rule and its default tolerances live
with the criteria: :func:`mpcproto.analysis.criteria.regression_bounds`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from ..validation import fail, shown
from ..analysis.criteria import REGRESSION_ATOL, REGRESSION_RTOL, regression_bounds
from ..store import case_verdict, load_results
from .summary import flat_numbers

__all__ = ["Regression", "BaselineComparison", "compare_with_baseline", "compared_numbers"]

#: Solver counters that are compared (lower is better); timings are left out on purpose.
SOLVER_COUNTERS = ("failures", "fallbacks", "inaccurate", "infeasible")
#: KPI leaves that describe how a figure was taken (a band, a time), not a figure to lower
_DESCRIPTIVE = (".settling_band", ".interaction.at")


@dataclass(frozen=True)
class Regression:
    """One number that got worse beyond the tolerance (or a verdict that went from pass to fail)."""

    case_id: str
    scenario: str
    controller: str
    quantity: str          # e.g. "kpi.level.iae", "violations.count", "verdict"
    baseline: float | str
    current: float | str
    allowed: float | None  # the largest current value still accepted (None for a verdict)

    @property
    def change(self) -> float:
        """Relative change (current - baseline) / |baseline|; inf from a zero baseline."""
        if not isinstance(self.baseline, (int, float)) or not isinstance(self.current, (int, float)):
            return math.nan
        if self.baseline == 0:
            return math.inf if self.current > 0 else 0.0
        return (self.current - self.baseline) / abs(self.baseline)

    def describe(self) -> str:
        """One line for a report or a JUnit failure message."""
        who = f"{self.case_id}" + (f" [{self.controller}]" if self.controller else "")
        if self.quantity == "verdict":
            return f"{who}: verdict went from {self.baseline} to {self.current}"
        ch = self.change
        pct = "" if math.isnan(ch) else (" (+inf %)" if math.isinf(ch) else f" ({100 * ch:+.1f} %)")
        return (f"{who}: {self.quantity} {self.baseline:.6g} -> {self.current:.6g}{pct}, "
                f"allowed up to {self.allowed:.6g}")


@dataclass
class BaselineComparison:
    """The outcome of :func:`compare_with_baseline`.

    Attributes
    ----------
    regressions : list of Regression
        Numbers and verdicts that got worse beyond the tolerance, worst relative change first.
    compared : int
        (case, controller, number) triples compared.
    improved : int
        Of those, how many got better beyond the tolerance.
    cases_compared : int
        Cases present in both runs.
    missing : list of str
        Baseline case ids with no current result (not compared).
    new : list of str
        Current case ids with no baseline (not compared).
    pairs : list of (case_id, controller)
        The case and controller pairs compared (a verdict change is listed with controller "").
    rtol, atol : float
        The tolerance used.
    """

    regressions: list[Regression] = field(default_factory=list)
    compared: int = 0
    improved: int = 0
    cases_compared: int = 0
    missing: list[str] = field(default_factory=list)
    new: list[str] = field(default_factory=list)
    pairs: list[tuple[str, str]] = field(default_factory=list)
    rtol: float = REGRESSION_RTOL
    atol: float = REGRESSION_ATOL
    baseline_file: str = ""

    @property
    def ok(self) -> bool:
        """True when nothing got worse."""
        return not self.regressions


def compared_numbers(controller_result: Mapping[str, Any]) -> dict[str, float]:
    """The lower-is-better numbers of one controller's result that a baseline comparison checks."""
    out = {k: v for k, v in flat_numbers(controller_result.get("kpi") or {}, "kpi").items()
           if not k.endswith(_DESCRIPTIVE)}
    events = list(controller_result.get("violations") or [])
    out["violations.count"] = float(len(events))
    out["violations.integral"] = float(sum(float(e.get("integral") or 0.0) for e in events
                                           if isinstance(e, Mapping)))
    solver = controller_result.get("solver") or {}
    for k in SOLVER_COUNTERS:
        v = solver.get(k)
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            out[f"solver.{k}"] = float(v)
    return out


def _check_tol(name: str, v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
        raise fail("compare_with_baseline()", name, "a finite number >= 0", shown(v))
    return float(v)


def _records(source: str | os.PathLike | Iterable[Mapping[str, Any]]) -> dict[str, Mapping[str, Any]]:
    if isinstance(source, (str, os.PathLike)):
        if not os.path.isfile(source):
            raise fail("compare_with_baseline()", "baseline",
                       "the results.jsonl of an earlier batch run",
                       f"'{os.fspath(source)}', which does not exist")
        recs = load_results(source)
    else:
        recs = list(source)
    return {str(r.get("case_id")): r for r in recs}


def compare_with_baseline(current: str | os.PathLike | Iterable[Mapping[str, Any]],
                          baseline: str | os.PathLike | Iterable[Mapping[str, Any]], *,
                          rtol: float = REGRESSION_RTOL,
                          atol: float = REGRESSION_ATOL) -> BaselineComparison:
    """Flag the KPIs of *current* that got worse than in *baseline* beyond ``atol + rtol*|base|``.

    Parameters
    ----------
    current, baseline : path or iterable of dict
        ``results.jsonl`` files or their records; cases are matched by ``case_id``, controllers by
        label.
    rtol : float
        Relative tolerance (0.05 = 5 % worse is still accepted).
    atol : float
        Absolute tolerance, in the unit of each number (guards KPIs near zero).

    Returns
    -------
    BaselineComparison

    Examples
    --------
    >>> base = [{"case_id": "a", "scenario": "s", "status": "ok", "passed": True,
    ...          "controllers": {"mpc": {"kpi": {"level": {"iae": 2.0}}}}}]
    >>> cur = [{"case_id": "a", "scenario": "s", "status": "ok", "passed": True,
    ...         "controllers": {"mpc": {"kpi": {"level": {"iae": 2.5}}}}}]
    >>> cmp = compare_with_baseline(cur, base, rtol=0.1)
    >>> [r.quantity for r in cmp.regressions]
    ['kpi.level.iae']
    """
    rtol = _check_tol("rtol", rtol)
    atol = _check_tol("atol", atol)
    cur = _records(current)
    base = _records(baseline)
    out = BaselineComparison(rtol=rtol, atol=atol,
                             baseline_file=os.fspath(baseline) if isinstance(baseline, (str, os.PathLike)) else "")
    out.missing = sorted(set(base) - set(cur))
    out.new = sorted(set(cur) - set(base))
    for cid in sorted(set(cur) & set(base)):
        c, b = cur[cid], base[cid]
        out.cases_compared += 1
        scen = str(c.get("scenario", ""))
        vc, vb = case_verdict(c), case_verdict(b)
        out.pairs.append((cid, ""))
        if vb == "passed" and vc != "passed":
            out.regressions.append(Regression(cid, scen, "", "verdict", vb, vc, None))
        if vc == "error" or vb == "error":
            continue
        cctl = c.get("controllers") or {}
        bctl = b.get("controllers") or {}
        for label in cctl:
            if label not in bctl:
                continue
            out.pairs.append((cid, str(label)))
            now = compared_numbers(cctl[label] or {})
            then = compared_numbers(bctl[label] or {})
            for q in sorted(set(now) & set(then)):
                x, x0 = now[q], then[q]
                if math.isnan(x0):
                    continue
                out.compared += 1
                better_below, allowed = regression_bounds(x0, rtol, atol)
                if math.isnan(x) or x > allowed:
                    out.regressions.append(Regression(cid, scen, str(label), q, x0, x, allowed))
                elif x < better_below:
                    out.improved += 1
    out.regressions.sort(key=lambda r: (r.quantity != "verdict", -_sort_change(r), r.case_id,
                                        r.controller, r.quantity))
    return out


def _sort_change(r: Regression) -> float:
    ch = r.change
    return 0.0 if math.isnan(ch) else min(ch, 1e300)
