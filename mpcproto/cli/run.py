"""The commands that write or run one scenario: ``mpcproto run`` and ``mpcproto new``."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ..analysis.criteria import CRITERIA
from ._common import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_OK, _fmt


# ----------------------------------------------------------------------------------------- run
def _check_out_dir(out: str) -> None:
    """Refuse an --out that cannot become a results directory, before anything runs."""
    from pathlib import Path

    from ..validation import fail

    # owner None: the CLI prints 'mpcproto <command>: error:' before the key
    p = Path(out)
    if p.exists() and not p.is_dir():
        raise fail(None, "--out", "a directory for the results (created if missing)",
                   f"a file named {out}", "Give another path.")
    parent = next((q for q in [p, *p.parents] if q.exists()), None)
    if parent is not None and not parent.is_dir():
        raise fail(None, "--out", "a directory for the results",
                   f"{out}, below the file '{parent}', so no directory can be made there")


def _print_verdict(cr: dict[str, Any], label: str) -> None:
    mark = "pass" if cr["passed"] else "FAIL"
    who = f"{label:<10s} " if label else ""
    info = CRITERIA.get(str(cr.get("check", "")))
    means = info.value if info else None
    print(f"{mark}  {who}{cr['name']}: {_fmt(cr['value'])} (limit {_fmt(cr['limit'])}"
          f"{'; ' + means if means else ''})")
    if cr.get("message"):
        print(f"      {cr['message']}")


def _cmd_run(args: argparse.Namespace) -> int:
    from ..compare import tuning_text
    from ..scenario import load_scenario, run_scenario

    scn = load_scenario(args.scenario)
    _check_out_dir(args.out)
    summary = run_scenario(scn, args.out, plots=not args.no_plots, ci=args.ci, case_id=args.case)
    for w in summary.get("warnings", []):
        # summary.json keeps the warning's category ("UserWarning: ..."); a reader wants the text
        text = w.split(": ", 1)[1] if w.split(": ", 1)[0].endswith("Warning") else w
        print(f"mpcproto run: warning: {text}", file=sys.stderr)
    if summary["status"] != "ok":
        if getattr(args, "debug", False) and summary.get("error_detail"):
            print(summary["error_detail"].rstrip(), file=sys.stderr)
        print(f"mpcproto run: error: {summary['message']}", file=sys.stderr)
        return EXIT_BAD_INPUT
    for label, res in summary["controllers"].items():
        inp = res.get("inputs") or {}
        print(f"{label:<10s} had: {'; '.join(inp.get('structure') or ['?'])}; measured DVs used: "
              f"{', '.join(inp.get('measured_dvs_used') or []) or 'none'}")
        print(f"{'':<10s} tuning: {tuning_text(inp)}")
    for note in summary.get("fairness") or []:
        print(f"note: {note}")
    for label, res in summary["controllers"].items():
        for cr in res["criteria"]:
            _print_verdict(cr, label)
    for cr in summary.get("comparisons", []):
        _print_verdict(cr, "")
    for label, res in summary["controllers"].items():
        for fl in res.get("flags", []):   # what to notice even when every verdict passed
            print(f"note  {label}: {fl['message']}")
    print(f"{'PASSED' if summary['passed'] else 'FAILED'}: {summary['scenario']} "
          f"({summary['elapsed_s']:.1f} s); results in {args.out}")
    from ..scenario import count_cases

    n = count_cases(scn, full=True)
    if n > 1 and args.case is None:
        print(f"(the nominal case only; the study has {count_cases(scn)} case(s), {n} with --full: "
              f"run them with mpcproto batch)")
    print(summary["caution"])
    return EXIT_OK if summary["passed"] else EXIT_FAILED


# ----------------------------------------------------------------------------------------- new
def _option_value(text: str) -> Any:
    """A --option value: a TOML value (number, true/false, "string", [array]) or a bare string."""
    from ..scenario.schema import tomllib

    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def _cmd_new(args: argparse.Namespace) -> int:
    from pathlib import Path

    from ..validation import fail
    from ..scenario import check_scenario
    from ..scenario.starter import starter_scenario

    out = Path(args.out)
    if out.exists() and not args.force:
        raise fail(None, "--out", "a new file", f"{out} already there",
                   "Give another name or --force to overwrite it.")
    if out.suffix != ".toml":
        raise fail(None, "--out", "a scenario file name ending in .toml",
                   f"{out} ({out.suffix or 'no suffix'})")
    options = {}
    for item in args.option or []:
        k, sep, v = item.partition("=")
        if not sep or not k.strip().isidentifier():
            raise fail(None, "--option", "NAME=VALUE (e.g. outflow=valve)", repr(item))
        options[k.strip()] = _option_value(v.strip())
    text = starter_scenario(args.model, out, options=options)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)
    check_scenario(out, build_controllers=False)
    print(f"wrote {out}: a starter study for {args.model}. Next:\n"
          f"    mpcproto check {out}\n    mpcproto run {out} --out {out.with_suffix('')}-results")
    return EXIT_OK


def _add_new_parser(sub: Any) -> None:
    n = sub.add_parser("new", help="write a commented starter scenario for a model",
                       description="Write a commented starter scenario for MODEL: every MV, DV and "
                                   "CV with units and ranges, a setpoint step, a disturbance "
                                   "step, an MPC and SIMC PID loops with settings scaled from the "
                                   "variables' ranges, and two criteria. MODEL is a built-in or "
                                   "registered name, package.module:function, file.py:function or "
                                   "a transfer-matrix file.toml (files relative to the current "
                                   "directory; the scenario refers to them relative to its own "
                                   "folder). Exit 0, or 2 on bad input.")
    n.add_argument("model", metavar="MODEL", help="the model reference")
    n.add_argument("--out", required=True, metavar="STUDY.toml", help="the scenario file to write")
    n.add_argument("--option", action="append", metavar="NAME=VALUE",
                   help="a model option (repeatable), e.g. --option outflow=valve")
    n.add_argument("--force", action="store_true", help="overwrite an existing file")
    n.set_defaults(handler=_cmd_new)
