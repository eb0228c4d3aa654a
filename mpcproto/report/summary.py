"""Flat views of batch results: one row per case and controller, and ``summary.csv``.

A result record (one line of ``results.jsonl``) nests its numbers: per controller a ``kpi`` mapping
(per CV: iae, ise, ...; per MV: total travel), a list of ``violations`` events, ``solver`` counters
and ``criteria`` verdicts.  :func:`flat_rows` turns a record into flat rows with dotted column names
(``kpi.level.iae``, ``violations.count``, ``solver.p95_ms``, ``param.plant.parameters.volume``) that
a spreadsheet or :func:`pandas.read_csv` reads directly; :func:`write_summary_csv` streams a whole
``results.jsonl`` into ``summary.csv`` in two passes, in memory that does not grow with the number
of cases.
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any

from ..analysis.criteria import utilisation
from ..store import case_verdict, criterion_passed, incomplete_note, iter_results

__all__ = ["flat_rows", "flat_numbers", "criteria_of", "write_summary_csv", "LEAD_COLUMNS",
           "case_verdict"]

#: The first columns of summary.csv, in this order; the flat numbers follow, sorted by name.
LEAD_COLUMNS = ("case_id", "scenario", "verdict", "status", "passed", "controller",
                "controller_passed", "criteria_total", "criteria_failed", "worst_utilisation",
                "seed", "elapsed_s", "message")


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def flat_numbers(tree: Any, prefix: str) -> dict[str, float]:
    """Numeric leaves of a nested mapping as ``{"prefix.a.b": value}`` (bools become 0/1)."""
    out: dict[str, float] = {}
    if isinstance(tree, Mapping):
        for k, v in tree.items():
            out.update(flat_numbers(v, f"{prefix}.{k}"))
    elif isinstance(tree, bool):
        out[prefix] = float(tree)
    elif _is_num(tree):
        out[prefix] = float(tree)
    elif tree is None:
        out[prefix] = math.nan
    return out


def criteria_of(record: Mapping[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    """Every criterion of a record as ``(controller or "", criterion)``; cross-controller ones last."""
    out: list[tuple[str, dict[str, Any]]] = []
    for label, res in (record.get("controllers") or {}).items():
        for cr in (res or {}).get("criteria") or []:
            out.append((str(label), cr))
    for key in ("comparisons", "criteria"):
        for cr in record.get(key) or []:
            out.append(("", cr))
    return out


def _violation_numbers(events: Any) -> dict[str, float]:
    events = list(events or [])
    integral = sum(float(e.get("integral") or 0.0) for e in events if isinstance(e, Mapping))
    peak = max((float(e.get("peak_excess") or 0.0) for e in events if isinstance(e, Mapping)),
               default=0.0)
    return {"violations.count": float(len(events)), "violations.integral": integral,
            "violations.peak_excess": peak}


def flat_rows(record: Mapping[str, Any]) -> list[dict[str, Any]]:
    """One flat row per controller of a result record (one row for a case that did not complete).

    Columns: :data:`LEAD_COLUMNS`, then ``param.<key>`` for the case's study parameters,
    ``kpi.<variable>.<kpi>``, ``violations.count|integral|peak_excess`` and ``solver.<counter>``.
    Cross-controller criteria count toward every controller's ``criteria_*`` columns.
    """
    verdict = case_verdict(record)
    base: dict[str, Any] = {
        "case_id": record.get("case_id", ""), "scenario": record.get("scenario", ""),
        "verdict": verdict, "status": record.get("status") or "",
        "passed": verdict == "passed",
        "seed": record.get("seed", ""), "elapsed_s": record.get("elapsed_s", ""),
        "message": record.get("message", "") or incomplete_note(record),
    }
    params = record.get("params") or {}
    if isinstance(params, Mapping):
        for k, v in params.items():
            base[f"param.{k}"] = v if (_is_num(v) or isinstance(v, str)) else str(v)
    shared = [cr for ctl, cr in criteria_of(record) if ctl == ""]
    controllers = record.get("controllers") or {}
    if not controllers:
        row = dict(base, controller="", controller_passed=verdict == "passed",
                   criteria_total=len(shared),
                   criteria_failed=sum(1 for c in shared if not criterion_passed(c)))
        row["worst_utilisation"] = _worst(shared)
        return [row]
    rows = []
    for label, res in controllers.items():
        res = res or {}
        crit = list(res.get("criteria") or []) + shared
        row = dict(base, controller=str(label))
        row["criteria_total"] = len(crit)
        row["criteria_failed"] = sum(1 for c in crit if not criterion_passed(c))
        row["controller_passed"] = row["criteria_failed"] == 0 and verdict == "passed"
        row["worst_utilisation"] = _worst(crit)
        row.update(flat_numbers(res.get("kpi") or {}, "kpi"))
        row.update(_violation_numbers(res.get("violations")))
        row.update(flat_numbers(res.get("solver") or {}, "solver"))
        rows.append(row)
    return rows


def _worst(crit: Iterable[Mapping[str, Any]]) -> float:
    vals = [u for u in (utilisation(c) for c in crit) if not math.isnan(u)]
    return max(vals) if vals else math.nan


def _iter_records(source: str | os.PathLike | Iterable[Mapping[str, Any]],
                  ids: set[str] | None) -> Iterator[Mapping[str, Any]]:
    if isinstance(source, (str, os.PathLike)):
        seen: set[str] = set()
        # the last record per id wins: first pass finds, per id, the line number of its last record
        last: dict[str, int] = {}
        for i, rec in enumerate(iter_results(source)):
            last[str(rec["case_id"])] = i
        for i, rec in enumerate(iter_results(source)):
            cid = str(rec["case_id"])
            if last.get(cid) != i or (ids is not None and cid not in ids) or cid in seen:
                continue
            seen.add(cid)
            yield rec
    else:
        for rec in source:
            if ids is None or str(rec.get("case_id")) in ids:
                yield rec


def write_summary_csv(source: str | os.PathLike | Iterable[Mapping[str, Any]],
                      csv_path: str | os.PathLike, *, ids: Iterable[str] | None = None) -> int:
    """Write ``summary.csv``: one row per case x controller, flat KPI columns.

    Parameters
    ----------
    source : path or iterable of dict
        A ``results.jsonl`` file (read twice, streaming; the last record per case id counts) or
        the records themselves (a list; it is iterated twice).
    csv_path : path
        Where to write (UTF-8, comma separated, header row).
    ids : iterable of str, optional
        Keep only these case ids (the cases of the current study).

    Returns
    -------
    int
        Number of data rows written.
    """
    wanted = None if ids is None else {str(i) for i in ids}
    extra: set[str] = set()
    for rec in _iter_records(source, wanted):
        for row in flat_rows(rec):
            extra.update(k for k in row if k not in LEAD_COLUMNS)
    params = sorted(k for k in extra if k.startswith("param."))
    rest = sorted(k for k in extra if not k.startswith("param."))
    columns = list(LEAD_COLUMNS) + params + rest
    n = 0
    path = Path(csv_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    # a file name that is not valid UTF-8 reaches Python with surrogate escapes: written as \udcXX
    with path.open("w", newline="", encoding="utf-8", errors="backslashreplace") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, restval="", extrasaction="ignore")
        w.writeheader()
        for rec in _iter_records(source, wanted):
            for row in flat_rows(rec):
                w.writerow({k: _cell(v) for k, v in row.items()})
                n += 1
    return n


def _cell(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return "" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return v
