"""Run the same scenario with several controllers and put their KPIs side by side.

Every controller sees the same plant, the same disturbances and the same measurement-noise
sequence: each run is started from the same seed (see :mod:`mpcproto.sim.closed_loop`), so the
differences in the scorecard come from the controllers alone.

Example
-------
``compare(plant, {"mpc": mpc, "pid": pid}, op=op, Ts=10, duration=3600, rng=7, dvs=...)``
returns a :class:`Comparison`; ``comparison.scorecard_text()`` prints the table and
``comparison.plot(out_dir)`` writes the PNG figures.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .analysis import summarize
from .control.describe import describe_controller
from .validation import fail
from .trajectory import Trajectory

__all__ = ["compare", "Comparison", "scorecard", "describe_controller", "fairness_notes",
           "tuning_text"]

_CV_KPIS = ("iae", "ise", "itae", "settling_time", "overshoot", "max_abs_error")
_MV_KPIS = ("total_travel", "time_at_limit")
_SOLVER = ("failures", "fallbacks", "slow_steps", "median_solve_ms", "p95_solve_ms", "worst_fraction")


def scorecard(summaries: Mapping[str, Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Rows ``{"group", "variable", "metric", <label>: value, ...}`` from per-controller summaries.

    Groups: ``cv`` (per CV KPIs), ``mv`` (per MV travel and time at a limit), ``violations``
    (count, total integral and worst peak excess per CV), ``solver`` (health figures) and ``run``
    (status).  Lower is better for every numeric row.
    """
    labels = list(summaries)
    if not labels:
        raise fail("scorecard()", "summaries", "at least one controller summary", "none")
    first = summaries[labels[0]]
    rows: list[dict[str, Any]] = []
    for cv in first["kpi"]["cv"]:
        for k in _CV_KPIS:
            rows.append({"group": "cv", "variable": cv, "metric": k,
                         **{lb: summaries[lb]["kpi"]["cv"].get(cv, {}).get(k) for lb in labels}})
    for mv in first["kpi"]["mv"]:
        for k in _MV_KPIS:
            rows.append({"group": "mv", "variable": mv, "metric": k,
                         **{lb: summaries[lb]["kpi"]["mv"].get(mv, {}).get(k) for lb in labels}})
    for cv in first["kpi"]["cv"]:
        for k in ("events", "integral", "peak_excess"):
            vals = {}
            for lb in labels:
                ev = [e for e in summaries[lb]["violations"] if e["variable"] == cv]
                vals[lb] = (len(ev) if k == "events" else
                            float(sum(e["integral"] for e in ev)) if k == "integral" else
                            float(max((e["peak_excess"] for e in ev), default=0.0)))
            rows.append({"group": "violations", "variable": cv, "metric": k, **vals})
    for k in _SOLVER:
        rows.append({"group": "solver", "variable": "", "metric": k,
                     **{lb: summaries[lb]["solver"].get(k) for lb in labels}})
    rows.append({"group": "run", "variable": "", "metric": "status",
                 **{lb: summaries[lb].get("run", {}).get("status") for lb in labels}})
    return rows


def tuning_text(inputs: Mapping[str, Any]) -> str:
    """The tuning of a :func:`describe_controller` answer in one line: ``cv<-mv K=.. Ti=..`` per
    loop (ratio trims, cascade loops, selector loops and split ranges too), feedforward gains and
    lead-lags, or the predictive controller's horizons."""
    t = inputs.get("tuning") or {}

    def loop(d: Mapping[str, Any], tag: str = "") -> str:
        ti = d.get("integral_time")
        td = d.get("derivative_time") or 0.0
        return (f"{d.get('cv')}<-{d.get('mv')}{tag} K={_fmt(d.get('gain'))}"
                f"{' Ti=' + _fmt(ti) if ti is not None else ''}{' Td=' + _fmt(td) if td else ''}")

    parts = [loop(d) for d in t.get("loops") or []]
    parts += [loop(r["trim_loop"], " (ratio trim)") for r in t.get("ratios") or []]
    for c in t.get("cascades") or []:
        parts += [loop(c["outer_loop"], " (outer)"), loop(c["inner_loop"], " (inner)")]
    for s in t.get("selectors") or []:
        parts += [loop(d, f" ({s.get('select')} select, {d.get('reference')})") for d in s["loops"]]
    parts += [loop(s["loop"], " (split range, %)") for s in t.get("split_ranges") or []]
    parts += [f"feedforward {f.get('source')}->{f.get('cv')} gain={_fmt(f.get('gain'))}"
              + (f" lead={_fmt(f.get('lead'))} lag={_fmt(f.get('lag'))}" if f.get("lag") else "")
              + (f" dead time={_fmt(f.get('dead_time'))}" if f.get("dead_time") else "")
              for f in t.get("feedforward") or []]
    if "horizon" in t:
        parts.append(f"horizon={_fmt(t.get('horizon'))} control horizon="
                     f"{_fmt(t.get('control_horizon') or t.get('horizon'))}")
    if t.get("cv"):
        parts.append("CV scale/weight/priority " + ", ".join(
            f"{n} {_fmt(c.get('scale'))}/{_fmt(c.get('weight'))}/{_fmt(c.get('priority'))}"
            for n, c in t["cv"].items()))
    if t.get("mv"):
        parts.append("MV scale/move weight " + ", ".join(
            f"{n} {_fmt(v.get('scale'))}/{_fmt(v.get('move_weight'))}" for n, v in t["mv"].items()))
    rule = t.get("move_weight_default") or {}
    if rule.get("used_by"):
        parts.append(f"default move weight 0.1 x (Ts_ref/Ts)^2 = {_fmt(rule.get('move_weight'))} "
                     f"on {', '.join(rule['used_by'])} (Ts_ref = "
                     f"{_fmt(rule.get('reference_sample_time'))}: the horizon "
                     f"{_fmt(rule.get('horizon_time'))} over 40 samples)")
    return "; ".join(parts) or "-"


def fairness_notes(inputs: Mapping[str, Mapping[str, Any]]) -> list[str]:
    """One sentence per measured DV that some controllers of a comparison used and others did
    not (the comparison is then not like for like on that disturbance)."""
    labels = list(inputs)
    used = {lb: set(inputs[lb].get("measured_dvs_used") or ()) for lb in labels}
    notes = []
    for dv in sorted(set().union(*used.values()) if used else ()):
        yes = [lb for lb in labels if dv in used[lb]]
        no = [lb for lb in labels if dv not in used[lb]]
        if yes and no:
            notes.append(f"not like for like: {', '.join(yes)} used the measured DV '{dv}'; "
                         f"{', '.join(no)} did not.")
    return notes


def _fmt(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, str):
        return v
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    v = float(v)
    if not math.isfinite(v):
        return "-"
    return f"{v:.4g}"


@dataclass
class Comparison:
    """The runs of a comparison: trajectories and summaries by controller label."""

    trajectories: dict[str, Trajectory]
    summaries: dict[str, dict[str, Any]]
    seed: Any = None
    meta: dict[str, Any] = field(default_factory=dict)

    @property
    def labels(self) -> list[str]:
        return list(self.trajectories)

    def scorecard(self) -> list[dict[str, Any]]:
        return scorecard(self.summaries)

    def scorecard_text(self) -> str:
        """The scorecard as an aligned plain-text table (lower is better)."""
        rows = self.scorecard()
        head = ["group", "variable", "metric", *self.labels]
        body = [[r["group"], r["variable"], r["metric"], *(_fmt(r[lb]) for lb in self.labels)]
                for r in rows]
        widths = [max(len(str(x)) for x in col) for col in zip(head, *body)]
        line = lambda cells: "  ".join(str(c).ljust(w) for c, w in zip(cells, widths))  # noqa: E731
        first = next(iter(self.trajectories.values()), None)
        tu = self.meta.get("time_unit") or (first.meta.get("time_unit") if first is not None
                                             else None) or "time unit"
        key = (f"units: iae = CV unit x {tu}; ise = CV unit squared x {tu}; itae = CV unit x {tu} "
               f"squared; settling_time, time_at_limit in {tu}; overshoot as a fraction of the "
               f"setpoint step; max_abs_error, peak_excess in the CV unit; total_travel in the MV "
               f"unit; violation integral in CV unit x {tu}; *_solve_ms in ms, worst_fraction of the "
               f"sample time. Simulation results only.")
        inputs = self.meta.get("inputs") or {}
        had = [f"{lb}: {'; '.join(d.get('structure') or ['?'])}; measured DVs used: "
               f"{', '.join(d.get('measured_dvs_used') or []) or 'none'}"
               for lb, d in inputs.items()]
        notes = fairness_notes(inputs) if inputs else []
        return "\n".join([line(head), line(["-" * w for w in widths])] + [line(b) for b in body]
                         + had + notes + [key])

    def to_dict(self) -> dict[str, Any]:
        """JSON-able: per-label summaries plus the scorecard rows."""
        return {"seed": self.seed, "controllers": self.summaries, "scorecard": self.scorecard(),
                **self.meta}

    def plot(self, out_dir: str | Path, *, stem: str = "comparison",
             title: str | None = None) -> list[Path]:
        """CV and MV figures of every run overlaid (see :func:`mpcproto.report.plot_comparison`)."""
        from .report.plots import plot_comparison

        return plot_comparison(self.trajectories, out_dir, stem=stem, title=title)

    def save_csv(self, out_dir: str | Path) -> list[Path]:
        """One ``trajectory_<label>.csv`` per run."""
        out = Path(out_dir)
        return [tr.to_csv(out / f"trajectory_{lb}.csv") for lb, tr in self.trajectories.items()]


def compare(plant_model: Any, controllers: Mapping[str, Any] | Sequence[Any], *, op: Any,
            Ts: float, duration: float, rng: int | np.random.SeedSequence | None = 0,
            summary_options: Mapping[str, Any] | None = None, **sim_kwargs: Any) -> Comparison:
    """Run :func:`mpcproto.sim.simulate` once per controller with identical inputs and seed.

    Parameters
    ----------
    controllers : mapping label -> controller, or a sequence (labels from ``controller.name``)
    rng : int or SeedSequence
        The one seed every run starts from (a Generator is refused: it would give each run a
        different stream).
    summary_options : mapping, optional
        Keyword arguments of :func:`mpcproto.analysis.summarize` (bands, tolerance...).
    **sim_kwargs
        Every other keyword of :class:`mpcproto.sim.ClosedLoop` (dvs, setpoints, instruments...).
    """
    from .sim.closed_loop import simulate

    if isinstance(rng, np.random.Generator):
        raise fail("compare()", "rng",
                   "an int seed or a SeedSequence, so that every controller sees the same noise",
                   "a Generator")
    if not isinstance(controllers, Mapping):
        items: dict[str, Any] = {}
        for c in controllers:
            lb = str(getattr(c, "name", type(c).__name__))
            if lb in items:
                raise fail("compare()", "controllers", "controllers with distinct names",
                           f"two controllers named '{lb}'",
                           "pass a mapping {label: controller} with distinct labels")
            items[lb] = c
        controllers = items
    if not controllers:
        raise fail("compare()", "controllers", "at least one controller", "none")
    trajs: dict[str, Trajectory] = {}
    sums: dict[str, dict[str, Any]] = {}
    for label, ctl in controllers.items():
        seed = rng if not isinstance(rng, np.random.SeedSequence) else np.random.SeedSequence(
            rng.entropy, spawn_key=rng.spawn_key)
        tr = simulate(plant_model, ctl, op=op, Ts=Ts, duration=duration, rng=seed, **sim_kwargs)
        tr.meta["controller"] = str(label)
        trajs[str(label)] = tr
        sums[str(label)] = summarize(tr, **dict(summary_options or {}))
    inputs = {str(lb): describe_controller(c, plant_model) for lb, c in controllers.items()}
    return Comparison(trajectories=trajs, summaries=sums,
                      seed=rng if isinstance(rng, (int, type(None))) else str(rng),
                      meta={"inputs": inputs})
