"""The ``mpcproto`` command line.

Commands
--------
``mpcproto models [--json] [--scenario SCENARIO.toml]``
    List the built-in and registered models with their variables, roles and units, and what every
    option value adds or removes; with ``--scenario``, the model(s) that scenario names.
``mpcproto new MODEL --out STUDY.toml [--option NAME=VALUE]``
    Write a commented starter scenario for any model reference.
``mpcproto linearize SCENARIO.toml [--json] [--model plant|controller]``
    Operating point, continuous and discrete matrices, steady-state gains, poles, transmission
    zeros, RGA (square systems) and a per-pair view.
``mpcproto assess SCENARIO.toml [--json] [--locus NAME LOW HIGH [--plot FILE.png]]``
    Design checks of the controller's model: gain-matrix conditioning and directions, RGA at
    steady state and at frequency, Niederlinski index and margins of the PID loops, horizons and
    sample time; optionally the steady-state locus against one variable, with its folds.
``mpcproto check SCENARIO.toml...``
    Validate scenario files as deeply as possible without running them (models, operating point,
    names, signal specs, controllers, every study case).
``mpcproto run SCENARIO.toml --out DIR [--ci] [--case ID]``
    Run the scenario's nominal case (or one case of its study); write DIR/summary.json, DIR/trajectories_<controller>.csv and
    PNG plots.
``mpcproto batch PATHS... --out DIR ...``
    Run every case of one or more studies (see ``mpcproto batch --help``).
``mpcproto export SCENARIO.toml --out DIR`` / ``mpcproto export --check DIR``
    Write the hand-off bundle of a predictive controller and prove the round trip, or re-run the
    proof of an existing bundle; ``mpcproto linearize ... --plot FILE.png`` draws the
    step-response matrix (both from :mod:`mpcproto.export.cli`).

Exit codes: 0 success (every pass/fail criterion holds), 1 a criterion failed, 2 bad input (a
one-paragraph message naming the file, key, expected and found; no traceback -- ``--debug`` adds
the traceback of an exception a user's model function raised), 3 an unexpected
internal error (with its traceback, so it can be reported).

Every command is a thin wrapper over a documented function: :func:`mpcproto.models.available`,
:func:`mpcproto.scenario.linear_report`, :func:`mpcproto.scenario.run_scenario`.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import traceback
from typing import Any, Sequence

from .exceptions import MpcprotoError
from .analysis.criteria import CRITERIA, REGRESSION_ATOL, REGRESSION_RTOL

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_FAILED", "EXIT_BAD_INPUT", "EXIT_INTERNAL"]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3


# ----------------------------------------------------------------------------------------- models
def _models_data() -> list[dict[str, Any]]:
    from .models.library import available
    from .models.resolve import describe_reference

    out = []
    for entry in available():
        d = dict(entry)
        desc = describe_reference(entry["name"])
        d["variables"] = desc["variables"]
        d["delays"] = desc["delays"]
        d["option_variants"] = desc["option_variants"]
        out.append(d)
    return out + _registered_models_data()


def _registered_models_data() -> list[dict[str, Any]]:
    """Models registered by installed packages (entry-point group ``mpcproto.models``); one that
    cannot be built is listed with its error instead of stopping the listing."""
    from .models import resolve

    out = []
    for name, ep in sorted(resolve.registered().items()):
        try:
            desc = resolve.describe_reference(resolve.Reference("registered", name, text=name))
        except MpcprotoError as e:
            out.append({"name": name, "registered_by": ep.value, "error": str(e), "options": {},
                        "variables": [], "delays": [], "option_variants": [],
                        "description": "", "time_unit": ""})
            continue
        out.append({"name": name, "registered_by": ep.value, "description": desc["description"],
                    "time_unit": desc["time_unit"], "options": desc["options"],
                    "parameters": {v["name"]: v["nominal"] for v in desc["variables"]
                                   if v["role"] == "parameter"},
                    "variables": desc["variables"], "delays": desc["delays"],
                    "option_variants": desc["option_variants"]})
    return out


def _scenario_models_data(path: str) -> list[dict[str, Any]]:
    """The plant's model (and the controller's, when it has its own) a scenario names, with the
    options and parameters the scenario gives and what every other option value changes."""
    from .models.resolve import describe_reference
    from .scenario import load_scenario
    from .scenario.build import _wrap, scenario_folder

    scn = load_scenario(path)
    out = []
    for section in ("plant", "controller_model"):
        sec = scn.data[section]
        if sec.get("model") is None:
            continue
        try:
            d = describe_reference(sec["model"], options=sec["options"],
                                   parameters=sec["parameters"], base_dir=scenario_folder(scn),
                                   what=f"{section}.model")
        except MpcprotoError as e:
            raise _wrap(scn, getattr(e, "key", None) or f"{section}.model", e) from None
        d["section"] = section
        d["options"] = {k: dict(o, default=sec["options"].get(k, o["default"]))
                        for k, o in d["options"].items()}
        out.append(d)
    return out


def _cmd_models(args: argparse.Namespace) -> int:
    data = _scenario_models_data(args.scenario) if args.scenario else _models_data()
    if args.json:
        # standard JSON has no NaN/Infinity: a CV has no nominal value (null), an open bound is null
        print(json.dumps(_finite_or_null(data), indent=2, allow_nan=False))
        return EXIT_OK
    for d in data:
        where = (f"  [{d['section']}: {d['reference']}]" if "section" in d
                 else f"  [registered: {d['registered_by']}]" if "registered_by" in d else "")
        print(f"{d['name']}  ({d['time_unit']})  {d['description']}{where}")
        if d.get("error"):
            print(f"    cannot be built: {d['error']}")
            print()
            continue
        if d["options"]:
            for k, o in d["options"].items():
                allowed = ", ".join(repr(a) for a in o["allowed"]) or "any value"
                print(f"    option {k} = {o['default']!r}  (allowed: {allowed})  {o['description']}")
        rows = [("role", "name", "unit", "nominal", "low", "high", "description")]
        for v in d["variables"]:
            role = v["role"]
            if role == "dv":
                role = "dv (measured)" if v.get("measured", True) else "dv (unmeasured)"
            nom = "" if v["role"] == "cv" or v["nominal"] is None or \
                (isinstance(v["nominal"], float) and math.isnan(v["nominal"])) else f"{v['nominal']:.4g}"
            rows.append((role, v["name"], v["unit"], nom,
                         "" if v["low"] is None else f"{v['low']:.4g}",
                         "" if v["high"] is None else f"{v['high']:.4g}", v["description"]))
        for dl in d["delays"]:
            rows.append(("dead time", dl["source"], "", f"{dl['dead_time']:.4g}", "", "", ""))
        _print_table(rows, indent=4)
        _print_option_variants(d.get("option_variants", []))
        print()
    return EXIT_OK


def _print_option_variants(variants: list[dict[str, Any]]) -> None:
    """What each other option value adds or removes (a variable only one option has)."""
    for v in variants:
        added = ", ".join(f"{a['role']} {a['name']} [{a['unit'] or '-'}]" for a in v["added"])
        removed = ", ".join(v["removed"])
        parts = ([f"adds {added}"] if added else []) + ([f"removes {removed}"] if removed else [])
        print(f"    with option {v['option']} = {v['value']!r}: "
              f"{'; '.join(parts) or 'the same variables'}")


def _finite_or_null(obj: Any) -> Any:
    """A copy of *obj* (dicts, lists, numbers) with NaN and infinite floats replaced by None."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite_or_null(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_null(v) for v in obj]
    return obj


def _print_table(rows: Sequence[Sequence[str]], indent: int = 0) -> None:
    widths = [max(len(str(r[i])) for r in rows) for i in range(len(rows[0]))]
    for r in rows:
        cells = [str(c).ljust(w) if i in (0, 1, 2, len(r) - 1) else str(c).rjust(w)
                 for i, (c, w) in enumerate(zip(r, widths))]
        print(" " * indent + "  ".join(cells).rstrip())


# ----------------------------------------------------------------------------------------- linearize
def _fmt(v: Any) -> str:
    if v is None:
        return "inf"
    return f"{v:.4g}"


def _print_matrix(title: str, M: list, rows: Sequence[str], cols: Sequence[str],
                  none: str = "inf") -> None:
    print(f"{title}:")
    if not M or not cols or not rows:
        print("    (empty)")
        return
    table = [("",) + tuple(cols)] + [(r,) + tuple(none if v is None else _fmt(v) for v in row)
                                     for r, row in zip(rows, M)]
    widths = [max(len(str(t[i])) for t in table) for i in range(len(table[0]))]
    for t in table:
        print("    " + "  ".join(str(c).ljust(w) if i == 0 else str(c).rjust(w)
                                 for i, (c, w) in enumerate(zip(t, widths))))


def _cplx_str(pairs: list) -> str:
    if not pairs:
        return "(none)"
    out = []
    for re_, im in pairs:
        out.append(f"{re_:.4g}" if abs(im) < 1e-12 else f"{re_:.4g}{im:+.4g}j")
    return ", ".join(out)


def _cmd_linearize(args: argparse.Namespace) -> int:
    from .scenario import linear_report, load_scenario

    scn = load_scenario(args.scenario)
    rep = linear_report(scn, which=args.model)
    if args.json:
        print(json.dumps(rep, indent=2))
        return EXIT_OK
    n = rep["names"]
    op = rep["operating_point"]
    print(f"scenario {rep['scenario']} ({rep['file']}): model {rep['model']} [{rep['which']}], "
          f"time unit {rep['time_unit']}, sample time {rep['sample_time']:g}")
    print(f"operating point (residual {op['residual']:.2e}; open loop {rep['open_loop']}):")
    for role in ("states", "mvs", "dvs", "cvs"):
        vals = ", ".join(f"{k}={v:.6g}" for k, v in op[role].items())
        print(f"    {role:<7s}{vals or '(none)'}")
    c = rep["continuous"]
    _print_matrix("A (continuous)", c["A"], n["states"], n["states"])
    _print_matrix("B (MVs)", c["B"], n["states"], n["mvs"])
    _print_matrix("Bd (DVs)", c["Bd"], n["states"], n["dvs"])
    _print_matrix("C", c["C"], n["cvs"], n["states"])
    if any(any(r) for r in c["D"]):
        _print_matrix("D", c["D"], n["cvs"], n["mvs"])
    for dl in c["delays"]:
        print(f"dead time on {dl['source']}: {dl['dead_time']:g} {rep['time_unit']}")
    dsc = rep["discrete"]
    _print_matrix(f"A (discrete, Ts={dsc['Ts']:g})", dsc["A"], n["discrete_states"], n["discrete_states"])
    _print_matrix("B (discrete)", dsc["B"], n["discrete_states"], n["mvs"])
    _print_matrix("steady-state gain dCV/dMV (integ: the CV integrates, no steady-state gain)",
                  rep["gain"], n["cvs"], n["mvs"], none="integ")
    if n["dvs"]:
        _print_matrix("steady-state gain dCV/dDV", rep["dv_gain"], n["cvs"], n["dvs"], none="integ")
    print(f"poles: {_cplx_str(rep['poles'])}")
    print(f"transmission zeros: {_cplx_str(rep['zeros'])}")
    if rep["rga"] is not None:
        _print_matrix("relative gain array", rep["rga"], n["cvs"], n["mvs"])
    else:
        print(f"relative gain array: {rep['rga_note']}")
    tu = rep["time_unit"]
    print(f"pairs (CV <- MV): steady-state gain, time constants [{tu}], dead time [{tu}]")
    for p in rep["pairs"]:
        if not p["connected"]:
            continue
        taus = ", ".join(f"{t:.4g}" for t in p["time_constants"]) or "-"
        integ = bool(p.get("integrating"))       # classified by the linear layer
        gain = "integ" if p["gain"] is None else _fmt(p["gain"])
        tail = ""
        if integ:
            rate = p.get("ramp_rate")
            tail = ("   integrating" + (f" (ramp rate {rate:.4g} per unit MV per {tu})"
                                         if isinstance(rate, (int, float)) else ""))
        print(f"    {p['cv']:<16s} <- {p['mv']:<16s} gain {gain:>10s}   "
              f"tau [{taus}]   dead time {p['dead_time']:g}" + tail)
    return EXIT_OK


# ---------------------------------------------------------------------------------------- assess
def _cmd_assess(args: argparse.Namespace) -> int:
    from .scenario import load_scenario
    from .scenario.assess import design_report, print_design_report, scenario_locus

    scn = load_scenario(args.scenario)
    rep = design_report(scn)
    if args.locus:
        name, low, high = args.locus
        rep["locus"] = scenario_locus(scn, name, low, high, plot=args.plot)
    if args.json:
        print(json.dumps(_finite_or_null(rep), indent=2))
        return EXIT_OK
    print_design_report(rep)
    loc = rep.get("locus")
    if loc is not None:
        print(f"\nsteady states against {loc['variable']} [{loc['unit']}]: {len(loc['values'])} "
              f"points, {sum(loc['stable'])} stable")
        for f in loc["folds"]:
            states = ", ".join(f"{k}={v:.6g}" for k, v in f["states"].items())
            print(f"  fold at {loc['variable']} = {f['value']:.6g} ({states})")
        if not loc["folds"]:
            print("  no fold in the range: one steady state for every value")
        if args.plot:
            print(f"plot: {args.plot}")
    return EXIT_OK


# ----------------------------------------------------------------------------------------- check
def _cmd_check(args: argparse.Namespace) -> int:
    from .scenario import check_scenario, count_cases, load_scenario

    import warnings

    for path in args.scenarios:
        scn = load_scenario(path)
        # several files in one call: say which file each warning belongs to
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            check_scenario(scn, build_controllers=not args.no_controllers)
        shown: set[str] = set()
        for w in caught:
            text = str(w.message)
            if text not in shown:
                shown.add(text)
                print(f"mpcproto check: warning: {path}: {text}", file=sys.stderr)
        n, nf = count_cases(scn), count_cases(scn, full=True)
        print(f"ok: {path}: scenario {scn.name}, model {_model_label(scn.data['plant']['model'])}, "
              f"{len(scn.data['controllers'])} controller(s), {len(scn.data['criteria'])} "
              f"criteria, {n} case(s) ({nf} with --full)")
    return EXIT_OK


def _model_label(ref: Any) -> str:
    from .models.resolve import parse_reference

    return parse_reference(ref).label if isinstance(ref, dict) else str(ref)


# ----------------------------------------------------------------------------------------- run
def _check_out_dir(out: str) -> None:
    """Refuse an --out that cannot become a results directory, before anything runs."""
    from pathlib import Path

    from .exceptions import SettingsError

    p = Path(out)
    if p.exists() and not p.is_dir():
        raise SettingsError(f"--out {out}: expected a directory for the results (created if "
                            f"missing); found a file of that name. Give another path.")
    parent = next((q for q in [p, *p.parents] if q.exists()), None)
    if parent is not None and not parent.is_dir():
        raise SettingsError(f"--out {out}: expected a directory for the results; found that "
                            f"'{parent}' is a file, so no directory can be made below it.")


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
    from .compare import tuning_text
    from .scenario import load_scenario, run_scenario

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
    from .scenario import count_cases

    n = count_cases(scn, full=True)
    if n > 1 and args.case is None:
        print(f"(the nominal case only; the study has {count_cases(scn)} case(s), {n} with --full: "
              f"run them with mpcproto batch)")
    print(summary["caution"])
    return EXIT_OK if summary["passed"] else EXIT_FAILED


# ----------------------------------------------------------------------------------------- new
def _option_value(text: str) -> Any:
    """A --option value: a TOML value (number, true/false, "string", [array]) or a bare string."""
    from .scenario.schema import tomllib

    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def _cmd_new(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .exceptions import SettingsError
    from .scenario import check_scenario
    from .scenario.starter import starter_scenario

    out = Path(args.out)
    if out.exists() and not args.force:
        raise SettingsError(f"--out {out}: expected a new file; found one already there. Give "
                            f"another name or --force to overwrite it.")
    if out.suffix != ".toml":
        raise SettingsError(f"--out {out}: expected a scenario file name ending in .toml; found "
                            f"{out.suffix or 'no suffix'}.")
    options = {}
    for item in args.option or []:
        k, sep, v = item.partition("=")
        if not sep or not k.strip().isidentifier():
            raise SettingsError(f"--option {item}: expected NAME=VALUE (e.g. outflow=valve); "
                                f"found {item!r}.")
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


# ----------------------------------------------------------------------------------------- parser
def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``mpcproto`` command (one sub-command per step of a study)."""
    p = argparse.ArgumentParser(
        prog="mpcproto",
        description="Prototype model-predictive controllers for process units and run closed-loop "
                    "studies. Simulation only: a real plant needs its own independent safety "
                    "systems, management of change, local codes and licensed engineers.")
    from ._version import __version__

    p.add_argument("--version", action="version", version=f"mpcproto {__version__}")
    p.add_argument("--debug", action="store_true",
                   help="on an error raised by a user's model function, also print its traceback "
                        "(accepted anywhere on the command line)")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    m = sub.add_parser("models", help="list the built-in models with their variables, roles and units",
                       description="List the built-in models: their options, and every parameter, "
                                   "state, MV, DV (measured or not) and CV with its unit, nominal "
                                   "value and physical bounds, and the dead times. Scenario files "
                                   "name models and variables as listed here.")
    m.add_argument("--json", action="store_true", help="print JSON instead of tables")
    m.add_argument("--scenario", metavar="SCENARIO.toml", default=None,
                   help="show the model(s) this scenario names (plant, and the controller's model "
                        "when it has its own), with what every option value changes")
    m.set_defaults(handler=_cmd_models)
    _add_new_parser(sub)

    lz = sub.add_parser("linearize", help="operating point and linear model of a scenario",
                        description="Find the scenario's operating point and print the linear "
                                    "model there: continuous matrices A, B, Bd, C (deviation "
                                    "variables), the discrete ones at the sample time (dead times "
                                    "as delay states), steady-state gains, poles, transmission "
                                    "zeros, the RGA (square systems) and each CV <- MV pair. "
                                    "Exit 0, or 2 on bad input.")
    lz.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    lz.add_argument("--json", action="store_true", help="print JSON instead of tables")
    lz.add_argument("--model", choices=("plant", "controller"), default="plant",
                    help="linearize the plant (default) or the controller's model")
    lz.set_defaults(handler=_cmd_linearize)

    ax = sub.add_parser("assess", help="design checks of a scenario's controller model",
                        description="Check the controller's model of a scenario before trusting a "
                                    "design: singular values and condition number of the gain "
                                    "matrix (scaled by the variables' ranges), weak CV and MV "
                                    "directions, collinear MVs, det G(0), RGA at steady state "
                                    "and at frequency, the Niederlinski index and the gain/phase "
                                    "margins and peak sensitivity of the scenario's PID loops, and "
                                    "suggested horizons and a sample-time check. With --locus, the "
                                    "steady states against one MV, DV or parameter with their "
                                    "folds and stability. Exit 0, or 2 on bad input.")
    ax.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    ax.add_argument("--json", action="store_true", help="print JSON instead of tables")
    ax.add_argument("--locus", nargs=3, metavar=("NAME", "LOW", "HIGH"),
                    help="follow the plant's steady states while NAME (an MV, DV or parameter) "
                         "moves from LOW to HIGH")
    ax.add_argument("--plot", metavar="FILE.png", help="with --locus: draw the locus to this PNG")
    ax.set_defaults(handler=_cmd_assess)

    ck = sub.add_parser("check", help="validate scenario files without running them",
                        description="Validate scenario files as deeply as possible without "
                                    "simulating: every key, the models and the operating point, "
                                    "every name against the model, signals, instruments, faults, "
                                    "the controllers and every case of the study. Exit 0 when all "
                                    "are valid; 2 at the first invalid file, with one paragraph "
                                    "naming the file, the key, what was expected and what was "
                                    "found.")
    ck.add_argument("scenarios", nargs="+", metavar="SCENARIO.toml", help="scenario files")
    ck.add_argument("--no-controllers", action="store_true",
                    help="do not build the controllers (faster; their settings are not checked)")
    ck.set_defaults(handler=_cmd_check)

    from .export.cli import register_cli as _register_export

    _register_export(sub)       # `export`, and `--plot` on `linearize`

    r = sub.add_parser("run", help="run a scenario's nominal case and check its criteria",
                       description="Simulate the scenario's nominal case (sweeps and Monte Carlo "
                                   "draws are for mpcproto batch) under every controller it "
                                   "declares, with the same disturbances and noise, and check its "
                                   "pass/fail criteria. Writes DIR/summary.json, "
                                   "DIR/trajectories_<controller>.csv and PNG plots. Exit 0: every "
                                   "criterion holds; 1: one failed; 2: bad input. Simulation only: "
                                   "a real plant needs its own independent safety systems, "
                                   "management of change, local codes and licensed engineers.")
    r.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    r.add_argument("--out", required=True, metavar="DIR", help="output directory (created)")
    r.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    r.add_argument("--ci", action="store_true",
                   help="use the scenario's CI-sized settings ([scenario.ci] duration)")
    r.add_argument("--case", default=None, metavar="ID",
                   help="run one case of the scenario's study (an id from mpcproto batch) instead "
                        "of the nominal case")
    r.set_defaults(handler=_cmd_run)

    _add_batch_command(sub)
    return p


# ------------------------------------------------------------------------------------------ batch
#: Exit code of ``mpcproto batch`` stopped by Ctrl-C (128 + SIGINT) and by SIGTERM (128 + SIGTERM),
#: the shell's convention for a process ended by that signal.
EXIT_INTERRUPTED = 130
EXIT_TERMINATED = 143


def _add_batch_command(sub) -> None:
    """Add the ``batch`` sub-command (:func:`mpcproto.scenario.batch.run_batch` and the reports)."""
    b = sub.add_parser(
        "batch", help="run every case of one or more studies in parallel, with CI verdicts",
        description="Run every case (sweeps x Monte Carlo draws) of the given scenario files on a "
                    "local process pool or a Dask cluster. One JSON line per finished case is "
                    "appended to DIR/results.jsonl; DIR/summary.csv and DIR/report.html are written "
                    "at the end. Exit code 0: every case passed; 1: a criterion failed, a case did "
                    "not complete or a KPI got worse than the baseline; 2: bad input or DIR in use "
                    "by another batch; 130: Ctrl-C; 143: SIGTERM (finished cases are kept; "
                    "--resume runs the rest). Simulation only: a real plant needs its own "
                    "independent safety systems, management of change, local codes and licensed "
                    "engineers.")
    b.add_argument("paths", nargs="+", metavar="PATH",
                   help="scenario files (.toml) or directories of them")
    b.add_argument("--out", required=True, metavar="DIR",
                   help="output directory (created; locked while the batch runs)")
    where = b.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="worker processes of the local pool (default: the available CPUs)")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run on a running Dask scheduler, e.g. tcp://host:8786 (needs the "
                            "optional extra: pip install \"mpcproto[dask]\")")
    b.add_argument("--resume", action="store_true",
                   help="keep the complete records of DIR/results.jsonl and run only the other "
                        "cases (missing, incomplete or changed since they ran)")
    b.add_argument("--full", action="store_true",
                   help="use the studies' full Monte Carlo sizes and sweep values (default: the "
                        "CI-sized study)")
    b.add_argument("--junit", default=None, metavar="FILE",
                   help="also write JUnit XML: one test case per case and criterion")
    b.add_argument("--baseline", default=None, metavar="RESULTS.jsonl",
                   help="compare with an earlier run's results.jsonl; KPIs worse beyond the "
                        "tolerance fail the batch")
    b.add_argument("--tolerance", type=float, default=REGRESSION_RTOL, metavar="REL",
                   help=f"relative tolerance of the baseline comparison (default "
                        f"{REGRESSION_RTOL:g} = {100 * REGRESSION_RTOL:g} %%)")
    b.add_argument("--abs-tolerance", type=float, default=REGRESSION_ATOL, metavar="ABS",
                   help=f"absolute tolerance of the baseline comparison, in each KPI's unit "
                        f"(default {REGRESSION_ATOL:g})")
    b.add_argument("--no-trajectories", action="store_true",
                   help="do not re-run the worst cases for the report's trajectory plots (by "
                        "default the worst case of each scenario with a failed case, at most 3, "
                        "or the case closest to a limit when all passed)")
    b.add_argument("--progress-interval", type=float, default=30.0, metavar="SECONDS",
                   help="when stderr is not a terminal (a CI log), print a plain progress line "
                        "this often (default 30 s) and at the end")
    b.set_defaults(handler=_cmd_batch)


def _scenario_files(paths) -> list:
    from pathlib import Path

    from .exceptions import ScenarioError

    files: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            found = sorted(p.glob("*.toml"))
            if not found:
                raise ScenarioError("expected a scenario file (.toml) or a directory holding some; "
                                    "found a directory with no .toml file.", file=str(p))
            files.extend(found)
        elif p.is_file():
            files.append(p)
        else:
            raise ScenarioError("expected a scenario file (.toml) or a directory of them; found no "
                                "such file or directory.", file=str(p))
    unique: list[Path] = []
    for f in files:
        if f.resolve() not in {u.resolve() for u in unique}:
            unique.append(f)
    return unique


def _load_cases(files: list, full: bool) -> tuple[list[Any], dict[str, Any]]:
    from .exceptions import ScenarioError
    from .scenario import check_scenario, expand, load_scenario

    cases: list[Any] = []
    owner: dict[str, str] = {}
    scenarios: dict[str, Any] = {}
    for f in files:
        scn = load_scenario(f)
        check_scenario(scn, build_controllers=True)
        for c in expand(scn, full=full):
            if c.case_id in owner:
                raise ScenarioError(
                    f"case id {c.case_id!r} also comes from {owner[c.case_id]}; case ids must be "
                    "unique across a batch: give the scenarios distinct names "
                    "([scenario] name = ...).", file=str(f), key="scenario.name")
            owner[c.case_id] = str(f)
            cases.append(c)
        scenarios[scn.name] = scn
    return cases, scenarios


def _worst_case_images(records: list[dict[str, Any]], cases: list[Any], limit: int = 3
                       ) -> list[tuple[str, bytes]]:
    """Re-run (same seed, same numbers) and plot the worst case of each scenario with a failed case
    (at most *limit*), or the case closest to a limit when every case passed."""
    import tempfile
    import warnings
    from pathlib import Path

    from .report.html import sort_worst_first
    from .store import case_id_of, case_verdict

    try:
        from .report import plots
        from .scenario.runner import _run  # the runner's (record, trajectories) form
    except ImportError:
        return []
    by_id = {case_id_of(c): c for c in cases}
    picked: dict[str, dict[str, Any]] = {}
    ranked = [r for r in sort_worst_first(records)
              if case_verdict(r) != "error" and r.get("case_id") in by_id]
    for rec in ranked:   # the worst case of every scenario with a failed case ...
        scen = str(rec.get("scenario", ""))
        if case_verdict(rec) == "failed" and scen not in picked:
            picked[scen] = rec
    if not picked and ranked:   # ... or, when all passed, the one closest to a limit
        picked[str(ranked[0].get("scenario", ""))] = ranked[0]
    images: list[tuple[str, bytes]] = []
    with tempfile.TemporaryDirectory() as tmp:
        for scen, rec in list(picked.items())[:limit]:
            cid = rec["case_id"]
            try:
                _, trajs = _run(by_id[cid])
                if not trajs:
                    continue
                stem = Path(tmp) / f"{len(images)}"
                plots.plot_cvs(dict(trajs), f"{stem}_cvs.png", title=f"{scen}: {cid}")
                plots.plot_mvs(dict(trajs), f"{stem}_mvs.png", title=f"{scen}: {cid}")
                what = (f"{scen}: the case closest to (or beyond) a limit, {cid} "
                        f"({case_verdict(rec)})")
                images.append((what + ": CVs", Path(f"{stem}_cvs.png").read_bytes()))
                images.append((what + ": MVs", Path(f"{stem}_mvs.png").read_bytes()))
            except Exception as exc:  # noqa: BLE001 - a figure must not sink the report
                warnings.warn(f"no trajectory plot for case {cid}: {type(exc).__name__}: {exc}",
                              RuntimeWarning, stacklevel=2)
    return images


def _cmd_batch(args) -> int:
    """Handler of ``mpcproto batch`` (exit codes: 0 pass, 1 fail/error/regression, 2 bad input or
    folder in use, 130 Ctrl-C, 143 SIGTERM)."""
    import warnings
    from pathlib import Path

    from .exceptions import ScenarioError, SettingsError
    from .store import ID_KEY, RESULTS_FILE, is_complete, load_results, lock_output, missing_fields

    if args.workers is not None and args.workers < 1:
        raise SettingsError(f"The '--workers' option must be an int in the range [1, inf). "
                            f"Got {args.workers} instead.")
    for opt in ("tolerance", "abs_tolerance"):
        v = getattr(args, opt)
        if not (math.isfinite(v) and v >= 0):
            raise SettingsError(f"The '--{opt.replace('_', '-')}' option must be a finite number "
                                f">= 0. Got {v} instead.")
    if not (math.isfinite(args.progress_interval) and args.progress_interval > 0):
        raise SettingsError(f"The '--progress-interval' option must be a finite number of seconds "
                            f"> 0. Got {args.progress_interval} instead.")
    if args.baseline is not None and not Path(args.baseline).is_file():
        raise ScenarioError("expected the results.jsonl of an earlier batch (--baseline); found no "
                            "such file.", file=args.baseline)
    if args.baseline is not None:
        # a wrong file given as the baseline would otherwise compare nothing and pass
        with warnings.catch_warnings(record=True) as skipped:
            warnings.simplefilter("always")
            n_base = sum(1 for r in load_results(args.baseline) if not missing_fields(r))
        if n_base == 0:
            raise ScenarioError(
                "expected the results.jsonl of an earlier batch (--baseline): one JSON record with "
                f"a '{ID_KEY}', a 'status' and a 'passed' verdict per line; found no such record "
                f"({len(skipped)} line(s) skipped).", file=args.baseline)
    files = _scenario_files(args.paths)
    out_dir = Path(args.out)
    with lock_output(out_dir):   # refused at once when another batch writes there
        cases, _ = _load_cases(files, args.full)
        try:
            return _batch_locked(args, cases, files, out_dir)
        except KeyboardInterrupt as stop:
            results = out_dir / RESULTS_FILE
            done = sum(1 for r in load_results(results) if is_complete(r)) \
                if results.exists() else 0
            how = "stopped by SIGTERM" if getattr(stop, "signum", None) else "interrupted"
            print(f"\nmpcproto batch: {how}; {done} finished case(s) are kept in {results}. Run "
                  f"the same command with --resume to finish the rest.", file=sys.stderr)
            return EXIT_TERMINATED if getattr(stop, "signum", None) else EXIT_INTERRUPTED


def _batch_locked(args, cases: list[Any], files: list, out_dir) -> int:
    """Run the cases and write the reports; the output folder is held by the caller."""
    from .report.baseline import compare_with_baseline
    from .report.html import SAFETY_CAUTION, write_html_report
    from .report.junit import write_junit
    from .report.summary import criteria_of, write_summary_csv
    from .scenario.batch import run_batch
    from .scenario.executors import dask_executor, default_workers
    from .store import case_id_of, load_results

    ids = [case_id_of(c) for c in cases]
    print(f"mpcproto batch: {len(cases)} cases from {len(files)} scenario file(s) -> {out_dir}",
          file=sys.stderr)
    if args.scheduler:
        try:
            dask_cm = dask_executor(args.scheduler)
            ex = dask_cm.__enter__()
        except ImportError as exc:
            print(f"mpcproto batch: error: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        try:
            outcome = run_batch(cases, out_dir, executor=ex, resume=args.resume,
                                progress_interval=args.progress_interval)
        finally:
            dask_cm.__exit__(None, None, None)
        where = f"Dask scheduler {args.scheduler}"
    else:
        outcome = run_batch(cases, out_dir, workers=args.workers, resume=args.resume,
                            progress_interval=args.progress_interval)
        where = f"{args.workers or default_workers()} local worker process(es)"

    order = {cid: i for i, cid in enumerate(ids)}
    records = sorted(load_results(outcome.results_path, ids), key=lambda r: order[r["case_id"]])
    write_summary_csv(records, out_dir / "summary.csv")   # rows in case order, stable for diffs
    comparison = None
    if args.baseline:
        comparison = compare_with_baseline(records, args.baseline, rtol=args.tolerance,
                                           atol=args.abs_tolerance)
        comparison.baseline_file = str(args.baseline)
        if comparison.cases_compared == 0:
            print(f"mpcproto batch: warning: the baseline {args.baseline} has none of these cases' "
                  f"ids; nothing was compared with it.", file=sys.stderr)
    if args.junit:
        write_junit(records, args.junit, baseline=comparison)
    images = [] if args.no_trajectories else _worst_case_images(records, cases)
    info = {"run on": where, "wall time": f"{outcome.wall_s:.1f} s"}
    if outcome.skipped:
        info["resumed"] = f"{outcome.skipped} case(s) kept from an earlier run"
    title = "Closed-loop study: " + ", ".join(sorted({str(r.get("scenario")) for r in records}))
    write_html_report(records, out_dir / "report.html", title=title, run_info=info,
                      baseline=comparison, images=images)

    n_reg = len(comparison.regressions) if comparison else 0
    print(f"{outcome.passed} passed, {outcome.failed} failed a criterion, {outcome.errors} did not "
          f"complete" + (f", {n_reg} KPI(s) worse than the baseline" if comparison else "")
          + f" ({outcome.total} cases, {outcome.ran} run now, {outcome.wall_s:.1f} s)")
    if outcome.changed:
        print(f"  {len(outcome.changed)} case(s) had changed since their results were recorded and "
              f"ran again (e.g. {outcome.changed[0]})")
    if outcome.incomplete:
        print(f"  {len(outcome.incomplete)} case(s) had an incomplete record (no status, verdict "
              f"or fingerprint) and ran again (e.g. {outcome.incomplete[0]})")
    for cid in outcome.error_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        print(f"  error  {cid}: {rec.get('message', '')}")
    for cid in outcome.failed_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        failed = [f"{label + ': ' if label else ''}{cr.get('name')}" for label, cr in criteria_of(rec)
                  if cr.get("passed") is not True]
        print(f"  FAIL   {cid}" + (f": {', '.join(failed[:4])}" + (", ..." if len(failed) > 4 else "")
                                   if failed else ""))
    if comparison:
        for r in comparison.regressions[:10]:
            print(f"  WORSE  {r.describe()}")
    print(f"results: {outcome.results_path}  summary: {out_dir / 'summary.csv'}  "
          f"report: {out_dir / 'report.html'}" + (f"  junit: {args.junit}" if args.junit else ""))
    print(SAFETY_CAUTION)
    return EXIT_OK if (outcome.success and n_reg == 0) else EXIT_FAILED


def _plain_warnings(prefix: str):
    """Show each distinct warning once as ``<prefix>: warning: <message>`` (no source lines).

    A user of the command line wants the message (a dead time rounded to whole samples, a draw
    clipped to its bounds), not the line of mpcproto that raised it.  Only the *format* is
    replaced, so a caller that records warnings (``warnings.catch_warnings(record=True)``,
    ``pytest.warns``) still receives them; :func:`main` restores the previous format on return.
    Forked batch workers inherit this, so their warnings read the same.  Returns the previous
    ``warnings.formatwarning``.
    """
    import warnings

    seen: set[str] = set()
    previous = warnings.formatwarning

    def fmt(message, category, filename, lineno, line=None):  # noqa: ARG001
        text = str(message)
        if text in seen:
            return ""
        seen.add(text)
        return f"{prefix}: warning: {text}\n"

    warnings.formatwarning = fmt
    return previous


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``mpcproto`` command; returns the exit code.

    ``--debug`` anywhere on the line also prints the traceback of an exception a user's model
    function raised (otherwise only its last line is in the error message).
    """
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    args = parser.parse_args([a for a in argv if a != "--debug"])
    args.debug = debug
    import warnings

    previous_format = _plain_warnings(f"mpcproto {args.command}")
    try:
        return _run_handler(args)
    finally:
        warnings.formatwarning = previous_format


def _run_handler(args: argparse.Namespace) -> int:
    try:
        return int(args.handler(args))
    except MpcprotoError as e:
        if getattr(args, "debug", False) and getattr(e, "detail", ""):
            print(e.detail.rstrip(), file=sys.stderr)
        print(f"mpcproto {args.command}: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:
        # the reader went away (`mpcproto linearize x.toml | head`): stop quietly, as a shell
        # tool killed by SIGPIPE would (128 + 13)
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except OSError as e:
        where = f" '{e.filename}'" if getattr(e, "filename", None) else ""
        print(f"mpcproto {args.command}: error: cannot use the file{where}: {e.strerror or e}.",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"mpcproto {args.command}: interrupted.", file=sys.stderr)
        return 130
    except MemoryError as e:
        # almost always a size in the input: a prediction horizon, a duration / sample time or a
        # table far larger than meant
        print(f"mpcproto {args.command}: error: out of memory ({e}). Check the sizes in the "
              f"input: the MPC horizon and control_horizon (samples), duration / sample_time, "
              f"the number of study cases.", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception:  # noqa: BLE001 - an internal error: show the traceback so it can be reported
        traceback.print_exc()
        print(f"mpcproto {args.command}: internal error (exit {EXIT_INTERNAL}); please report it "
              f"with the traceback above.", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
