"""The batch report: ONE self-contained HTML file (inline CSS, PNG charts as base64 data URIs).

:func:`write_html_report` turns the records of a batch (the lines of ``results.jsonl``) into a page
that opens anywhere, offline, and can be attached to a design review or a CI run as a single file:

* the verdict at the top (cases passed / failed / errored, baseline regressions) and the safety
  caution;
* a table per scenario;
* charts: verdicts per scenario, how much of each criterion's limit the cases use, the key
  criteria against the study's swept or drawn parameters, and the spread of each CV's IAE per
  controller;
* the cases, worst first (errors, then failed criteria, then the cases closest to a limit), and the
  KPI tables of the worst few;
* optional extra PNGs (for example the trajectories of the worst case of each scenario).

The page loads nothing from outside: no scripts, no web fonts, no external images or style sheets.
"""

from __future__ import annotations

import math
import os
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ..analysis.criteria import margin, utilisation
from ..store import case_verdict, criterion_passed, incomplete_note
from .baseline import BaselineComparison
from .html_charts import (_chart_iae, _chart_parameters, _chart_utilisation, _chart_verdicts, _e,
                          _kpi_groups, _num, _share, _worst_criterion, png_data_uri,
                          sort_worst_first)
from .summary import criteria_of

__all__ = ["write_html_report", "SAFETY_CAUTION", "sort_worst_first", "png_data_uri"]

SAFETY_CAUTION = (
    "Simulation only. These results come from models and assumed disturbances; they are not a "
    "guarantee of how a real unit will behave. A controller must never be the only protection of a "
    "plant: the unit needs its own independent safety systems (trips, relief, interlocks), and any "
    "change to it goes through management of change. Local codes and licensed engineers decide what "
    "is installed and how it is operated.")


# ------------------------------------------------------------------------------------------ the page
_CSS = """
:root { --ink:#23313f; --muted:#5d6b78; --line:#d6dde4; --band:#f3f6f8; --pass:#2f8f83;
        --fail:#d9703a; --err:#7b4f8e; --warn-bg:#fff6e5; --warn-line:#e0a43a; }
* { box-sizing: border-box; }
body { margin: 0; font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, Helvetica, Arial,
       sans-serif; color: var(--ink); background: #eef2f5; }
header { background: #23313f; color: #fff; padding: 22px 32px 18px; }
header h1 { margin: 0 0 4px; font-size: 22px; font-weight: 600; letter-spacing: .2px; }
header .sub { color: #c4d0da; font-size: 13px; }
main { max-width: 1160px; margin: 0 auto; padding: 18px 24px 40px; }
section { overflow-x: auto; background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 14px 18px;
          margin: 14px 0; }
h2 { font-size: 17px; margin: 2px 0 10px; }
h3 { font-size: 14px; margin: 14px 0 6px; }
.cards { display: flex; gap: 12px; flex-wrap: wrap; }
.card { flex: 1 1 140px; border-radius: 6px; padding: 10px 14px; background: var(--band);
        border-left: 5px solid var(--line); }
.card .n { font-size: 26px; font-weight: 650; }
.card .l { color: var(--muted); font-size: 12px; text-transform: uppercase; letter-spacing: .5px; }
.card.pass { border-left-color: var(--pass); } .card.fail { border-left-color: var(--fail); }
.card.err { border-left-color: var(--err); } .card.reg { border-left-color: #b8323a; }
.verdict { display: inline-block; font-weight: 650; padding: 3px 12px; border-radius: 14px;
           color: #fff; margin-top: 8px; }
.verdict.ok { background: var(--pass); } .verdict.bad { background: var(--fail); }
.caution { background: var(--warn-bg); border: 1px solid var(--warn-line);
           border-left: 6px solid var(--warn-line); }
.caution b { display: block; margin-bottom: 4px; }
table { border-collapse: collapse; width: 100%; font-size: 13px; }
th, td { text-align: left; padding: 5px 8px; border-bottom: 1px solid var(--line);
         vertical-align: top; }
th { background: var(--band); font-weight: 600; white-space: nowrap; }
td.id { white-space: nowrap; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.error td:first-child { box-shadow: inset 4px 0 var(--err); }
tr.failed td:first-child { box-shadow: inset 4px 0 var(--fail); }
tr.passed td:first-child { box-shadow: inset 4px 0 var(--pass); }
.tag { display: inline-block; padding: 1px 8px; border-radius: 10px; font-size: 12px; color: #fff;
       font-weight: 600; }
.tag.passed { background: var(--pass); } .tag.failed { background: var(--fail); }
.tag.error { background: var(--err); }
.small { color: var(--muted); font-size: 12px; }
td.small { min-width: 10em; }
td.crit { word-break: break-word; min-width: 12em; }
.msg { font-family: ui-monospace, SFMono-Regular, Menlo, Consolas, monospace; font-size: 12px;
       color: #6a2c2c; word-break: break-word; }
figure { margin: 10px 0 16px; } figure img { max-width: 100%; height: auto; display: block; }
figcaption { color: var(--muted); font-size: 12px; margin-top: 4px; }
.case { border-top: 1px solid var(--line); padding-top: 8px; margin-top: 10px; }
.mark-ok { color: var(--pass); font-weight: 700; } .mark-bad { color: var(--fail); font-weight: 700; }
footer { color: var(--muted); font-size: 12px; text-align: center; padding: 8px 0 24px; }
"""


def _img(png: bytes, alt: str, caption: str = "") -> str:
    cap = f"<figcaption>{_e(caption)}</figcaption>" if caption else ""
    return f'<figure><img alt="{_e(alt)}" src="{png_data_uri(png)}">{cap}</figure>'


def _params_text(rec: Mapping[str, Any], limit: int = 4) -> str:
    """Study parameters of a case: last part of each key path (full path on hover)."""
    p = rec.get("params") or {}
    if not isinstance(p, Mapping) or not p:
        return ""
    items = list(p.items())
    txt = ", ".join(f'<span title="{_e(k)}">{_e(str(k).rsplit(".", 1)[-1])}</span>='
                    f"{_num(v) if isinstance(v, (int, float)) else _e(v)}" for k, v in items[:limit])
    if len(items) > limit:
        txt += f", &hellip; (+{len(items) - limit})"
    return txt


def _case_table(recs: Sequence[Mapping[str, Any]], max_rows: int, linked: int = 0) -> str:
    rows = ['<table><tr><th>#</th><th>case</th><th>verdict</th>'
            '<th>closest criterion</th><th class="num">value</th><th class="num">limit</th>'
            '<th class="num">share of limit</th><th>parameters</th><th class="num">seed</th></tr>']
    for i, rec in enumerate(recs[:max_rows], 1):
        v = case_verdict(rec)
        u, ctl, cr = _worst_criterion(rec)
        if v == "error":
            crit_cell = f'<span class="msg">{_e(rec.get("message") or incomplete_note(rec))}</span>'
            val = lim = share = "&ndash;"
        elif cr is None:
            n_cr = len(criteria_of(rec))
            crit_cell = ("(no criteria)" if not n_cr else
                         f"({n_cr} verdicts, none with a value / limit ratio)")
            val, lim, share = "&ndash;", "&ndash;", "&ndash;"
        else:
            crit_cell = _e((f"{ctl}: " if ctl else "") + str(cr.get("name") or "criterion"))
            val, lim = _num(cr.get("value")), _num(cr.get("limit"))
            share = _share(u)
        cid = _e(rec.get("case_id", ""))
        rows.append(f'<tr class="{v}"><td class="num">{i}</td><td class="id"><a href="#case-{cid}">{cid}</a></td>'
                    if i <= linked else
                    f'<tr class="{v}"><td class="num">{i}</td><td class="id">{cid}</td>')
        rows[-1] += (f'<td><span class="tag {v}">{v}</span></td>'
                     f'<td class="crit">{crit_cell}</td><td class="num">{val}</td><td class="num">{lim}</td>'
                     f'<td class="num">{share}</td><td class="small">{_params_text(rec)}</td>'
                     f'<td class="num small">{_e(rec.get("seed", ""))}</td></tr>')
    rows.append("</table>")
    if len(recs) > max_rows:
        rows.append(f'<p class="small">{len(recs) - max_rows} more cases (all of them passed or '
                    'further from their limits) are in summary.csv.</p>'
                    if case_verdict(recs[max_rows]) == "passed" else
                    f'<p class="small">{len(recs) - max_rows} more cases are in summary.csv.</p>')
    return "\n".join(rows)


def _kpi_block(rec: Mapping[str, Any]) -> str:
    """KPI and criteria tables of one case."""
    v = case_verdict(rec)
    cid = _e(rec.get("case_id", ""))
    out = [f'<div class="case" id="case-{cid}"><h3>{cid} <span class="tag {v}">{v}</span> '
           f'<span class="small">{_e(rec.get("scenario", ""))} &middot; seed {_e(rec.get("seed", ""))}'
           f'{" &middot; " + _params_text(rec, 8) if rec.get("params") else ""}</span></h3>']
    if v == "error":
        out.append(f'<p class="msg">{_e(rec.get("message") or incomplete_note(rec))}'
                   f'{" (" + _e(rec["error_at"]) + ")" if rec.get("error_at") else ""}</p></div>')
        return "".join(out)
    ctls = rec.get("controllers") or {}
    had = [(ctl, (res or {}).get("inputs")) for ctl, res in ctls.items()
           if isinstance((res or {}).get("inputs"), Mapping)]
    if had:
        from ..compare import tuning_text

        rows = ['<table style="margin-top:6px"><tr><th>controller</th><th>structure</th>'
                '<th>measured DVs used</th><th>tuning</th></tr>']
        for ctl, inp in had:
            rows.append(f"<tr><td>{_e(ctl)}</td><td>{_e('; '.join(inp.get('structure') or []))}</td>"
                        f"<td>{_e(', '.join(inp.get('measured_dvs_used') or []) or 'none')}</td>"
                        f'<td class="small">{_e(tuning_text(inp))}</td></tr>')
        rows.append("</table>")
        out.append("".join(rows))
    for note in rec.get("fairness") or []:
        out.append(f'<p class="small">{_e(note)}</p>')
    roles: dict[str, tuple[list[str], list[str]]] = {}   # role -> (variables, kpi names)
    for res in ctls.values():
        for role, table in _kpi_groups((res or {}).get("kpi")).items():
            variables, kpi_names = roles.setdefault(role, ([], []))
            for var, k in table.items():
                if var not in variables:
                    variables.append(var)
                for name, val in k.items():
                    if name not in kpi_names and (val is None or isinstance(val, (int, float))):
                        kpi_names.append(name)
    for role, (variables, kpi_names) in roles.items():
        head = "".join(f'<th class="num">{_e(k.replace("_", " "))}</th>' for k in kpi_names)
        rows = [f'<table style="margin-top:6px"><tr><th>{_e(role.upper() or "variable")}</th>'
                f"<th>controller</th>{head}</tr>"]
        for var in variables:
            for ctl, res in ctls.items():
                k = _kpi_groups((res or {}).get("kpi")).get(role, {}).get(var)
                if not isinstance(k, Mapping):
                    continue
                cells = "".join(f'<td class="num">{_num(k.get(n))}</td>' for n in kpi_names)
                rows.append(f"<tr><td>{_e(var)}</td><td>{_e(ctl)}</td>{cells}</tr>")
        rows.append("</table>")
        out.append("".join(rows))
    crit = criteria_of(rec)
    if crit:
        rows = ['<table style="margin-top:8px"><tr><th></th><th>criterion</th><th class="num">value'
                '</th><th class="num">limit</th><th class="num">margin</th><th class="num">share of limit</th>'
                '</tr>']
        for ctl, cr in crit:
            ok = criterion_passed(cr)
            u = utilisation(cr)
            share = _share(u)
            rows.append(f'<tr><td class="{"mark-ok" if ok else "mark-bad"}">{"pass" if ok else "FAIL"}'
                        f'</td><td>{_e((ctl + ": ") if ctl else "")}{_e(cr.get("name", ""))}</td>'
                        f'<td class="num">{_num(cr.get("value"))}</td>'
                        f'<td class="num">{_num(cr.get("limit"))}</td>'
                        f'<td class="num">{_num(margin(cr))}</td><td class="num">{share}</td></tr>')
        rows.append("</table>")
        out.append("".join(rows))
    viol = [(ctl, ev) for ctl, res in ctls.items() for ev in ((res or {}).get("violations") or [])]
    if viol:
        out.append(f'<p class="small">{len(viol)} limit-violation event(s): ' + "; ".join(
            f'{_e(ctl)} {_e(ev.get("variable", "?"))}'
            f'{_e(" (MV " + ev["signal"] + ")") if ev.get("signal") in ("commanded", "applied") else ""} '
            f'{_e(ev.get("side", ev.get("bound", "")))} '
            f'peak excess {_num(ev.get("peak_excess"))}' for ctl, ev in viol[:6])
            + (" &hellip;" if len(viol) > 6 else "") + "</p>")
    flags = [(ctl, f) for ctl, res in ctls.items() for f in ((res or {}).get("flags") or [])]
    if flags:      # what a reader should notice even when every verdict passed (analysis.run_flags)
        out.append('<p class="small msg">To notice: ' + "; ".join(
            f'{_e(ctl)}: {_e(f.get("message", f.get("kind", "")))}' for ctl, f in flags[:8])
            + (" &hellip;" if len(flags) > 8 else "") + "</p>")
    out.append("</div>")
    return "".join(out)


def write_html_report(records: Iterable[Mapping[str, Any]], path: str | os.PathLike, *,
                      title: str = "Closed-loop study report", run_info: Mapping[str, Any] | None = None,
                      baseline: BaselineComparison | None = None,
                      images: Sequence[tuple[str, bytes | str | os.PathLike]] = (),
                      max_rows: int = 200, detail_cases: int = 10, charts: bool = True) -> Path:
    """Write the batch report as one self-contained HTML file.

    Parameters
    ----------
    records : iterable of dict
        Result records (lines of ``results.jsonl``) of the cases to report.
    path : path
        Output file (its directory is created).
    title : str
        Page title.
    run_info : mapping, optional
        Extra facts shown under the title (e.g. ``{"workers": 2, "wall time": "12 s"}``).
    baseline : BaselineComparison, optional
        Adds the list of KPIs that got worse than the baseline.
    images : sequence of (caption, PNG bytes or path)
        Extra figures to embed (as data URIs), e.g. trajectories of the worst cases.
    max_rows : int
        Most rows of the worst-first case table (the rest are in summary.csv).
    detail_cases : int
        How many of the worst cases get their KPI and criteria tables.
    charts : bool
        Draw the summary charts (matplotlib, Agg).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    recs = sort_worst_first(records)
    info = dict(run_info or {})
    counts = Counter(case_verdict(r) for r in recs)
    by_scen: dict[str, Counter] = defaultdict(Counter)
    scen_recs: dict[str, list] = defaultdict(list)
    for r in recs:
        s = str(r.get("scenario") or "(unnamed)")
        by_scen[s][case_verdict(r)] += 1
        scen_recs[s].append(r)
    by_scen = dict(sorted(by_scen.items()))
    n_reg = len(baseline.regressions) if baseline is not None else 0
    all_ok = counts["failed"] == 0 and counts["error"] == 0 and n_reg == 0 and bool(recs)
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")

    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
             f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"]
    sub = " &middot; ".join([f"{len(recs)} cases", f"{len(by_scen)} scenario(s)", stamp]
                            + [f"{_e(k)}: {_e(v)}" for k, v in info.items()])
    parts.append(f"<header><h1>{_e(title)}</h1><div class='sub'>{sub}</div></header><main>")

    cards = [("pass", counts["passed"], "passed"), ("fail", counts["failed"], "failed a criterion"),
             ("err", counts["error"], "did not complete")]
    if baseline is not None:
        cards.append(("reg", n_reg, "worse than baseline"))
    parts.append("<section><div class='cards'>" + "".join(
        f"<div class='card {c}'><div class='n'>{n}</div><div class='l'>{_e(lab)}</div></div>"
        for c, n, lab in cards) + "</div>")
    verdict_text = ("Every case completed and met its criteria" + (" and no KPI got worse than the "
                    "baseline" if baseline is not None else "") + ".") if all_ok else (
        "Not accepted: " + ", ".join(x for x in (
            f"{counts['failed']} case(s) failed a criterion" if counts["failed"] else "",
            f"{counts['error']} case(s) did not complete" if counts["error"] else "",
            f"{n_reg} number(s) worse than the baseline" if n_reg else "",
            "no cases" if not recs else "") if x) + ".")
    parts.append(f"<div class='verdict {'ok' if all_ok else 'bad'}'>{_e(verdict_text)}</div></section>")
    parts.append(f"<section class='caution'><b>Safety caution</b>{_e(SAFETY_CAUTION)}</section>")

    # per scenario
    rows = ["<table><tr><th>scenario</th><th class='num'>cases</th><th class='num'>passed</th>"
            "<th class='num'>failed</th><th class='num'>errors</th><th class='num' title='the largest "
            "share of a limit any criterion uses in any case (value / limit; 100 % is at the limit)'>"
            "most of a limit used</th><th class='num'>median run time</th></tr>"]
    for s, c in by_scen.items():
        us = [u for u in (_worst_criterion(r)[0] for r in scen_recs[s] if case_verdict(r) != "error")
              if not math.isnan(u)]
        el = sorted(float(r["elapsed_s"]) for r in scen_recs[s]
                    if isinstance(r.get("elapsed_s"), (int, float)))
        worst = _share(max(us)) if us else "&ndash;"
        med = f"{el[len(el) // 2]:.2f} s" if el else "&ndash;"
        rows.append(f"<tr><td>{_e(s)}</td><td class='num'>{sum(c.values())}</td>"
                    f"<td class='num'>{c['passed']}</td><td class='num'>{c['failed']}</td>"
                    f"<td class='num'>{c['error']}</td><td class='num'>{worst}</td>"
                    f"<td class='num'>{med}</td></tr>")
    rows.append("</table><p class='small'>most of a limit used: the largest value / limit of any "
                "criterion in any case of the scenario (100 % is at the limit; checks on the highest or "
                "lowest value of a variable are not counted).</p>")
    parts.append("<section><h2>Scenarios</h2>" + "".join(rows) + "</section>")

    if baseline is not None:
        b = baseline
        head = (f"<p class='small'>Compared with {_e(b.baseline_file or 'the baseline')}: "
                f"{b.cases_compared} cases, {b.compared} numbers; tolerance: worse by more than "
                f"{b.atol:g} + {100 * b.rtol:g} % of the baseline value. {b.improved} number(s) "
                f"improved. {len(b.missing)} baseline case(s) missing here, {len(b.new)} new.</p>")
        if b.regressions:
            t = ["<table><tr><th>case</th><th>controller</th><th>quantity</th><th class='num'>"
                 "baseline</th><th class='num'>now</th><th class='num'>change</th></tr>"]
            for r in b.regressions[:max_rows]:
                ch = r.change
                chs = "&ndash;" if math.isnan(ch) else ("+&infin;" if math.isinf(ch) else f"{100 * ch:+.1f} %")
                t.append(f"<tr class='failed'><td>{_e(r.case_id)}</td><td>{_e(r.controller)}</td>"
                         f"<td>{_e(r.quantity)}</td><td class='num'>{_num(r.baseline)}</td>"
                         f"<td class='num'>{_num(r.current)}</td><td class='num'>{chs}</td></tr>")
            t.append("</table>")
            if len(b.regressions) > max_rows:
                t.append(f"<p class='small'>{len(b.regressions) - max_rows} more.</p>")
            body = "".join(t)
        else:
            body = "<p>No KPI got worse beyond the tolerance.</p>"
        parts.append(f"<section><h2>Against the baseline</h2>{head}{body}</section>")

    if charts and recs:
        figs = [_img(_chart_verdicts(by_scen), "verdicts per scenario")]
        for s, rs in list(scen_recs.items())[:12]:
            png = _chart_utilisation(s, rs)
            if png:
                figs.append(_img(png, f"criterion use, {s}",
                                 "Each dot is one case; green within the limit, orange beyond it. "
                                 "Checks on the level of a variable (highest or lowest value) have "
                                 "no ratio: their margins are in the case tables."))
            png = _chart_parameters(s, rs)
            if png:
                figs.append(_img(png, f"criteria against parameters, {s}",
                                 "Each dot is one case; green: criterion met, orange: failed."))
            png = _chart_iae(s, rs)
            if png:
                figs.append(_img(png, f"IAE spread, {s}"))
        parts.append("<section><h2>Charts</h2>" + "".join(figs) + "</section>")

    parts.append("<section><h2>Cases, worst first</h2>"
                 "<p class='small'>Errors first, then cases that failed a criterion, then the rest by "
                 "the largest share of a limit any of their criteria uses.</p>"
                 + _case_table(recs, max_rows, detail_cases) + "</section>")

    if detail_cases and recs:
        parts.append(f"<section><h2>The {min(detail_cases, len(recs))} worst cases in detail</h2>"
                     + "".join(_kpi_block(r) for r in recs[:detail_cases]) + "</section>")

    if images:
        figs = []
        for caption, img in images:
            png = img if isinstance(img, bytes) else Path(img).read_bytes()
            figs.append(_img(png, caption, caption))
        parts.append("<section><h2>Trajectories</h2>" + "".join(figs) + "</section>")

    parts.append(f"<footer>mpcproto batch report &middot; {stamp} &middot; simulation only"
                 "</footer></main></body></html>")
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text("\n".join(parts), encoding="utf-8")
    return out
