"""The design sheet: one self-contained HTML page a vendor's engineer reads the design from.

Written from the content of ``bundle.json`` only (plus the step-response matrix PNG, inlined as
base64), so the page and the machine-readable bundle cannot disagree.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..report.html import _CSS, SAFETY_CAUTION, _e, png_data_uri

__all__ = ["write_design_sheet"]

_SHEET_CSS = _CSS + """
main { max-width: 1240px; }
.lead { font-size: 14px; max-width: 60em; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 3px 16px; margin: 6px 0; }
dl.facts dt { color: var(--muted); } dl.facts dd { margin: 0; }
td.unit { color: var(--muted); white-space: nowrap; }
th, th.num { white-space: normal; vertical-align: bottom; }
th.grp { background: #e3e9ee; }
.none { color: #8a96a3; }
nav { font-size: 13px; margin: 4px 0 0; } nav a { color: #c4d0da; margin-right: 12px; }
code { font-family: ui-monospace, SFMono-Regular, Menlo, Consolas, monospace; font-size: 12px;
       background: var(--band); padding: 0 3px; border-radius: 3px; }
"""


def _n(v: Any, digits: int = 4, none: str = "none") -> str:
    """A number for a table; None (no limit) as *none*."""
    if v is None:
        return f'<span class="none">{_e(none)}</span>'
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, float)):
        if isinstance(v, float) and math.isinf(v):
            return f'<span class="none">{_e(none)}</span>'
        return f"{v:.{digits}g}"
    return _e(v)


def _pct(v: Any) -> str:
    """A fit error in percent; below 0.01 % the fit is exact for every practical purpose."""
    if not isinstance(v, (int, float)):
        return _n(v)
    return "&lt; 0.01 %" if v < 0.01 else f"{v:.2g} %"


def _table(head: Sequence[str], rows: Sequence[Sequence[str]], num_from: int = 1,
           num_to: int | None = None) -> str:
    """A table; columns num_from..num_to-1 hold numbers (right-aligned, not wrapped)."""
    num_to = len(head) if num_to is None else num_to
    num = lambda i: num_from <= i < num_to  # noqa: E731
    h = "".join(f'<th class="{"num" if num(i) else ""}">{x}</th>' for i, x in enumerate(head))
    body = "".join("<tr>" + "".join(
        f'<td class="{"num" if num(i) else ("id" if i == 0 else "")}">{c}</td>'
        for i, c in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><thead><tr>{h}</tr></thead><tbody>{body}</tbody></table>"


def _units(doc: Mapping[str, Any]) -> dict[str, str]:
    return {v["name"]: v["unit"] for role in ("mvs", "dvs", "cvs", "states")
            for v in doc["variables"][role]}


def _range(low: Any, high: Any, none: str = "none") -> str:
    """"low … high" with an open side shown as such; both open: *none*."""
    if low is None and high is None:
        return f'<span class="none">{_e(none)}</span>'
    lo = "&minus;&infin;" if low is None else _n(low)
    hi = "+&infin;" if high is None else _n(high)
    return f"{lo} &hellip; {hi}"


def _limits(doc: Mapping[str, Any]) -> str:
    s, tu = doc["settings"], doc["time_unit"]
    ts = doc["sample_time"]
    eff = doc.get("effective_weights", {})
    op_lim = doc.get("operating_limits", {"mvs": {}, "cvs": {}})
    rows = []
    for v in doc["variables"]["mvs"]:
        m = s["mv"][v["name"]]
        ol = op_lim["mvs"].get(v["name"], {})
        pref = m["preferred_value"]
        rate = ol.get("rate")
        rows.append([_e(v["name"]), f'<span class="unit">{_e(v["unit"])}</span>', _n(v["value"]),
                     _range(v["physical_low"], v["physical_high"], none="open"),
                     _range(ol.get("low"), ol.get("high"), none="physical range"),
                     _n(rate) + ("" if rate is None else f" /{_e(tu)} <span class='small'>(= "
                                                         f"{rate * ts:.3g} per sample)</span>"),
                     _range(m["low"], m["high"]), _n(m["max_move"]),
                     _n(m["scale"]), _n(m["move_weight"]),
                     _n(pref, none="operating point") if m["preferred_weight"] else
                     '<span class="none">not used</span>'])
    mv = _table(["MV", "unit", "operating value", "physical range", "operating limits (study)",
                 "rate limit (study)", "controller hard limits", "controller max move per sample",
                 "scale", "move weight", "preferred value"], rows, 2)
    rows = []
    for v in doc["variables"]["cvs"]:
        c = s["cv"][v["name"]]
        ol = op_lim["cvs"].get(v["name"], {})
        rows.append([_e(v["name"]), f'<span class="unit">{_e(v["unit"])}</span>',
                     _n(v["value"]), _range(ol.get("low"), ol.get("high")),
                     _range(c["low"], c["high"]), str(c["priority"]), _n(c["weight"]),
                     _n(c["scale"]), _n(eff.get("cv_weight", {}).get(v["name"])),
                     f'{_n(c["limit_penalty"])} / {_n(c["limit_penalty_quadratic"])}'])
    cv = _table(["CV", "unit", "operating value", "limits, zone (study)", "controller soft limits",
                 "priority", "weight", "scale", "weight used in the QP",
                 "limit penalty linear / quadratic"], rows, 2)
    rows = [[_e(v["name"]), f'<span class="unit">{_e(v["unit"])}</span>', _n(v["value"]),
             "measured" if v.get("measured", True) else "not measured",
             "yes" if s["dv"][v["name"]]["feedforward"] and v.get("measured", True) else "no"]
            for v in doc["variables"]["dvs"]]
    dv = _table(["DV", "unit", "operating value", "measurement", "feedforward"], rows, 2, 3) \
        if rows else "<p class='small'>No disturbance variables.</p>"
    return (f"<h3>Manipulated variables (MVs)</h3>{mv}"
            "<p class='small'>Operating limits are what the operator gave the controller at every "
            "sample of the study (the scenario's limits; none given: the physical range). The "
            "controller's own hard limits and largest move per sample are intersected with them; "
            "the moves never exceed any of them. Scale: the size of a typical move, which makes "
            "the MVs comparable (weights are per squared scale). <i>none</i> = no limit set.</p>"
            f"<h3>Controlled variables (CVs)</h3>{cv}"
            "<p class='small'>CV limits are soft: the controller keeps the CV inside them unless "
            "nothing else is feasible, at the cost of the limit penalties (per scale). Priority 1 "
            "is the most important; each class above the least important multiplies its weights "
            f"by {_n(s['priority_ratio'])}. Weight used in the QP = weight / scale&sup2; &times; "
            "the priority factor.</p>"
            f"<h3>Disturbance variables (DVs)</h3>{dv}")


def _tuning(doc: Mapping[str, Any]) -> str:
    s, h, est = doc["settings"], doc["horizons"], doc["estimator"]
    tu, ts = doc["time_unit"], doc["sample_time"]
    facts = [
        ("sample time", f"{ts:g} {_e(tu)}"),
        ("prediction horizon", f"{h['prediction']} samples ({h['prediction'] * ts:g} {_e(tu)})"),
        ("moves planned (control horizon)", f"{h['moves']} samples"),
        ("move blocking", _e(h["move_blocking"])),
        ("steady-state target", "solved every sample (where MVs and CVs settle), tracked by the "
                                "dynamic problem" if s["steady_target"] else "off"),
        ("terminal cost", "discrete Riccati weight on the last predicted state" if s["terminal_cost"]
         else "none"),
        ("setpoint preview", "the setpoints known in advance over the prediction horizon are its "
                             "per-sample references" if s.get("setpoint_preview") else "off"),
        ("QP solver", f"{_e(s['solver'])}" + (f", options {_e(s['solver_options'])}"
                                              if s.get("solver_options") else ", default options")
         + f"; backup solver {_e(s['backup_solver'] or 'none')}"),
        ("when a solve fails", "apply the previous plan shifted one sample" if s["fallback"] == "shift"
         else "hold the MVs"),
        ("estimator", _e(est["kind"])),
        ("state noise", _n(est["state_noise"])),
        ("estimator history", f"{est['history_samples']} samples (late analyzer values)"),
    ]
    rows = [[_e(c), _e(est["disturbance_models"][c]), _n(est["measurement_noise"][c]),
             _n(est["disturbance_noise"][c])] for c in doc["names"]["cvs"]]
    return ("<dl class='facts'>" + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in facts) + "</dl>"
            "<h3>Disturbance model per CV (offset-free estimation)</h3>"
            + _table(["CV", "disturbance model", "measurement noise (variance)",
                      "disturbance noise (variance per sample)"], rows, 2)
            + "<p class='small'><i>output</i>: a step disturbance added to the CV; <i>input</i>: a "
              "disturbance entering with the MVs (needed for integrating CVs such as levels).</p>")


def _fits(doc: Mapping[str, Any]) -> str:
    units = _units(doc)
    tu = doc["time_unit"]
    rows = []
    for f in doc["model"]["fits"]:
        rec = f.get("recommended")
        per = f"/{tu}" if rec == "integrating" else ""
        unit = f"{units.get(f['cv'], '')}{per} per {units.get(f['input'], '')}".strip()
        if not rec:
            kind = {"none": "no effect"}.get(f.get("kind"), f.get("kind"))
            rows.append([_e(f"{f['cv']} ← {f['input']}"), _e(f["input_role"].upper()),
                         f'<span class="none">{_e(kind)}</span>', "", "", "", "",
                         "" if f.get("kind") == "none" else
                         f'<span class="small">{_e(f.get("note", ""))}</span>'])
            continue
        p = f["fits"][rec]
        g = _n(p["gain"])
        other = [k for k in f["fits"] if k != rec and "error" not in f["fits"][k]]
        alt = "; ".join(f"{k.upper()} fit error {_pct(f['fits'][k]['rms_error_percent'])}" for k in other)
        rows.append([_e(f"{f['cv']} ← {f['input']}"), _e(f["input_role"].upper()),
                     _e(rec.upper()), f"{g} <span class='unit'>{_e(unit)}</span>",
                     ", ".join(_n(x) for x in p["time_constants"]) or "&ndash;", _n(p["dead_time"]),
                     _pct(p["rms_error_percent"]),
                     f'<span class="small">{_e(f.get("note", ""))}'
                     f'{(" (" + alt + ")") if alt else ""}</span>'])
    return _table(["pair (CV ← input)", "input", "fitted model", "gain",
                   f"time constants [{_e(tu)}]", f"dead time [{_e(tu)}]", "fit error",
                   "remarks"], rows, 3, 7)


def _pid(doc: Mapping[str, Any]) -> str:
    if not doc["pid_baseline"]:
        return "<p>The scenario has no PID controller to compare with.</p>"
    tu = doc["time_unit"]
    out = []
    for p in doc["pid_baseline"]:
        rows = [[_e(lp["cv"]), _e(lp["mv"]), _n(lp["gain"]), _n(lp["integral_time"], none="no I"),
                 _n(lp["derivative_time"]), _n(lp["setpoint_weight"]), _n(lp["derivative_filter"]),
                 _n(lp["tracking_time"], none="default"), _e(lp.get("rule", "given"))]
                for lp in p["loops"]]
        extra = (f"<p class='small'>MVs without a loop stay at their operating value: "
                 f"{_e(', '.join(p['unpaired_mvs']))}.</p>") if p["unpaired_mvs"] else ""
        out.append(f"<h3>PID baseline '{_e(p['label'])}'</h3>"
                   + _table(["CV", "MV (paired)", "controller gain Kc (MV unit per CV unit)",
                             f"integral time Ti [{_e(tu)}]", f"derivative time Td [{_e(tu)}]",
                             "setpoint weight b", "derivative filter N",
                             f"tracking time Tt [{_e(tu)}]", "tuning rule"], rows, 2) + extra)
    return "".join(out) + f"<p class='small'>{_e(doc['pid_baseline'][0]['structure'])}</p>"


def _verdicts(doc: Mapping[str, Any]) -> str:
    st = doc["study"]
    label = doc["controller"]["label"]
    cls = "ok" if st["passed"] else "bad"
    head = (f"<p>Study result ({_e(st['source'])}): <span class='verdict {cls}'>"
            f"{'ALL CRITERIA PASSED' if st['passed'] else 'NOT PASSED'}</span></p>")
    if st["status"] != "ok":
        head += f"<p class='msg'>{_e(st['message'] or 'the study did not run')}</p>"
    rows = []
    for ctl, b in st["controllers"].items():
        for cr in b["criteria"]:
            ok = cr.get("passed") is True
            rows.append([f"<span class='tag {'passed' if ok else 'failed'}'>"
                         f"{'pass' if ok else 'FAIL'}</span>", _e(ctl), _e(cr.get("name", "")),
                         _n(cr.get("value"), none="missing"), _n(cr.get("limit"), none="&ndash;")])
    for cr in st["comparisons"]:
        ok = cr.get("passed") is True
        rows.append([f"<span class='tag {'passed' if ok else 'failed'}'>{'pass' if ok else 'FAIL'}"
                     f"</span>", "comparison", _e(cr.get("name", "")),
                     _n(cr.get("value"), none="missing"), _n(cr.get("limit"), none="&ndash;")])
    crit = _table(["verdict", "controller", "criterion", "value", "limit"], rows, 3) if rows else \
        "<p>The scenario states no pass/fail criteria.</p>"
    # KPIs per CV: IAE and largest error, every controller side by side
    labels = list(st["controllers"])
    cvs = doc["names"]["cvs"]
    krows = []
    for c in cvs:
        for key, what in (("iae", "IAE"), ("max_abs_error", "largest error")):
            vals = []
            for lb in labels:
                kpi = (st["controllers"][lb].get("kpi") or {}).get("cv", {}).get(c, {})
                vals.append(_n(kpi.get(key), none="&ndash;"))
            krows.append([_e(c), what] + vals)
    heads = ["CV", "KPI"] + [_e(lb) + (" (this design)" if lb == label else "") for lb in labels]
    kpi = _table(heads, krows, 2) if labels else ""
    return head + crit + "<h3>Key performance indicators (nominal case, true CVs)</h3>" + kpi


def write_design_sheet(doc: Mapping[str, Any], path: str | Path, *, matrix_png: bytes) -> Path:
    """Write the design sheet of a bundle (*doc* = the content of ``bundle.json``)."""
    scn, ctl = doc["scenario"], doc["controller"]
    tu = doc["time_unit"]
    n = doc["names"]
    proof = doc["proof"]
    sr = doc["model"]["step_response"]
    title = f"Controller design sheet: {scn['name']} / {ctl['label']}"
    caution = ("<section class='caution'><b>Safety caution</b>" + _e(SAFETY_CAUTION) +
               " This design sheet describes a controller tested in simulation only; the vendor's "
               "implementation, its commissioning and every change to the plant's protection "
               "remain the responsibility of the plant's engineers under local codes.</section>")
    overview = (
        "<section><h2>What this is</h2><p class='lead'>A model-predictive controller designed and "
        f"tested in simulation for the unit <b>{_e(scn['model'])}</b>: it moves "
        f"{len(n['mvs'])} MV(s) ({_e(', '.join(n['mvs']))}) to hold {len(n['cvs'])} CV(s) "
        f"({_e(', '.join(n['cvs']))}) at their setpoints or within their zones"
        + (f", using {len(n['dvs'])} DV(s) ({_e(', '.join(n['dvs']))})" if n["dvs"] else "")
        + f", every {doc['sample_time']:g} {_e(tu)}. The tables below give what an implementation "
        "needs: the model (as step responses and fitted low-order models; the full state-space "
        "matrices are in <code>bundle.json</code>), the limits, the tuning and the evidence from "
        "the study. All values are in engineering units; times in "
        f"<b>{_e(tu)}</b>.</p>"
        "<dl class='facts'>"
        f"<dt>scenario</dt><dd>{_e(scn['name'])} (<code>{_e(scn['copy'])}</code>, SHA-256 "
        f"<code>{_e(scn['sha256'][:16])}&hellip;</code>)</dd>"
        f"<dt>controller</dt><dd>'{_e(ctl['label'])}'</dd>"
        f"<dt>operating point</dt><dd>" + ", ".join(
            f"{_e(k)} = {_n(v)}" for k, v in {**doc['operating_point']['mvs'],
                                               **doc['operating_point']['cvs']}.items()) + "</dd>"
        f"<dt>open loop</dt><dd>{'unstable: the controller stabilizes the unit' if doc['model']['open_loop_unstable'] else 'stable or integrating'}</dd>"
        f"<dt>round trip</dt><dd>{'<span class=mark-ok>proved</span>' if proof['passed'] else '<span class=mark-bad>NOT proved</span>'}: "
        f"{_e(proof['message'])} ({proof['samples']} samples)</dd>"
        f"<dt>written by</dt><dd>{_e(doc['created']['tool'])}, {_e(doc['created']['utc'])}</dd>"
        "</dl></section>")
    matrix = (
        "<section><h2>Process model: step-response matrix</h2>"
        f"<img alt='step-response matrix' style='max-width:100%' src='{png_data_uri(matrix_png)}'>"
        "<p class='small'>Each small plot is the change of one CV (row) after a unit step of one "
        "MV or DV (column), held from time 0, from the controller's linear model at the operating "
        f"point. Coefficients every sample over {sr['samples']} samples "
        f"({sr['settling_time']:g} {_e(tu)}; {_e(sr['settling_note'])}) are in "
        f"<code>{_e(sr['file'])}</code>, one column per pair.</p>"
        "<h3>Fitted low-order models</h3>" + _fits(doc) +
        "<p class='small'>FOPDT: K e<sup>-θs</sup>/(τs+1); SOPDT: two lags; integrating: K "
        "e<sup>-θs</sup>/s (K = rate of change per unit step). Fit error = RMS residual as a "
        "percentage of the largest change of the response. The controller itself uses the exact "
        "state-space model; the fits are for comparison and for tools that take them.</p></section>")
    files = "".join(f"<tr><td><code>{_e(f)}</code></td><td>{_e(what)}</td></tr>" for f, what in (
        ("bundle.json", "everything on this page, machine-readable (schema: bundle.schema.json)"),
        (sr["file"], "step-response coefficients, one column per CV <- input pair"),
        (proof["file"], "the recorded closed-loop run: every controller input and move (test vectors)"),
        (scn["copy"], "the scenario file the design came from"),
        ("study/summary.json", "the study's KPIs and verdicts"))
        if f != "study/summary.json" or f in doc.get("files", {}) or doc["study"]["status"] != "not run")
    body = [
        f"<header><h1>{_e(title)}</h1><div class='sub'>Hand-off of a predictive controller "
        f"design for implementation on the plant's control system. Simulation only.</div></header>"
        "<main>", caution, overview, matrix,
        f"<section><h2>Limits and weights</h2>{_limits(doc)}</section>",
        f"<section><h2>Controller tuning</h2>{_tuning(doc)}</section>",
        f"<section><h2>PID baseline it was compared with</h2>{_pid(doc)}</section>",
        f"<section><h2>Study verdicts</h2>{_verdicts(doc)}</section>",
        "<section><h2>Round-trip proof</h2><p>The controller was rebuilt from this bundle alone "
        "(discrete model, names, operating point, settings) and fed the recorded inputs of the "
        f"nominal closed-loop run ({proof['samples']} samples). Every move must equal the "
        f"original's to {proof['tolerance']:g} of the MV's scale. Result: "
        f"<b>{'passed' if proof['passed'] else 'FAILED'}</b>"
        + ((", every move bit-identical" if proof["max_deviation"] == 0 else
            f", largest difference {proof['max_deviation']:.2g} of a scale")
           if isinstance(proof.get("max_deviation"), (int, float)) else "")
        + ". Re-run it with <code>mpcproto export --check DIR</code>. A vendor's implementation "
          f"can be tested against the same record (<code>{_e(proof['file'])}</code>).</p></section>",
        f"<section><h2>Files in this bundle</h2><table><tbody>{files}</tbody></table></section>",
        caution, "</main>",
        f"<footer>{_e(doc['created']['tool'])} &middot; format {_e(doc['format'])} version "
        f"{doc['format_version']}</footer>",
    ]
    html = ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<title>{_e(title)}</title><style>{_SHEET_CSS}</style></head><body>"
            + "".join(body) + "</body></html>\n")
    path = Path(path)
    path.write_text(html, encoding="utf-8")
    return path
