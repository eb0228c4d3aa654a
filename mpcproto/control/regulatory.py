r"""The regulatory layer a plant really runs: PID loops with feedforward, ratio, cascade,
override (selector) and split-range structures.

:class:`RegulatoryController` implements the controller protocol of :mod:`mpcproto.control.base`
like :class:`mpcproto.control.pid.PIDController`, so the simulator runs it unchanged.  Every loop
uses the one PID algorithm of :mod:`mpcproto.control.pid` (:func:`pid_output`: ideal form,
derivative on the measurement, back-calculation anti-windup) and every MV it commands goes through
the one projection onto the rate and hard limits (:func:`mpcproto.control.limits.project_value`):
a command outside a hard limit stays impossible.

Structures
----------
plain loop (:class:`~mpcproto.control.pid.PIDLoop`)
    one CV, one MV.
feedforward (:class:`Feedforward`)
    a measured DV, through a gain, a lead-lag ``(lead s + 1)/(lag s + 1)`` and a dead time, added
    to the output of the plain loop on ``cv`` (deviation from the DV's value at the start).  The
    sum goes through the loop's anti-windup: the integral tracks the limited *total* output, so a
    feedforward that drives the valve to a limit does not wind the integral up.  Design rule
    (:func:`~mpcproto.control.regulatory_settings.design_feedforward`): the ideal feedforward is :math:`-G_d/G_p`; for FOPDT models
    :math:`G_p = K_p e^{-\theta_p s}/(\tau_p s + 1)` and
    :math:`G_d = K_d e^{-\theta_d s}/(\tau_d s + 1)` its realizable part is
    gain :math:`-K_d/K_p`, lead :math:`\tau_p`, lag :math:`\tau_d`, dead time
    :math:`\max(0, \theta_d - \theta_p)` (the classic design rule of the feedforward chapter of
    Seborg, Edgar & Mellichamp, *Process Dynamics and Control*; from memory).  For two integrating
    channels the static part is the ratio of the slopes.
ratio (:class:`Ratio`)
    the MV is set to ``R * wild`` where ``wild`` is another MV's command (the flow it is blended
    with; its flow loop is taken as fast) or a measured DV, and the ratio ``R`` is the output of a
    slower trim loop on ``cv``.  The trim loop is tuned on the same step test as a plain loop on
    (cv, mv), its gain divided by the wild flow at the operating point (the trim loop's output is
    a ratio: ``d mv = wild * d R``).  Its anti-windup tracks the ratio actually applied,
    ``mv / wild``.
cascade (:class:`Cascade`)
    an outer loop on ``cv`` whose output is the setpoint of an inner loop on a secondary CV
    (``inner_cv``, e.g. a jacket temperature or the MV's own flow) that moves ``mv``.  Tuning
    (:func:`~mpcproto.control.regulatory_settings.regulatory_from_settings`): the inner loop
    first, from an MV step test; the outer loop on a step test of the *closed* inner loop (an
    inner-setpoint step on the nonlinear model, :mod:`mpcproto.control.step_tests`).
    When the inner loop is at a limit, the outer loop's integral tracks the secondary measurement
    (the inner setpoint it could actually reach).  The scenario's setpoint of ``inner_cv`` is not
    used.
override (:class:`Selector`)
    several loops share one MV; the lowest (``select = "min"``) or highest (``"max"``) of their
    outputs is applied.  Every loop's integral tracks the MV actually applied (back-calculation),
    so the loops not selected do not wind up and take over bumplessly.  A loop's reference is its
    CV's setpoint, or its CV's high or low limit (``reference = "high"``): an override that acts
    when its CV reaches the limit.
split range (:class:`SplitRange`)
    one loop's output, in percent (0 to 100), moves several valves; each valve goes linearly from
    ``at_start`` to ``at_end`` while the output goes from ``start`` to ``end`` % and stays at the
    end values outside that range (e.g. valve A 0-50 %, valve B 50-100 %).  The loop's output is
    limited to 0-100 % with anti-windup.  The loop is tuned on an MV step test of the first valve,
    its gain divided by that valve's slope (MV unit per %).

Every MV is owned by at most one structure; MVs owned by none stay at the operating point.
Status and diagnostics follow :class:`PIDController` (``loops_held``, ``loops_saturated``,
``integral.<loop>``; ``selected.<mv>``: the index of the loop in control of a selector).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..operating import OperatingPoint
from ..validation import Names, did_you_mean, fail, shown
from .base import STATUS_HOLD, STATUS_OK, ControlOutput, Measurement, Targets
from .limits import project_value
from .pid import PIDLoop, _LoopState, pid_output, readback_list

__all__ = ["Feedforward", "Ratio", "Cascade", "Selector", "SplitRange", "Valve",
           "RegulatoryController", "split_range_value", "REFERENCES"]

REFERENCES = ("setpoint", "high", "low")
SELECTS = ("min", "max")


def _num(v: Any, owner: str, key: str, where: str, cond, expect: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v) or not cond(v):
        raise fail(owner, key, expect, shown(v), note=where)
    return float(v)


@dataclass(frozen=True)
class Feedforward:
    """Feedforward from ``source`` onto the output of the loop on ``cv``:
    ``gain * (lead s + 1)/(lag s + 1) * e^(-dead_time s)`` (MV unit per source unit).  The source
    is a measured DV or another MV (a feed flow set by another loop: its flow as measured, i.e.
    the value applied over the last sample -- readback, else the last command)."""

    cv: str
    source: str
    gain: float
    lead: float = 0.0
    lag: float = 0.0
    dead_time: float = 0.0
    rule: str = ""

    def __post_init__(self) -> None:
        w = f"feedforward {self.cv}<-{self.source}"
        _num(self.gain, "Feedforward", "gain", w, math.isfinite, "a finite number")
        for k in ("lead", "lag", "dead_time"):
            _num(getattr(self, k), "Feedforward", k, w, lambda v: math.isfinite(v) and v >= 0,
                 "a finite number >= 0")
        if self.lead > 0 and self.lag == 0:
            raise fail("Feedforward", "lag", f"a lag > 0 with the lead ({self.lead:g}) (a pure "
                       f"lead is not realizable)", "0", "give 'lag' too or set lead = 0", note=w)

    def as_dict(self) -> dict[str, Any]:
        d = {"cv": self.cv, "source": self.source, "gain": self.gain, "lead": self.lead, "lag": self.lag,
             "dead_time": self.dead_time}
        if self.rule:
            d["rule"] = self.rule
        return d


@dataclass(frozen=True)
class Ratio:
    """MV ``loop.mv`` = R * ``wild`` (an MV or a measured DV); R from the trim loop ``loop`` on
    ``loop.cv`` (its gain in ratio units per CV unit)."""

    loop: PIDLoop
    wild: str

    def as_dict(self) -> dict[str, Any]:
        return {"mv": self.loop.mv, "wild": self.wild, "trim_loop": self.loop.as_dict()}


@dataclass(frozen=True)
class Cascade:
    """Outer loop ``outer`` (cv -> setpoint of ``inner.cv``) over inner loop ``inner`` (-> MV)."""

    outer: PIDLoop
    inner: PIDLoop

    def __post_init__(self) -> None:
        if self.outer.mv != self.inner.cv:
            raise fail("Cascade", "outer.mv",
                       f"the inner loop's CV '{self.inner.cv}' (the outer loop sets its setpoint)",
                       f"'{self.outer.mv}'", note=f"cascade on '{self.outer.cv}'")
        if self.outer.cv == self.inner.cv:
            raise fail("Cascade", "inner.cv",
                       "another CV than the outer loop's (a secondary measurement)",
                       f"the same CV '{self.inner.cv}'", note=f"cascade on '{self.outer.cv}'")

    def as_dict(self) -> dict[str, Any]:
        return {"cv": self.outer.cv, "inner_cv": self.inner.cv, "mv": self.inner.mv,
                "outer_loop": self.outer.as_dict(), "inner_loop": self.inner.as_dict()}


@dataclass(frozen=True)
class Selector:
    """Loops sharing one MV; the ``select`` ("min"/"max") of their outputs is applied.
    ``references[i]``: "setpoint", "high" or "low" (the CV limit loop i holds)."""

    mv: str
    select: str
    loops: tuple[PIDLoop, ...]
    references: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        w = f"selector on '{self.mv}'"
        if self.select not in SELECTS:
            raise fail("Selector", "select", "one of min, max", repr(self.select),
                       did_you_mean(self.select, SELECTS), note=w)
        if len(self.loops) < 2:
            raise fail("Selector", "loops", "at least two loops", f"{len(self.loops)}", note=w)
        for lp in self.loops:
            if lp.mv != self.mv:
                raise fail("Selector", "loops", f"loops that all move '{self.mv}'",
                           f"the loop on '{lp.cv}' moving '{lp.mv}'", note=w)
        refs = self.references or ("setpoint",) * len(self.loops)
        if len(refs) != len(self.loops):
            raise fail("Selector", "references", f"one reference per loop ({len(self.loops)})",
                       f"{len(refs)}", note=w)
        for r in refs:
            if r not in REFERENCES:
                raise fail("Selector", "references", f"one of {', '.join(REFERENCES)}", repr(r),
                           did_you_mean(r, REFERENCES), note=w)
        object.__setattr__(self, "references", tuple(refs))

    def as_dict(self) -> dict[str, Any]:
        return {"mv": self.mv, "select": self.select,
                "loops": [{**lp.as_dict(), "reference": r} for lp, r in zip(self.loops, self.references)]}


@dataclass(frozen=True)
class Valve:
    """One valve of a split range: ``mv`` goes from ``at_start`` to ``at_end`` while the output
    goes from ``start`` to ``end`` percent."""

    mv: str
    start: float
    end: float
    at_start: float
    at_end: float

    def __post_init__(self) -> None:
        w = f"split-range valve '{self.mv}'"
        for k in ("start", "end"):
            _num(getattr(self, k), "Valve", k, w, lambda v: 0 <= v <= 100,
                 "a number in [0, 100] (%)")
        for k in ("at_start", "at_end"):
            _num(getattr(self, k), "Valve", k, w, math.isfinite, "a finite number")
        if not self.end > self.start:
            raise fail("Valve", "end", f"an end above 'start' ({self.start:g})", f"{self.end:g}",
                       note=w)

    def value(self, c: float) -> float:
        """The valve's MV for controller output *c* (%)."""
        f = min(max((c - self.start) / (self.end - self.start), 0.0), 1.0)
        return self.at_start + f * (self.at_end - self.at_start)

    @property
    def slope(self) -> float:
        return (self.at_end - self.at_start) / (self.end - self.start)

    def as_dict(self) -> dict[str, Any]:
        return {"mv": self.mv, "start": self.start, "end": self.end, "at_start": self.at_start,
                "at_end": self.at_end}


def split_range_value(valves: Sequence[Valve], c: float) -> dict[str, float]:
    """Every valve's MV for controller output *c* (%)."""
    return {v.mv: v.value(c) for v in valves}


@dataclass(frozen=True)
class SplitRange:
    """Loop ``loop`` (output in %, 0-100) on the valves ``valves``."""

    loop: PIDLoop
    valves: tuple[Valve, ...]

    def __post_init__(self) -> None:
        if not self.valves:
            raise fail("SplitRange", "valves", "at least one valve", "none",
                       note=f"split range on '{self.loop.cv}'")
        mvs = [v.mv for v in self.valves]
        if len(set(mvs)) != len(mvs):
            raise fail("SplitRange", "valves", "valves on different MVs",
                       f"an MV listed twice ({', '.join(mvs)})",
                       note=f"split range on '{self.loop.cv}'")

    def as_dict(self) -> dict[str, Any]:
        return {"cv": self.loop.cv, "loop": self.loop.as_dict(),
                "valves": [v.as_dict() for v in self.valves]}


# ----------------------------------------------------------------------------------- blocks
@dataclass
class _Block:
    """One PID loop inside the structure, with where its output goes."""

    loop: PIDLoop
    ci: int                      # index of the measured CV
    kind: str                    # "mv", "ratio", "outer", "select", "split"
    label: str
    mj: int = -1                 # the MV it commands (mv, ratio, select)
    ref: str = "setpoint"
    wild: tuple[str, int] = ("", -1)   # ("mv"|"dv", index) for a ratio
    ff: list = field(default_factory=list)      # [_FFState]
    inner: "_Block | None" = None               # for an outer loop: its inner loop
    outer: "_Block | None" = None               # for an inner loop: the loop setting its setpoint
    valves: tuple = ()                          # split range: ((Valve, mj), ...)
    group: int = -1                             # selector index
    st: _LoopState = field(default_factory=_LoopState)
    v: float = math.nan          # unlimited output this sample (NaN: held)
    bias: float = 0.0
    wild_prev: float = math.nan
    out: float = math.nan        # selector member / split range: its output this sample


@dataclass
class _FFState:
    ff: Feedforward
    di: int
    src: str = "dv"              # "dv" or "mv"
    d0: float = math.nan
    x: float = math.nan          # lag state
    hist: list = field(default_factory=list)   # (t, d)
    last: float = 0.0

    def value(self, t: float, d: float) -> float:
        f = self.ff
        if math.isfinite(d):
            self.hist.append((t, d))
        # the value seen through the dead time (the oldest sample at or before t - dead_time)
        dd = math.nan
        while len(self.hist) > 1 and self.hist[1][0] <= t - f.dead_time + 1e-9:
            self.hist.pop(0)
        if self.hist and self.hist[0][0] <= t - f.dead_time + 1e-9:
            dd = self.hist[0][1] - self.d0
        if not math.isfinite(dd):
            return self.last            # no fresh value: hold the feedforward
        if f.lag > 0:
            h = t - self._t if math.isfinite(self._t) else 0.0
            a = math.exp(-h / f.lag)
            self.x = dd if not math.isfinite(self.x) else a * self.x + (1 - a) * dd
            out = f.lead / f.lag * dd + (1 - f.lead / f.lag) * self.x
        else:
            out = dd
        self._t = t
        self.last = f.gain * out
        return self.last

    _t: float = math.nan


class RegulatoryController:
    """PID loops with feedforward, ratio, cascade, override and split-range structures (module
    docstring); implements the controller protocol.

    Parameters
    ----------
    cv_names, mv_names, dv_names : sequence of str
        The model's CVs, MVs and DVs in declaration order.
    measured_dvs : sequence of str
        The DVs the controller may read (feedforward, ratio on a DV).
    loops, feedforward, ratios, cascades, selectors, split_ranges : sequences
        The structures; every MV owned by at most one of them.
    """

    def __init__(self, cv_names: Sequence[str], mv_names: Sequence[str],
                 dv_names: Sequence[str] = (), measured_dvs: Sequence[str] = (), *,
                 loops: Sequence[PIDLoop] = (), feedforward: Sequence[Feedforward] = (),
                 ratios: Sequence[Ratio] = (), cascades: Sequence[Cascade] = (),
                 selectors: Sequence[Selector] = (), split_ranges: Sequence[SplitRange] = (),
                 name: str = "pid", tuning: Mapping[str, Any] | None = None):
        self.name = str(name)
        self.cv_names, self.mv_names = tuple(cv_names), tuple(mv_names)
        self.dv_names, self.measured_dvs = tuple(dv_names), tuple(measured_dvs)
        self.loops, self.feedforward = tuple(loops), tuple(feedforward)
        self.ratios, self.cascades = tuple(ratios), tuple(cascades)
        self.selectors, self.split_ranges = tuple(selectors), tuple(split_ranges)
        self.tuning = dict(tuning or {})
        owner: dict[str, str] = {}

        def cv(name: str, where: str) -> int:
            if name not in self.cv_names:
                raise fail("RegulatoryController", "cv", Names("CV", self.cv_names).describe(),
                           shown(name), did_you_mean(name, self.cv_names), note=where)
            return self.cv_names.index(name)

        def mv(name: str, where: str) -> int:
            if name not in self.mv_names:
                raise fail("RegulatoryController", "mv", Names("MV", self.mv_names).describe(),
                           shown(name), did_you_mean(name, self.mv_names), note=where)
            if name in owner:
                raise fail("RegulatoryController", "mv", "an MV moved by one structure only (use "
                           "a selector to share an MV)",
                           f"'{name}', already moved by {owner[name]}", note=where)
            owner[name] = where
            return self.mv_names.index(name)

        def dv(name: str, where: str, key: str) -> int:
            if name not in self.dv_names:
                raise fail("RegulatoryController", key, Names("DV", self.dv_names).describe(),
                           shown(name), did_you_mean(name, self.dv_names), note=where)
            if name not in self.measured_dvs:
                raise fail("RegulatoryController", key, f"a measured DV (measured: "
                           f"{', '.join(self.measured_dvs) or 'none'}; a controller can only use "
                           f"those)", f"'{name}', not measured", note=where)
            return self.dv_names.index(name)

        blocks: list[_Block] = []
        plain: dict[str, _Block] = {}
        for lp in self.loops:
            b = _Block(lp, cv(lp.cv, f"loop {lp.cv}<-{lp.mv}"), "mv", f"{lp.mv}",
                       mj=mv(lp.mv, f"loop {lp.cv}<-{lp.mv}"))
            blocks.append(b)
            plain[lp.cv] = b
        for c in self.cascades:
            w = f"cascade on '{c.outer.cv}'"
            inner = _Block(c.inner, cv(c.inner.cv, w), "mv", f"{c.inner.mv}", mj=mv(c.inner.mv, w))
            outer = _Block(c.outer, cv(c.outer.cv, w), "outer", f"{c.outer.cv}.setpoint_of_"
                           f"{c.inner.cv}", inner=inner)
            inner.outer = outer
            blocks += [outer, inner]
            plain.setdefault(c.inner.cv, inner)
        for g, s in enumerate(self.selectors):
            w = f"selector on '{s.mv}'"
            j = mv(s.mv, w)
            for k, (lp, r) in enumerate(zip(s.loops, s.references)):
                blocks.append(_Block(lp, cv(lp.cv, w), "select", f"{s.mv}.{k}", mj=j, ref=r, group=g))
        for s in self.split_ranges:
            w = f"split range on '{s.loop.cv}'"
            vs = tuple((v, mv(v.mv, w)) for v in s.valves)
            blocks.append(_Block(s.loop, cv(s.loop.cv, w), "split", f"{s.loop.cv}.split_range",
                                 valves=vs))
        wild_mvs = []
        for r in self.ratios:
            w = f"ratio on '{r.loop.mv}'"
            if r.wild in self.mv_names:
                wild = ("mv", self.mv_names.index(r.wild))
                wild_mvs.append(r.wild)
            else:
                wild = ("dv", dv(r.wild, w + " (wild flow)", "wild"))
            blocks.append(_Block(r.loop, cv(r.loop.cv, w), "ratio", f"{r.loop.mv}.ratio",
                                 mj=mv(r.loop.mv, w), wild=wild))
        for r in self.ratios:
            if r.wild in [x.loop.mv for x in self.ratios]:
                raise fail("RegulatoryController", "ratios", "a wild flow not set by another ratio",
                           f"'{r.wild}', itself set by a ratio",
                           "chain ratios on the primary flow instead", note=f"ratio on '{r.loop.mv}'")
        for f in self.feedforward:
            w = f"feedforward {f.cv}<-{f.source}"
            b = plain.get(f.cv)
            if b is None:
                raise fail("RegulatoryController", "feedforward",
                           f"a plain loop (or cascade inner loop) on '{f.cv}' to add it to "
                           f"(loops on: {', '.join(plain) or 'none'})", "none", note=w)
            if f.source in self.mv_names:
                if f.source == b.loop.mv:
                    raise fail("RegulatoryController", "feedforward",
                               "a source other than the loop's own MV", f"'{f.source}'", note=w)
                b.ff.append(_FFState(f, self.mv_names.index(f.source), "mv"))
            else:
                b.ff.append(_FFState(f, dv(f.source, w, "source")))
        if not blocks:
            raise fail("RegulatoryController", "loops",
                       "at least one loop or structure (loops, ratios, cascades, selectors, "
                       "split_ranges)", "none")
        # order: outer loops, then everything that writes an MV, ratios last (they read the wild
        # MV's command of this sample)
        rank = {"outer": 0, "mv": 1, "select": 1, "split": 1, "ratio": 2}
        self._blocks = sorted(blocks, key=lambda b: rank[b.kind])
        self._u0 = np.zeros(len(self.mv_names))
        self._started = False

    @classmethod
    def for_model(cls, model: Any, **kw: Any) -> "RegulatoryController":
        """Structures on a model's CVs, MVs and measured DVs."""
        return cls(model.cv_names, model.mv_names, model.dv_names, model.measured_dv_names, **kw)

    # ------------------------------------------------------------------------------ reporting
    def describe(self) -> dict[str, Any]:
        """What the controller has: structure, measurements used and tuning (JSON-able)."""
        cvs = sorted({b.loop.cv for b in self._blocks})
        dvs = sorted({f.source for f in self.feedforward if f.source in self.dv_names}
                     | {r.wild for r in self.ratios if r.wild in self.dv_names})
        flows = sorted({f.source for f in self.feedforward if f.source in self.mv_names}
                       | {r.wild for r in self.ratios if r.wild in self.mv_names})
        structure = []
        if self.loops:
            structure.append(f"{len(self.loops)} single loop(s)")
        for f in self.feedforward:
            structure.append(f"feedforward {f.source} -> {f.cv} loop")
        for r in self.ratios:
            structure.append(f"ratio {r.loop.mv}/{r.wild} trimmed by {r.loop.cv}")
        for c in self.cascades:
            structure.append(f"cascade {c.outer.cv} -> {c.inner.cv} -> {c.inner.mv}")
        for s in self.selectors:
            structure.append(f"{s.select} selector on {s.mv} ({', '.join(lp.cv for lp in s.loops)})")
        for s in self.split_ranges:
            structure.append(f"split range {s.loop.cv} -> {', '.join(v.mv for v in s.valves)}")
        return {"kind": "pid", "structure": structure, "measured_cvs": cvs,
                "measured_dvs_used": dvs, "mv_flows_used": flows,
                "tuning": {"loops": [lp.as_dict() for lp in self.loops],
                           "feedforward": [f.as_dict() for f in self.feedforward],
                           "ratios": [r.as_dict() for r in self.ratios],
                           "cascades": [c.as_dict() for c in self.cascades],
                           "selectors": [s.as_dict() for s in self.selectors],
                           "split_ranges": [s.as_dict() for s in self.split_ranges],
                           **self.tuning}}

    # ------------------------------------------------------------------------------ running
    def reset(self, op: OperatingPoint, t0: float = 0.0) -> None:
        self._u0 = np.asarray(op.u, float).copy()
        y0 = np.asarray(op.y, float)
        d0 = np.asarray(op.d, float) if getattr(op, "d", None) is not None else np.zeros(0)
        for b in self._blocks:
            b.st = _LoopState()
            b.v, b.bias, b.wild_prev = math.nan, 0.0, math.nan
            if b.kind in ("mv", "select"):
                b.st.u = float(self._u0[b.mj])
            elif b.kind == "outer":
                b.st.u = float(y0[b.inner.ci])
            elif b.kind == "ratio":
                kind, i = b.wild
                wv = float(self._u0[i] if kind == "mv" else d0[i])
                if abs(wv) < 1e-12:
                    raise fail(f"RegulatoryController '{self.name}'", f"ratios.{b.loop.mv}.wild",
                               "a wild flow other than 0 at the operating point (the ratio is "
                               "undefined at 0)", f"{wv:g}")
                b.st.u = float(self._u0[b.mj]) / wv
            elif b.kind == "split":
                b.st.u = self._split_start(b)
            for f in b.ff:
                f.d0 = (float(self._u0[f.di]) if f.src == "mv" else
                        float(d0[f.di]) if f.di < d0.size else math.nan)
                f.x, f.hist, f.last, f._t = math.nan, [], 0.0, math.nan
        self._u_last = self._u0.tolist()
        self._started = True

    def _split_start(self, b: _Block) -> float:
        """The split-range output (%) matching the valves at the operating point (the first
        valve whose operating value lies strictly inside its travel; else the first valve)."""
        for v, j in b.valves:
            u = float(self._u0[j])
            lo, hi = sorted((v.at_start, v.at_end))
            if lo < u < hi:
                return v.start + (u - v.at_start) / v.slope
        v, j = b.valves[0]
        u = float(self._u0[j])
        return min(max(v.start + (u - v.at_start) / v.slope if v.slope else v.start, 0.0), 100.0)

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None) -> ControlOutput:
        """One sample of every structure (module docstring); ``u_applied``: MV readback."""
        if not self._started:
            raise fail(f"RegulatoryController '{self.name}'", "step()",
                       "a call of reset(op) before step()",
                       "step() called first", code="not_started")
        ua = readback_list(u_applied, len(self.mv_names), f"RegulatoryController '{self.name}'")
        ys, sps = meas.y.tolist(), targets.setpoint.tolist()
        lows, highs = targets.cv_low.tolist(), targets.cv_high.tolist()
        fresh = meas.fresh.tolist()
        dvl = np.asarray(dv, float).reshape(-1).tolist() if dv is not None else []
        u_ask = self._u0.tolist()
        lo, hi = targets.mv_low.tolist(), targets.mv_high.tolist()
        rate = targets.mv_rate.tolist() if targets.mv_rate is not None else [math.inf] * len(lo)
        held = 0
        sel: dict[int, list[_Block]] = {}
        chosen: dict[int, int] = {}
        for b in self._blocks:
            lp, st = b.loop, b.st
            y = ys[b.ci]
            r = {"setpoint": sps, "high": highs, "low": lows}[b.ref][b.ci]
            if b.kind == "mv" and b.outer is not None:
                r = b.outer.st.u if not math.isfinite(b.outer.v) else b.outer.v
            bias = sum(f.value(t, (ua[f.di] if ua is not None and math.isfinite(ua[f.di])
                                   else self._u_last[f.di]) if f.src == "mv" else
                               dvl[f.di] if f.di < len(dvl) else math.nan) for f in b.ff)
            wild = math.nan
            if b.kind == "ratio":
                kind, i = b.wild
                # the wild flow's command of this sample, as it will be sent (projected)
                wild = (project_value(u_ask[i], self._u_last[i], lo[i], hi[i], rate[i])
                        if kind == "mv" else (dvl[i] if i < len(dvl) else math.nan))
                if not math.isfinite(wild):
                    wild = b.wild_prev
            if not math.isfinite(y) or not math.isfinite(r) or (lp.on_fresh and not fresh[b.ci]
                                                                 and st.started):
                held += not math.isfinite(y)
                b.v = math.nan
                out = st.u - b.bias + bias         # hold the feedback part, keep feedforward
            else:
                u_read = math.nan
                if ua is not None and b.kind in ("mv", "select"):
                    u_read = ua[b.mj]
                elif ua is not None and b.kind == "ratio" and abs(b.wild_prev) > 1e-12:
                    u_read = ua[b.mj] / b.wild_prev
                b.v = out = pid_output(lp, st, t, y, r, u_read, bias)
            b.bias = bias
            if b.kind == "outer":
                continue
            if b.kind == "ratio":
                b.wild_prev = wild
                u_ask[b.mj] = out * wild if math.isfinite(wild) else st.u * b.wild_prev
            elif b.kind == "mv":
                u_ask[b.mj] = out
            elif b.kind == "select":
                b.out = out
                bs = sel.setdefault(b.group, [])
                bs.append(b)
                if len(bs) == len(self.selectors[b.group].loops):     # all in: select
                    pick = min if self.selectors[b.group].select == "min" else max
                    k = pick(range(len(bs)), key=lambda i: bs[i].out)
                    chosen[b.group] = k
                    u_ask[b.mj] = bs[k].out
            elif b.kind == "split":
                b.out = c = min(max(out, 0.0), 100.0)
                for v, j in b.valves:
                    u_ask[j] = v.value(c)
        ul = [project_value(a, p, lo[j], hi[j], rate[j],
                            what=f"RegulatoryController '{self.name}' ({self.mv_names[j]})")
              for j, (a, p) in enumerate(zip(u_ask, self._u_last))]
        saturated = 0
        # tracking: every loop's integral follows what was actually applied, in its own unit
        for b in reversed(self._blocks):      # inner loops before their outer loops
            st = b.st
            if b.kind in ("mv", "select"):
                applied = ul[b.mj]
            elif b.kind == "ratio":
                applied = ul[b.mj] / b.wild_prev if abs(b.wild_prev) > 1e-12 else st.u
            elif b.kind == "split":
                applied = b.out
            else:                               # outer: the inner loop at a limit -> its PV
                inn = b.inner
                at_limit = math.isfinite(inn.v) and abs(ul[inn.mj] - inn.v) > 1e-12 * max(1.0, abs(inn.v))
                applied = ys[inn.ci] if at_limit and math.isfinite(ys[inn.ci]) else (
                    b.v if math.isfinite(b.v) else st.u)
            if math.isfinite(b.v):
                saturated += abs(applied - b.v) > 1e-12 * max(1.0, abs(b.v))
                st.aw_prev = applied - b.v
            st.u = applied
        self._u_last = ul
        diag: dict[str, float] = {"loops_held": held, "loops_saturated": saturated}
        for b in self._blocks:
            diag[f"integral.{b.label}"] = b.st.i
        for g, k in chosen.items():
            diag[f"selected.{self.selectors[g].mv}"] = float(k)
        return ControlOutput(u=np.array(ul), status=STATUS_HOLD if held else STATUS_OK,
                             diagnostics=diag)

