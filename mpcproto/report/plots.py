"""PNG figures of closed-loop runs (matplotlib, Agg backend).

* :func:`plot_cvs` -- one panel per CV: the true value of each run (solid), what its instruments
  reported (thin, faint), the setpoint (dashed) and the zone between the low and high limits
  shaded; time windows with an active fault are hatched in grey.
* :func:`plot_mvs` -- one panel per MV: the applied value of each run as a staircase (held over
  each sample) and its operating limits (dotted).
* :func:`plot_comparison` -- both figures for a set of runs, written to a directory.

Runs are given as ``{label: Trajectory}``; several runs are overlaid in the same panels.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from ..validation import fail, shown
from ..trajectory import Trajectory

__all__ = ["plot_cvs", "plot_mvs", "plot_comparison", "PALETTE"]

# our own palette: deep blue, brick red, teal green, ochre, plum, slate
PALETTE = ("#1f4e79", "#b5452f", "#2a8c72", "#c98a1b", "#7b4b94", "#5b6770")
_ZONE = "#9cc8a5"
_FAULT = "#8c8c8c"


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _check(runs: Mapping[str, Trajectory]) -> list[tuple[str, Trajectory]]:
    if isinstance(runs, Trajectory):
        runs = {str(runs.meta.get("controller", "run")): runs}
    if not isinstance(runs, Mapping) or not runs:
        raise fail("plots", "runs", "a non-empty mapping {label: Trajectory}", shown(runs))
    for k, v in runs.items():
        if not isinstance(v, Trajectory):
            raise fail("plots", f"runs.{k}", "a Trajectory", f"a {type(v).__name__}")
    return list(runs.items())


def _time_axis(tr: Trajectory) -> tuple[float, str]:
    unit = str(tr.meta.get("time_unit", ""))
    span = float(tr.t[-1] - tr.t[0]) if len(tr) > 1 else 0.0
    if unit == "s" and span > 3 * 3600:
        return 1 / 3600.0, "h"
    if unit == "s" and span > 1200:
        return 1 / 60.0, "min"
    if unit == "min" and span > 600:
        return 1 / 60.0, "h"
    return 1.0, unit or "time unit"


def _fault_spans(ax, tr: Trajectory, name: str, scale: float) -> None:
    if not tr.has("fault", name):
        return
    flag = tr.series("fault", name) > 0.5
    idx = np.flatnonzero(flag)
    if idx.size == 0:
        return
    for run in np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1):
        ax.axvspan(tr.t[run[0]] * scale, (tr.t[run[-1]] + tr.Ts) * scale, facecolor="none",
                   edgecolor=_FAULT, hatch="//", linewidth=0.0, alpha=0.6)


def _unit(tr: Trajectory, name: str) -> str:
    u = (tr.meta.get("units") or {}).get(name, "")
    return f" [{u}]" if u else ""


def _panels(runs, kind: str, wanted, what: str, role: str, height: float):
    """Checked runs, the first run, the panel names and a figure with one panel per name."""
    items = _check(runs)
    first = items[0][1]
    names = list(wanted) if wanted is not None else first.names(kind)
    if not names:
        raise fail(f"{what}()", "runs", f"trajectories with {role} series ('{kind}.*')", "none")
    plt = _plt()
    scale, tu = _time_axis(first)
    fig, axes = plt.subplots(len(names), 1, figsize=(9, height * len(names) + 0.8), sharex=True,
                             squeeze=False)
    return items, first, names, plt, scale, tu, fig, axes


def _save(fig, plt, path: str | Path) -> Path:
    from matplotlib.text import Text

    for t in fig.findobj(Text):
        # names come from the user's files: a '$' in a scenario or controller name is text, not
        # the start of a formula
        t.set_parse_math(False)
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_cvs(runs: Mapping[str, Trajectory], path: str | Path, *, title: str | None = None,
             cvs: Sequence[str] | None = None, show_measured: bool = True) -> Path:
    """CVs of one or more runs with setpoints and shaded limit zones; returns the PNG path."""
    items, first, names, plt, scale, tu, fig, axes = _panels(runs, "y", cvs, "plot_cvs", "CV", 2.3)
    for ax, name in zip(axes[:, 0], names):
        lo = first.series("lo", name) if first.has("lo", name) else None
        hi = first.series("hi", name) if first.has("hi", name) else None
        t = first.t * scale
        ymin, ymax = np.inf, -np.inf
        for i, (label, tr) in enumerate(items):
            c = PALETTE[i % len(PALETTE)]
            y = tr.series("y", name)
            ax.plot(tr.t * scale, y, color=c, lw=1.6, label=f"{label}")
            if show_measured and tr.has("ym", name):
                ax.plot(tr.t * scale, tr.series("ym", name), color=c, lw=0.6, alpha=0.35)
            fin = y[np.isfinite(y)]
            if fin.size:
                ymin, ymax = min(ymin, fin.min()), max(ymax, fin.max())
            if tr.has("sp", name):
                ax.plot(tr.t * scale, tr.series("sp", name), color=c, lw=1.0, ls="--", alpha=0.8)
            _fault_spans(ax, tr, name, scale)
            if tr.has("sp", name):
                sp = tr.series("sp", name)
                fin = sp[np.isfinite(sp)]
                if fin.size:
                    ymin, ymax = min(ymin, fin.min()), max(ymax, fin.max())
        if not (np.isfinite(ymin) and np.isfinite(ymax)):
            ymin, ymax = -1.0, 1.0
        span = max(ymax - ymin, 1e-3 * max(abs(ymax), 1e-9))
        # a limit near the data widens the view; a far one (a physical bound) is only shaded
        near_lo, near_hi = ymin - 2 * span, ymax + 2 * span
        if lo is not None and hi is not None:
            lo_f = np.where(np.isfinite(lo), lo, np.nan)
            hi_f = np.where(np.isfinite(hi), hi, np.nan)
            if np.isfinite(lo_f).any() or np.isfinite(hi_f).any():
                lo_d = np.where(np.isfinite(lo_f), lo_f, near_lo - span)
                hi_d = np.where(np.isfinite(hi_f), hi_f, near_hi + span)
                ax.fill_between(t, lo_d, hi_d, step="post", color=_ZONE, alpha=0.25, lw=0,
                                label="limits zone")
                for arr in (lo_f, hi_f):
                    if np.isfinite(arr).any():
                        ax.step(t, arr, where="post", color="#4f7a57", lw=0.8, alpha=0.8)
                        fin = arr[np.isfinite(arr) & (arr >= near_lo) & (arr <= near_hi)]
                        if fin.size:
                            ymin, ymax = min(ymin, fin.min()), max(ymax, fin.max())
        pad = 0.08 * max(ymax - ymin, span)
        ax.set_ylim(ymin - pad, ymax + pad)
        ax.set_ylabel(name + _unit(first, name))
        ax.grid(True, lw=0.3, alpha=0.6)
    axes[0, 0].legend(loc="best", fontsize=8, ncol=min(4, len(items) + 1))
    axes[-1, 0].set_xlabel(f"time [{tu}]")
    fig.suptitle(f"{title or first.meta.get('model', '')}: controlled variables "
                 f"(solid: true, faint: measured, dashed: setpoint)", fontsize=10)
    _caution_note(fig)
    return _save(fig, plt, path)


def plot_mvs(runs: Mapping[str, Trajectory], path: str | Path, *, title: str | None = None,
             mvs: Sequence[str] | None = None) -> Path:
    """Applied MVs of one or more runs with their operating limits; returns the PNG path."""
    items, first, names, plt, scale, tu, fig, axes = _panels(runs, "u", mvs, "plot_mvs", "MV", 2.0)
    for ax, name in zip(axes[:, 0], names):
        for i, (label, tr) in enumerate(items):
            c = PALETTE[i % len(PALETTE)]
            ax.step(tr.t * scale, tr.series("u", name), where="post", color=c, lw=1.4, label=label)
            _fault_spans(ax, tr, name, scale)
        for kind in ("mvlo", "mvhi"):
            if first.has(kind, name):
                arr = first.series(kind, name)
                if np.isfinite(arr).any():
                    ax.step(first.t * scale, np.where(np.isfinite(arr), arr, np.nan), where="post",
                            color="#444444", lw=0.9, ls=":")
        ax.set_ylabel(name + _unit(first, name))
        ax.grid(True, lw=0.3, alpha=0.6)
    axes[0, 0].legend(loc="best", fontsize=8, ncol=min(4, len(items)))
    axes[-1, 0].set_xlabel(f"time [{tu}]")
    fig.suptitle(f"{title or first.meta.get('model', '')}: manipulated variables "
                 f"(dotted: operating limits)", fontsize=10)
    _caution_note(fig)
    return _save(fig, plt, path)


def _caution_note(fig) -> None:
    """A one-line footnote: a figure lifted out of its report still says what it is."""
    fig.text(0.995, 0.003, "simulation of a model only, not evidence that a controller is safe "
             "on a real unit", ha="right", va="bottom", fontsize=6.5, color="#666666")


def plot_comparison(runs: Mapping[str, Trajectory], out_dir: str | Path, *,
                    stem: str = "comparison", title: str | None = None) -> list[Path]:
    """Write ``<stem>_cvs.png`` and ``<stem>_mvs.png`` into *out_dir*; returns both paths."""
    out = Path(out_dir)
    return [plot_cvs(runs, out / f"{stem}_cvs.png", title=title),
            plot_mvs(runs, out / f"{stem}_mvs.png", title=title)]
