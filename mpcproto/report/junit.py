"""JUnit XML for CI servers: one test case per study case and pass/fail criterion.

The JUnit XML layout is an open de-facto standard read by CI servers (a ``<testsuites>`` root, one
``<testsuite>`` per group, ``<testcase classname=... name=... time=...>`` children that hold a
``<failure>`` or an ``<error>`` element when they did not pass).  Here:

* one ``<testsuite>`` per scenario;
* per case, one ``<testcase>`` per criterion (``classname`` = ``<scenario>.<case id>``, ``name`` =
  ``<controller>: <criterion>``), with a ``<failure>`` when the criterion failed;
* a case with no criteria gives one test case named ``completed``;
* a case that did not complete gives one test case named ``run`` holding an ``<error>`` with the
  message;
* with a baseline comparison, a ``baseline`` suite: per compared case one test case for its verdict
  (fails when a case that passed now fails) and one per controller (fails, listing the numbers, when
  a KPI got worse beyond the tolerance).

Counts (``tests``, ``failures``, ``errors``, ``skipped``) and ``time`` are given on every suite and on
the root.
"""

from __future__ import annotations

import math
import os
import re
import socket
import xml.etree.ElementTree as ET
from collections.abc import Iterable, Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ..store import case_verdict, criterion_passed, incomplete_note
from .baseline import BaselineComparison
from .summary import criteria_of

__all__ = ["write_junit", "junit_tree"]

# characters XML 1.0 does not allow (control characters other than tab, newline, carriage return)
_BAD_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")


def _text(s: Any) -> str:
    # surrogate escapes (a file name that is not valid UTF-8) become \udcXX, which XML can hold
    text = str(s).encode("utf-8", "backslashreplace").decode("utf-8")
    return _BAD_XML.sub("?", text)


def _num(v: Any) -> str:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return str(v)
    return f"{v:.6g}"


def _criterion_label(controller: str, cr: Mapping[str, Any]) -> str:
    name = str(cr.get("name") or cr.get("check") or "criterion")
    return f"{controller}: {name}" if controller else name


def _new_suite(name: str) -> dict[str, Any]:
    return {"el": ET.Element("testsuite", name=_text(name)), "tests": 0, "failures": 0, "errors": 0,
            "time": 0.0}


def _case(suite: dict[str, Any], classname: str, name: str, seconds: float) -> ET.Element:
    el = ET.SubElement(suite["el"], "testcase", classname=_text(classname), name=_text(name),
                       time=f"{max(0.0, seconds):.3f}")
    suite["tests"] += 1
    suite["time"] += max(0.0, seconds)
    return el


def _classname(scenario: str, cid: str) -> str:
    # CI servers split classname on dots into package/class: keep the case id as the class
    return f"{scenario}.{cid.replace('.', '_')}" if scenario else cid.replace(".", "_")


def junit_tree(records: Iterable[Mapping[str, Any]], *, name: str = "mpcproto batch",
               baseline: BaselineComparison | None = None) -> ET.ElementTree:
    """Build the JUnit XML tree of a batch (see the module docstring for the layout)."""
    suites: dict[str, dict[str, Any]] = {}
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S")
    for rec in records:
        scen = str(rec.get("scenario") or "batch")
        cid = str(rec.get("case_id"))
        suite = suites.setdefault(scen, _new_suite(scen))
        elapsed = rec.get("elapsed_s")
        elapsed = float(elapsed) if isinstance(elapsed, (int, float)) and math.isfinite(elapsed) else 0.0
        cls = _classname(scen, cid)
        if case_verdict(rec) == "error":
            tc = _case(suite, cls, "run", elapsed)
            msg = str(rec.get("message") or incomplete_note(rec) or "the case did not complete")
            err = ET.SubElement(tc, "error", message=_text(msg.splitlines()[0] if msg else msg),
                                type=_text(rec.get("error_type") or "CaseError"))
            detail = [msg]
            if rec.get("error_at"):
                detail.append(f"at {rec['error_at']}")
            if rec.get("params"):
                detail.append(f"params: {rec['params']}")
            if rec.get("seed") is not None:
                detail.append(f"seed: {rec['seed']}")
            err.text = _text("\n".join(detail))
            suite["errors"] += 1
            continue
        crit = criteria_of(rec)
        if case_verdict(rec) == "failed" and all(criterion_passed(cr) for _, cr in crit):
            # the record says the case did not pass (or says nothing) but names no failed
            # criterion: one failing test case, never a pass
            tc = _case(suite, cls, "verdict", elapsed)
            text = incomplete_note(rec) or "the case's verdict is 'not passed'"
            f = ET.SubElement(tc, "failure", message=_text(text), type="verdict")
            f.text = _text(text)
            suite["failures"] += 1
            continue
        if not crit:
            _case(suite, cls, "completed", elapsed)
            continue
        share = elapsed / len(crit)
        for controller, cr in crit:
            tc = _case(suite, cls, _criterion_label(controller, cr), share)
            if not criterion_passed(cr):
                text = (f"{_criterion_label(controller, cr)}: value {_num(cr.get('value'))}, "
                        f"limit {_num(cr.get('limit'))}")
                f = ET.SubElement(tc, "failure", message=_text(text), type="criterion")
                f.text = _text(text + (f"\n{cr['message']}" if cr.get("message") else "")
                               + (f"\nparams: {rec.get('params')}" if rec.get("params") else "")
                               + (f"\nseed: {rec.get('seed')}" if rec.get("seed") is not None else ""))
                suite["failures"] += 1
    if baseline is not None:
        suite = suites.setdefault("baseline", _new_suite("baseline"))
        by_key: dict[tuple[str, str], list] = {}
        for r in baseline.regressions:
            by_key.setdefault((r.case_id, r.controller), []).append(r)
        for cid, ctl in baseline.pairs:
            regs = by_key.get((cid, ctl), [])
            what = "verdict no worse" if not ctl else f"{ctl}: no KPI worse"
            tc = _case(suite, _classname("baseline", cid), what, 0.0)
            if regs:
                f = ET.SubElement(tc, "failure", type="baseline",
                                  message=_text(f"{len(regs)} number(s) worse than the baseline "
                                                f"beyond rtol={baseline.rtol:g}, atol={baseline.atol:g}"))
                f.text = _text("\n".join(r.describe() for r in regs))
                suite["failures"] += 1
    root = ET.Element("testsuites", name=_text(name))
    totals = {"tests": 0, "failures": 0, "errors": 0, "time": 0.0}
    host = socket.gethostname()
    for suite in suites.values():
        el = suite["el"]
        el.set("tests", str(suite["tests"]))
        el.set("failures", str(suite["failures"]))
        el.set("errors", str(suite["errors"]))
        el.set("skipped", "0")
        el.set("time", f"{suite['time']:.3f}")
        el.set("timestamp", stamp)
        el.set("hostname", _text(host))
        root.append(el)
        for k in totals:
            totals[k] += suite[k]
    for k in ("tests", "failures", "errors"):
        root.set(k, str(totals[k]))
    root.set("skipped", "0")
    root.set("time", f"{totals['time']:.3f}")
    tree = ET.ElementTree(root)
    ET.indent(tree, space="  ")
    return tree


def write_junit(records: Iterable[Mapping[str, Any]], path: str | os.PathLike, *,
                name: str = "mpcproto batch", baseline: BaselineComparison | None = None) -> dict[str, int]:
    """Write a batch's JUnit XML file (UTF-8, with an XML declaration).

    Parameters
    ----------
    records : iterable of dict
        Result records (lines of ``results.jsonl``).
    path : path
        Output file; its directory is created.
    name : str
        Name of the ``<testsuites>`` root.
    baseline : BaselineComparison, optional
        Adds a ``baseline`` suite: per compared case, a verdict test case and one per controller.

    Returns
    -------
    dict
        The root's counts: ``tests``, ``failures``, ``errors``.
    """
    tree = junit_tree(records, name=name, baseline=baseline)
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tree.write(p, encoding="utf-8", xml_declaration=True)
    root = tree.getroot()
    return {k: int(root.get(k)) for k in ("tests", "failures", "errors")}
