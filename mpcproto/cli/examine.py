"""The commands that look at models and scenarios without simulating them: ``mpcproto models``,
``linearize``, ``assess`` and ``check``."""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any, Sequence

from ..exceptions import MpcprotoError
from ._common import EXIT_OK, _finite_or_null, _fmt, _print_table


# ----------------------------------------------------------------------------------------- models
def _models_data() -> list[dict[str, Any]]:
    from ..models.library import available
    from ..models.resolve import describe_reference

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
    from ..models import resolve

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
    from ..models.resolve import describe_reference
    from ..scenario import load_scenario
    from ..scenario.build import _wrap, scenario_folder

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


# ----------------------------------------------------------------------------------------- linearize


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
    from ..scenario import linear_report, load_scenario

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
    from ..scenario import load_scenario
    from ..scenario.assess import design_report, print_design_report, scenario_locus

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
    from ..scenario import check_scenario, count_cases, load_scenario

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
    from ..models.resolve import parse_reference

    return parse_reference(ref).label if isinstance(ref, dict) else str(ref)
