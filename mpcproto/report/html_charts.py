"""The charts of the batch report (PNG bytes, drawn with matplotlib) and the small helpers they
share with the page (:mod:`mpcproto.report.html`): escaping, number formats, the worst criterion
of a case, the KPI groups of a record.
"""

from __future__ import annotations

import base64
import html
import io
import math
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from ..analysis.criteria import is_absolute, utilisation
from ..store import case_verdict, criterion_passed
from .summary import criteria_of

# our own palette: verdict colours and a muted ink
COLOURS = {"passed": "#2f8f83", "failed": "#d9703a", "error": "#7b4f8e", "ink": "#23313f",
           "grid": "#d6dde4", "limit": "#b8323a", "band": "#f3f6f8"}
RANK = {"error": 0, "failed": 1, "passed": 2}


# ------------------------------------------------------------------------------------------ helpers
def _e(s: Any) -> str:
    return html.escape(str(s), quote=True)


def _num(v: Any, digits: int = 4) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, float)):
        if isinstance(v, float) and math.isnan(v):
            return "&ndash;"
        if isinstance(v, float) and math.isinf(v):
            return "&infin;" if v > 0 else "&minus;&infin;"
        return f"{v:.{digits}g}"
    if v is None:
        return "&ndash;"
    return _e(v)


def _worst_criterion(rec: Mapping[str, Any]) -> tuple[float, str, Mapping[str, Any] | None]:
    best = (math.nan, "", None)
    for ctl, cr in criteria_of(rec):
        u = utilisation(cr)
        if math.isnan(u):
            continue
        if math.isnan(best[0]) or u > best[0]:
            best = (u, ctl, cr)
    return best


def _share(u: float) -> str:
    """A share of the limit for a table cell ("failed" where no ratio exists)."""
    if math.isnan(u):
        return "&ndash;"
    if math.isinf(u):
        return "failed"
    return f"{100 * u:.0f} %"


def sort_worst_first(records: Iterable[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """Records ordered errors first, then failed, then by how close they come to a limit."""
    def key(rec: Mapping[str, Any]):
        u = _worst_criterion(rec)[0]
        return (RANK[case_verdict(rec)], -(u if not math.isnan(u) else -1.0),
                str(rec.get("scenario", "")), str(rec.get("case_id", "")))
    return sorted(records, key=key)


def png_data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` for embedding a PNG in the page."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _plain_axes(ax, grid_axis: str, grid_width: float, label_size: int) -> None:
    """The report's chart style: light grid behind the data, no top/right frame, ink ticks."""
    ax.grid(True, axis=grid_axis, color=COLOURS["grid"], linewidth=grid_width)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=label_size, colors=COLOURS["ink"])


def _fig_png(fig) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: PLC0415 - lazy, Agg only

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def _style_axes(ax) -> None:
    ax.set_facecolor("white")
    ax.grid(True, axis="x", color=COLOURS["grid"], linewidth=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=COLOURS["ink"], labelsize=9)


def _kpi_groups(kpi: Any) -> dict[str, dict[str, Mapping[str, Any]]]:
    """``{"cv": {var: {kpi: value}}, "mv": {...}}`` from a KPI block, nested by role or not."""
    if not isinstance(kpi, Mapping):
        return {}
    if kpi and all(isinstance(v, Mapping) and v and all(isinstance(x, Mapping) for x in v.values())
                   for v in kpi.values()):
        return {str(role): dict(v) for role, v in kpi.items()}
    return {"": {str(k): v for k, v in kpi.items() if isinstance(v, Mapping)}}


# ------------------------------------------------------------------------------------------- charts
def _chart_verdicts(by_scen: Mapping[str, Counter]) -> bytes:
    from matplotlib.figure import Figure  # noqa: PLC0415

    names = list(by_scen)
    h = 1.2 + 0.45 * len(names)
    fig = Figure(figsize=(9.0, h), layout="constrained")
    ax = fig.add_subplot()
    left = [0] * len(names)
    for v in ("passed", "failed", "error"):
        vals = [by_scen[n][v] for n in names]
        ax.barh(names, vals, left=left, color=COLOURS[v], label=v, height=0.6)
        left = [a + b for a, b in zip(left, vals)]
    ax.invert_yaxis()
    ax.set_xlabel("cases", color=COLOURS["ink"])
    ax.set_title("Verdicts per scenario", loc="left", color=COLOURS["ink"], fontsize=11)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=9, frameon=False)
    _style_axes(ax)
    return _fig_png(fig)


def _chart_utilisation(scen: str, recs: Sequence[Mapping[str, Any]], max_rows: int = 14) -> bytes | None:
    """Per criterion, the share of its limit each case uses (1.0 = at the limit)."""
    from matplotlib.figure import Figure  # noqa: PLC0415

    per: dict[str, list[tuple[float, bool]]] = defaultdict(list)
    for rec in recs:
        if case_verdict(rec) == "error":
            continue
        for ctl, cr in criteria_of(rec):
            if is_absolute(cr):   # no ratio for a level check: shown against the parameters
                continue
            u = utilisation(cr)
            if math.isnan(u):
                continue
            label = (f"{ctl}: " if ctl else "") + str(cr.get("name") or "criterion")
            per[label].append((u, criterion_passed(cr)))
    if not per:
        return None
    labels = sorted(per, key=lambda k: -max(u for u, _ in per[k]))[:max_rows]
    cap = 3.0
    fig = Figure(figsize=(9.0, 1.3 + 0.38 * len(labels)), layout="constrained")
    ax = fig.add_subplot()
    for i, lab in enumerate(labels):
        us = per[lab]
        xs = [min(u, cap) for u, _ in us]
        cols = [COLOURS["passed"] if ok else COLOURS["failed"] for _, ok in us]
        # deterministic vertical spread so overlapping points stay visible
        ys = [i + 0.28 * (((j * 0.6180339887) % 1.0) - 0.5) for j in range(len(us))]
        ax.scatter(xs, ys, s=14, c=cols, alpha=0.75, linewidths=0)
    ax.axvline(1.0, color=COLOURS["limit"], linewidth=1.4, linestyle="--")
    ax.text(1.0, -0.9, " limit", color=COLOURS["limit"], fontsize=8, va="bottom")
    ax.set_yticks(range(len(labels)), labels)
    ax.set_ylim(len(labels) - 0.5, -1.0)
    ax.set_xlim(0, max(1.25, min(cap, max(min(u, cap) for k in labels for u, _ in per[k]) * 1.08)))
    ax.set_xlabel("share of the limit used (value / limit; over 1 = criterion failed; capped at 3)",
                  color=COLOURS["ink"], fontsize=9)
    ax.set_title(f"{scen}: how close each case comes to each limit", loc="left",
                 color=COLOURS["ink"], fontsize=11)
    _style_axes(ax)
    return _fig_png(fig)


def _chart_parameters(scen: str, recs: Sequence[Mapping[str, Any]], max_params: int = 2,
                      max_criteria: int = 2) -> bytes | None:
    """The key criteria's values against the study's varied parameters, with the limit drawn.

    Parameters: numeric ones that take more than one value over the cases.  Criteria: those that
    failed most often, then checks on an absolute level (a peak temperature), then the ones that
    use most of their limit.
    """
    from matplotlib.figure import Figure  # noqa: PLC0415

    ok_recs = [r for r in recs if case_verdict(r) != "error"]
    values: dict[str, set] = defaultdict(set)
    for r in ok_recs:
        for k, v in (r.get("params") or {}).items():
            if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v):
                values[k].add(float(v))
    params = [k for k, vs in values.items() if len(vs) > 1][:max_params]
    if not params:
        return None
    per: dict[str, list[tuple[Mapping[str, Any], Mapping[str, Any]]]] = defaultdict(list)
    for r in ok_recs:
        for ctl, cr in criteria_of(r):
            v, lim = cr.get("value"), cr.get("limit")
            if isinstance(v, (int, float)) and isinstance(lim, (int, float)) and math.isfinite(v):
                per[(f"{ctl}: " if ctl else "") + str(cr.get("name") or "criterion")].append((r, cr))
    if not per:
        return None

    def rank(label: str):
        items = per[label]
        fails = sum(1 for _, cr in items if cr.get("passed") is False)
        absolute = any(is_absolute(cr) for _, cr in items)
        us = [utilisation(cr) for _, cr in items]
        worst = max((u for u in us if not math.isnan(u)), default=0.0)
        return (-fails, not absolute, -min(worst, 1e9))

    labels = sorted(per, key=rank)[:max_criteria]
    fig = Figure(figsize=(9.0, 2.6 * len(labels) + 0.6), layout="constrained")
    axes = fig.subplots(len(labels), len(params), squeeze=False)
    for i, lab in enumerate(labels):
        for j, key in enumerate(params):
            ax = axes[i][j]
            pts = [(float(r["params"][key]), float(cr["value"]), criterion_passed(cr))
                   for r, cr in per[lab] if key in (r.get("params") or {})
                   and isinstance(r["params"][key], (int, float))]
            if pts:
                ax.scatter([p[0] for p in pts], [p[1] for p in pts], s=18, alpha=0.8, linewidths=0,
                           c=[COLOURS["passed"] if p[2] else COLOURS["failed"] for p in pts])
            lim = per[lab][0][1].get("limit")
            if isinstance(lim, (int, float)) and math.isfinite(lim):
                ax.axhline(lim, color=COLOURS["limit"], linestyle="--", linewidth=1.2)
            ax.set_xlabel(key.rsplit(".", 1)[-1], fontsize=9, color=COLOURS["ink"])
            if j == 0:
                ax.set_ylabel(lab if len(lab) <= 28 else lab[:27] + "\u2026", fontsize=9,
                              color=COLOURS["ink"])
            _plain_axes(ax, "both", 0.7, 8)
    fig.suptitle(f"{scen}: key criteria against the study parameters (dashed: the limit)",
                 x=0.01, ha="left", fontsize=11, color=COLOURS["ink"])
    return _fig_png(fig)


def _chart_iae(scen: str, recs: Sequence[Mapping[str, Any]], max_cvs: int = 4) -> bytes | None:
    """Spread of each CV's IAE over the cases, one box per controller."""
    from matplotlib.figure import Figure  # noqa: PLC0415

    data: dict[str, dict[str, list[float]]] = defaultdict(lambda: defaultdict(list))
    for rec in recs:
        if case_verdict(rec) == "error":
            continue
        for ctl, res in (rec.get("controllers") or {}).items():
            groups = _kpi_groups((res or {}).get("kpi"))
            for var, k in groups.get("cv", groups.get("", {})).items():
                v = k.get("iae")
                if isinstance(v, (int, float)) and math.isfinite(v):
                    data[var][str(ctl)].append(float(v))
    cvs = [cv for cv in data if data[cv]][:max_cvs]
    if not cvs:
        return None
    fig = Figure(figsize=(9.0, 2.9), layout="constrained")
    axes = fig.subplots(1, len(cvs), squeeze=False)[0]
    palette = ["#3d6f99", "#c9a227", "#5b8c5a", "#a05a7a", "#6b6b6b"]
    for ax, cv in zip(axes, cvs):
        ctls = sorted(data[cv])
        if max(len(data[cv][c]) for c in ctls) >= 5:
            bp = ax.boxplot([data[cv][c] for c in ctls], tick_labels=ctls, patch_artist=True,
                            widths=0.55, medianprops={"color": COLOURS["ink"]})
            for patch, col in zip(bp["boxes"], palette * 3):
                patch.set_facecolor(col)
                patch.set_alpha(0.55)
        else:  # too few cases for a box: show each one
            for i, (c, col) in enumerate(zip(ctls, palette * 3), 1):
                ys = data[cv][c]
                xs = [i + 0.12 * (((j * 0.6180339887) % 1.0) - 0.5) for j in range(len(ys))]
                ax.scatter(xs, ys, s=36, color=col, zorder=3)
            ax.set_xticks(range(1, len(ctls) + 1), ctls)
            ax.set_xlim(0.4, len(ctls) + 0.6)
            ax.set_ylim(bottom=0)
        ax.set_title(f"IAE of {cv}", fontsize=10, color=COLOURS["ink"])
        _plain_axes(ax, "y", 0.8, 9)
    fig.suptitle(f"{scen}: integral of absolute error over the cases (lower is better)",
                 x=0.01, ha="left", fontsize=11, color=COLOURS["ink"])
    return _fig_png(fig)
