"""The regulatory layer's settings: the structure keys of the PID settings (``feedforward``,
``ratio``, ``cascade``, ``override``, ``split_range``; docs/scenario-format.md) checked and turned
into a :class:`~mpcproto.control.regulatory.RegulatoryController`, with the step tests its design
rules need (MV and DV step tests of the nonlinear model; the closed inner loop's step test for a
cascade, :func:`mpcproto.control.step_tests.closed_inner_step_test`) and the feedforward design
rule :func:`design_feedforward` (see the module docstring of :mod:`mpcproto.control.regulatory`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._specs import choice, number, refuse_unknown_keys, shown
from ..exceptions import SettingsError, join_key
from ..model import suggest
from ..validation import Names, check, fail
from .pid import PIDLoop
from .regulatory import (REFERENCES, SELECTS, Cascade, Feedforward, Ratio, RegulatoryController,
                         Selector, SplitRange, Valve)
from .step_tests import closed_inner_step_test

__all__ = ["design_feedforward", "check_structure_settings", "regulatory_from_settings"]

# ------------------------------------------------------------------------------------ design
def design_feedforward(gp: Any, gd: Any, *, cv: str, source: str) -> Feedforward:
    """The realizable part of ``-Gd/Gp`` for two fitted models (:class:`ProcessFit`; module
    docstring): FOPDT/FOPDT -> gain ``-Kd/Kp``, lead ``tau_p``, lag ``tau_d``, dead time
    ``max(0, theta_d - theta_p)``; integrating/integrating -> the static ratio of the slopes."""
    kinds = (gp.kind, gd.kind)
    dt = max(0.0, gd.dead_time - gp.dead_time)
    if kinds == ("fopdt", "fopdt"):
        return Feedforward(cv, source, -gd.gain / gp.gain, lead=gp.time_constants[0],
                           lag=gd.time_constants[0], dead_time=dt, rule="-Gd/Gp (FOPDT lead-lag)")
    if kinds == ("integrating", "integrating"):
        return Feedforward(cv, source, -gd.gain / gp.gain, dead_time=dt,
                           rule="-Gd/Gp (integrating: static)")
    raise fail(f"feedforward {cv}<-{source}", "gain", "step tests that give two FOPDT or two "
               "integrating models (the design rule needs them)",
               f"{gp.kind} (MV) and {gd.kind} (DV)",
               "Give 'gain' (and 'lead', 'lag', 'dead_time') by hand")


# ---------------------------------------------------------------------------------- settings
_FF_KEYS = ("dv", "mv", "gain", "lead", "lag", "dead_time")
_RATIO_KEYS = ("mv", "wild")
_CASCADE_KEYS = ("inner", "mv")
_OVERRIDE_KEYS = ("select", "loops")
_OVERRIDE_LOOP_KEYS = ("cv", "reference")
_SPLIT_KEYS = ("valves",)
_VALVE_KEYS = ("mv", "start", "end", "at_start", "at_end")


def _table(v: Any, where: str, expect: str) -> Mapping[str, Any]:
    if not isinstance(v, Mapping) or not v:
        raise fail(where, None, expect, shown(v))
    return v


def _string(spec: Mapping[str, Any], key: str, where: str, names: Sequence[str], role: str) -> str:
    if key not in spec:
        raise SettingsError(owner=where, key=key, expected=f"'{key}' (the name of "
                            f"a{'n' if role[0] in 'AEIMO' else ''} {role})",
                            found=f"keys {', '.join(map(str, spec)) or '(none)'}")
    v = spec[key]
    if not isinstance(v, str) or v not in names:
        hint = suggest(str(v), names) if isinstance(v, str) else ""
        raise SettingsError(owner=where, key=key, found=f"{shown(v)}{hint}",
                            expected=f"the name of a{'n' if role[0] in 'AEIMO' else ''} {role} "
                                     f"({', '.join(names) or 'none'})")
    return v


def _key_cv(c: Any, where: str, cvs: Sequence[str]) -> str:
    return check(c, Names("CV", tuple(cvs), fix="a table keyed by CV names"), owner=where,
                 key=str(c))


def _cv_tables(structures: Mapping[str, Any], key: str, cvs: Sequence[str],
               inner: str, allowed: Sequence[str]):
    """``(cv, key path, table)`` for each entry of a structure keyed by CV names, checked."""
    w0 = key
    for c, spec in _table(structures[key], w0, f"a table {{cv = {inner}}}").items():
        _key_cv(c, w0, cvs)
        w = f"{w0}.{c}"
        spec = _table(spec, w, f"a table {inner}")
        refuse_unknown_keys(spec, allowed, what=w)
        yield c, w, spec


def _table_list(spec: Mapping[str, Any], key: str, where: str, least: int, items: str,
                allowed: Sequence[str]):
    """``(key path, table)`` for each table of the list ``spec[key]`` (at least *least*)."""
    lst = spec.get(key)
    if not isinstance(lst, (list, tuple)) or len(lst) < least:
        raise SettingsError(owner=where, key=key, expected=f"a list of at least "
                            f"{'two' if least == 2 else 'one'} {items}", found=shown(lst))
    for i, item in enumerate(lst):
        wi = f"{where}.{key}[{i}]"
        item = _table(item, wi, f"a table ({items})")
        refuse_unknown_keys(item, allowed, what=wi)
        yield wi, item


def check_structure_settings(model: Any, structures: Mapping[str, Any], *, what: str) -> None:
    """Types, names and ranges of the structure keys of the PID settings (``feedforward``,
    ``ratio``, ``cascade``, ``override``, ``split_range``), before any step test; a wrong one
    raises :class:`SettingsError` of owner *what* at the key path."""
    try:
        _check_structures(model, structures)
    except SettingsError as e:
        # every check below is given the key path of its entry (relative to the PID settings)
        # as its owner: that path goes in front of the error's key
        raise e.replace(owner=what, key=join_key(e.owner, e.key)) from None


def _check_structures(model: Any, structures: Mapping[str, Any]) -> None:
    cvs, mvs = list(model.cv_names), list(model.mv_names)
    mdv = list(model.measured_dv_names)
    if "feedforward" in structures:
        w0 = "feedforward"
        for c, specs in _table(structures["feedforward"], w0,
                               "a table {cv = {dv = ...}} (feedforward onto the loop on that CV)").items():
            _key_cv(c, w0, cvs)
            items = specs if isinstance(specs, (list, tuple)) else [specs]
            for i, spec in enumerate(items):
                w = f"{w0}.{c}" + (f"[{i}]" if isinstance(specs, (list, tuple)) else "")
                spec = _table(spec, w, "a table {dv = ... (or mv = ...), and optionally gain, lead, "
                                       "lag, dead_time}")
                refuse_unknown_keys(spec, _FF_KEYS, what=w)
                if ("dv" in spec) == ("mv" in spec):
                    raise fail(w, None, "exactly one source, 'dv' (a measured DV) or 'mv' "
                               "(another loop's flow)", "both" if "dv" in spec else "neither")
                if "dv" in spec:
                    _string(spec, "dv", w, mdv, "measured DV")
                else:
                    _string(spec, "mv", w, mvs, "MV")
                hand = [k for k in ("lead", "lag", "dead_time") if k in spec]
                if hand and "gain" not in spec:
                    raise SettingsError(owner=w, key="gain", expected=f"'gain' as well ('{hand[0]}' "
                                        f"is given by hand, so 'gain' must be too)", found="nothing",
                                        fix="give it, or leave all four out to design them "
                                            "from the model")
                if "gain" in spec:
                    g = number(spec, "gain", what=w)
                    if g == 0:
                        raise SettingsError(owner=w, key="gain", expected="a non-zero gain",
                                            found="0")
                for k in hand:
                    number(spec, k, what=w, low=0.0)
                if spec.get("lead", 0) > 0 and spec.get("lag", 0) == 0:
                    raise fail(w, "lag", "a 'lag' > 0 with a 'lead' (a pure lead is not "
                               "realizable)", f"lead = {spec['lead']!r} and no lag")
    if "ratio" in structures:
        for c, w, spec in _cv_tables(structures, "ratio", cvs, "{mv = ..., wild = ...}",
                                     _RATIO_KEYS):
            m = _string(spec, "mv", w, mvs, "MV")
            _string(spec, "wild", w, [x for x in mvs + mdv if x != m], "MV or measured DV")
    if "cascade" in structures:
        for c, w, spec in _cv_tables(structures, "cascade", cvs,
                                     "{inner = <secondary CV>, mv = ...}", _CASCADE_KEYS):
            _string(spec, "inner", w, [x for x in cvs if x != c], "CV (other than the outer one)")
            _string(spec, "mv", w, mvs, "MV")
    if "override" in structures:
        w0 = "override"
        for m, spec in _table(structures["override"], w0,
                              "a table {mv = {select = ..., loops = [...]}}").items():
            check(m, Names("MV", tuple(mvs), fix="a table keyed by MV names"), owner=w0,
                  key=str(m))
            w = f"{w0}.{m}"
            spec = _table(spec, w, "a table {select = 'min' or 'max', loops = [{cv = ...}, ...]}")
            refuse_unknown_keys(spec, _OVERRIDE_KEYS, what=w)
            choice(spec.get("select"), SELECTS, what=w, key="select", noun="select")
            for wl, lp in _table_list(spec, "loops", w, 2, "loop tables {cv = ..., reference = "
                                      "'setpoint'/'high'/'low'}", _OVERRIDE_LOOP_KEYS):
                _string(lp, "cv", wl, cvs, "CV")
                if "reference" in lp:
                    choice(lp["reference"], REFERENCES, what=wl, key="reference",
                           noun="reference")
    if "split_range" in structures:
        lo, hi = model.bounds("mv")
        for c, w, spec in _cv_tables(structures, "split_range", cvs,
                                     "{valves = [{mv, start, end}, ...]}", _SPLIT_KEYS):
            for wv, v in _table_list(spec, "valves", w, 1, "valve tables {mv, start, end, "
                                     "at_start, at_end}", _VALVE_KEYS):
                m = _string(v, "mv", wv, mvs, "MV")
                for k in ("start", "end"):
                    if k not in v:
                        raise SettingsError(owner=wv, key=k, expected="a percent of the "
                                            "controller output, 0 to 100", found="nothing")
                    f = number(v, k, what=wv, low=0.0)
                    if f > 100:
                        raise SettingsError(owner=wv, key=k, expected="a percent <= 100",
                                            found=f"{f:g}")
                if not v["end"] > v["start"]:
                    raise SettingsError(owner=wv, key="end", expected="'end' above 'start'",
                                        found=f"start = {v['start']!r}, end = {v['end']!r}")
                j = mvs.index(m)
                for k, default in (("at_start", lo[j]), ("at_end", hi[j])):
                    if k in v:
                        number(v, k, what=wv)
                    elif not math.isfinite(default):
                        raise fail(wv, k, f"'{k}' (MV '{m}' has no finite physical limit to "
                                   f"default it to)", "nothing")


def _dv_step_fit(model: Any, op: Any, dv: str, cv: str, *, Ts: float, step_fraction: float,
                 duration: float, fit: str = "auto") -> Any:
    """Step the measured DV *dv* of the nonlinear model and fit the response of *cv*."""
    from ..exceptions import SimulationError
    from ..responses import open_loop_test
    from .tuning import StepData, fit_step

    j = model.dv_names.index(dv)
    lo, hi = model.bounds("dv")
    d0 = float(op.d[j])
    span = hi[j] - lo[j] if math.isfinite(hi[j] - lo[j]) else max(abs(d0), 1.0)
    size = step_fraction * span
    if d0 + size > hi[j]:
        size = -size
    try:
        rt = open_loop_test(model, op, dv, kind="step", size=size, duration=duration, Ts=Ts)
    except SimulationError as exc:
        raise exc.within(None, f"feedforward step test of '{dv}'").as_class(SettingsError) \
            from None
    i = model.cv_names.index(cv)
    data = StepData(t=np.concatenate([[0.0], Ts + rt.t]),
                    y={cv: np.concatenate([[op.y[i]], rt.y_nonlinear[:, i]])},
                    mv=dv, size=size, at=Ts, y0={cv: float(op.y[i])})
    return fit_step(data, cv, kind=fit)


def _mv_step_fit(model: Any, op: Any, mv: str, cv: str, *, Ts: float, step_fraction: float,
                 duration: float, fit: str = "auto") -> Any:
    from .tuning import fit_step, step_test

    j = model.mv_names.index(mv)
    lo, hi = model.bounds("mv")
    span = hi[j] - lo[j] if math.isfinite(hi[j] - lo[j]) else max(abs(op.u[j]), 1.0)
    size = step_fraction * span
    if op.u[j] + size > hi[j]:
        size = -size
    return fit_step(step_test(model, op, mv, size=size, Ts=Ts, duration=duration), cv, kind=fit)


def regulatory_from_settings(model: Any, op: Any, Ts: float, structures: Mapping[str, Any], *,
                             loops: Sequence[PIDLoop], tune, on_fit, step_fraction: float = 0.05,
                             test_duration: float | None = None,
                             what: str = "pid") -> RegulatoryController:
    """A :class:`RegulatoryController` from the structure keys of the PID settings (see
    docs/scenario-format.md), the plain *loops* already tuned, and the settings' tuning:
    ``tune(pairs) -> (loops, fits)`` (MV step tests and the rule) and
    ``on_fit(fit, cv, mv) -> loop`` (the rule on a given step response)."""
    import dataclasses

    from ..linear import linearize

    check_structure_settings(model, structures, what=what)
    lin = linearize(model, op)
    from .tuning import default_test_duration

    def dur(cv: str, inp: str) -> float:
        if test_duration is not None:
            return float(test_duration)
        try:
            return default_test_duration(lin, cv, inp, Ts)
        except IndexError:
            return 200 * Ts

    cvs, mvs = list(model.cv_names), list(model.mv_names)
    loops = list(loops)
    tuning: dict[str, Any] = {"fits": {}}
    cascades, selectors, splits, ratios, ffs = [], [], [], [], []
    for c, spec in structures.get("cascade", {}).items():
        w = f"{what}.cascade.{c}"
        (inner,), (fi,) = tune([(spec["inner"], spec["mv"])])
        if fi.kind == "integrating":
            raise fail(w, "inner", "an inner loop whose process is self-regulating (a "
                       "cascade's inner loop must be here)",
                       f"{spec['inner']} <- {spec['mv']}, which integrates")
        j = mvs.index(spec["mv"])
        lo, hi = model.bounds("mv")
        span = hi[j] - lo[j] if math.isfinite(hi[j] - lo[j]) else max(abs(op.u[j]), 1.0)
        size = fi.gain * step_fraction * span          # the inner CV's move of the MV step test
        data = closed_inner_step_test(model, op, inner, c, Ts=Ts, size=size,
                                      duration=max(dur(c, spec["mv"]), 20 * Ts))
        from .tuning import fit_step

        fo = fit_step(data, c)
        outer = on_fit(fo, c, spec["inner"])
        tuning["fits"][f"{c}<-{spec['inner']} (closed inner loop)"] = fo.as_dict()
        cascades.append(Cascade(outer, inner))
    for m, spec in structures.get("override", {}).items():
        refs = [lp.get("reference", "setpoint") for lp in spec["loops"]]
        tuned, _ = tune([(lp["cv"], m) for lp in spec["loops"]])
        selectors.append(Selector(m, spec["select"], tuple(tuned), tuple(refs)))
    lo, hi = model.bounds("mv")
    for c, spec in structures.get("split_range", {}).items():
        vs = []
        for v in spec["valves"]:
            j = mvs.index(v["mv"])
            vs.append(Valve(v["mv"], float(v["start"]), float(v["end"]),
                            float(v.get("at_start", lo[j])), float(v.get("at_end", hi[j]))))
        (lp,), _ = tune([(c, vs[0].mv)])
        if vs[0].slope == 0:
            raise fail(f"{what}.split_range.{c}", "valves[0]", "a first valve that moves (the "
                       "loop is tuned on it)", f"at_start = at_end = {vs[0].at_start:g}")
        lp = dataclasses.replace(lp, mv="split", gain=lp.gain / vs[0].slope)
        splits.append(SplitRange(lp, tuple(vs)))
    for c, spec in structures.get("ratio", {}).items():
        wild = spec["wild"]
        w0 = float(op.u[mvs.index(wild)] if wild in mvs else op.d[model.dv_names.index(wild)])
        if w0 == 0:
            raise fail(f"{what}.ratio.{c}", "wild", "a wild flow that is not 0 at the operating "
                       "point (the ratio is undefined there)", f"'{wild}' = 0")
        (lp,), _ = tune([(c, spec["mv"])])
        ratios.append(Ratio(dataclasses.replace(lp, gain=lp.gain / w0), wild))
    owners = {lp.cv: lp.mv for lp in loops}
    owners.update({cs.inner.cv: cs.inner.mv for cs in cascades})
    for c, specs in structures.get("feedforward", {}).items():
        items = specs if isinstance(specs, (list, tuple)) else [specs]
        for i, spec in enumerate(items):
            w = f"{what}.feedforward.{c}" + (f"[{i}]" if isinstance(specs, (list, tuple)) else "")
            if c not in owners:
                raise fail(w, None, f"a single loop (or cascade inner loop) on '{c}' to add the "
                           f"feedforward to", f"loops on {', '.join(owners) or 'none'}")
            src = spec.get("dv", spec.get("mv"))
            if "gain" in spec:
                ffs.append(Feedforward(c, src, float(spec["gain"]),
                                       float(spec.get("lead", 0.0)), float(spec.get("lag", 0.0)),
                                       float(spec.get("dead_time", 0.0)), rule="given"))
                continue
            mv = owners[c]
            d = dur(c, mv)

            def _src_fit(src: str, kind: str, c: str = c, d: float = d) -> Any:
                fn = _mv_step_fit if src in mvs else _dv_step_fit
                return fn(model, op, src, c, Ts=Ts, step_fraction=step_fraction, duration=d,
                          fit=kind)
            try:
                gp = _mv_step_fit(model, op, mv, c, Ts=Ts, step_fraction=step_fraction, duration=d)
                gd = _src_fit(src, "auto")
                if gp.kind == "sopdt" or gd.kind == "sopdt":
                    gp = _mv_step_fit(model, op, mv, c, Ts=Ts, step_fraction=step_fraction,
                                      duration=d, fit="fopdt")
                    gd = _src_fit(src, "fopdt")
                ffs.append(design_feedforward(gp, gd, cv=c, source=src))
            except SettingsError as exc:
                raise exc.within(w) from None
            tuning["fits"][f"{c}<-{mv} (feedforward design)"] = gp.as_dict()
            tuning["fits"][f"{c}<-{src} (feedforward design)"] = gd.as_dict()
    try:
        return RegulatoryController.for_model(model, loops=loops, feedforward=ffs, ratios=ratios,
                                              cascades=cascades, selectors=selectors,
                                              split_ranges=splits, tuning=tuning)
    except SettingsError as exc:
        raise exc.within(what) from None
