"""``mpcproto assess``: the design checks of a scenario's controller model, as plain data.

Gathers, for the controller's model at the scenario's operating point: the gain-matrix analysis
(:func:`mpcproto.design.gain_matrix_analysis`, scaled by the variables' physical ranges), the RGA at
a few frequencies, the Niederlinski index and loop margins of the scenario's PID pairing, and the
sampling advice.  No numerics of its own: every figure comes from the design and control layers.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..exceptions import ScenarioError, SettingsError
from .schema import Scenario

__all__ = ["design_report", "print_design_report", "scenario_locus"]


def _ranges(model, role: str, op_values: np.ndarray) -> np.ndarray:
    lo, hi = model.bounds(role)
    span = hi - lo
    return np.where(np.isfinite(span) & (span > 0), span, np.maximum(np.abs(op_values), 1.0))


def _fin(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def design_report(scn: Scenario) -> dict[str, Any]:
    """Everything ``mpcproto assess`` prints (JSON-able).

    Keys: ``model``, ``time_unit``, ``sample_time``, ``gain_analysis`` (see
    :class:`mpcproto.design.GainAnalysis`; gains scaled by the physical ranges of the CVs and MVs),
    ``rga_frequency`` (square systems: the RGA magnitude at w = 0 and at the inverse of the
    dominant time constant and of the largest dead time), ``pid`` (per loop of the scenario's first
    PID controller: its tuning, the channel it acts on and :class:`LoopMargins`), ``sampling``
    (:class:`mpcproto.design.SamplingAdvice`), ``mpc`` (the scenario's first MPC with no constraint
    active: nominal spectral radius, the mismatch table and the output sensitivity peak, see
    :func:`mpcproto.control.mpc_analysis.unconstrained_analysis`; None without an MPC) and
    ``warnings`` (plain text).
    """
    from ..control.loop_analysis import loop_margins
    from ..design import gain_matrix_analysis, rga_at_frequency, sampling_advice
    from ..linear import linearize
    from .runner import _build_pid, prepare

    prep = prepare(scn)
    model, op = prep.model, prep.model_op
    lin = linearize(model, op)
    Ts = scn.sample_time
    out: dict[str, Any] = {"model": model.name, "time_unit": model.time_unit, "sample_time": Ts,
                           "warnings": []}
    warns: list[str] = out["warnings"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        K = lin.gain("mv")
    pid_specs = [(label, spec) for label, spec in scn.data["controllers"].items()
                 if spec.get("kind") == "pid"]
    pid = None
    if pid_specs:
        label, spec = pid_specs[0]
        settings = {k: v for k, v in spec.items() if k != "kind"}
        try:
            pid = _build_pid(settings, prep, f"controllers.{label}")
        except SettingsError as e:
            raise e.at(f"controllers.{label}").in_file(scn.file) from None
    pairing = [(lp.cv, lp.mv) for lp in pid.loops] if pid is not None else None
    finite = np.all(np.isfinite(K))
    if finite and K.size:
        square_pairing = pairing if (pairing and K.shape[0] == K.shape[1] == len(pairing)) else None
        ga = gain_matrix_analysis(K, cv_names=lin.cv_names, mv_names=lin.mv_names,
                                  cv_scales=_ranges(model, "cv", op.y) if _has_cv_bounds(model)
                                  else None,
                                  mv_scales=_ranges(model, "mv", op.u), pairing=square_pairing)
        out["gain_analysis"] = ga.as_dict()
        warns.extend(ga.warnings)
    else:
        out["gain_analysis"] = None
        warns.append("the steady-state gain matrix has integrating channels (no finite gain): "
                     "conditioning, RGA and Niederlinski index are not defined")
    adv = sampling_advice(lin, Ts)
    out["sampling"] = {k: _fin(v) for k, v in adv.as_dict().items()}
    warns.extend(adv.warnings)
    rf = []
    if finite and K.size and K.shape[0] == K.shape[1]:
        freqs = [0.0]
        if adv.dominant_time_constant:
            freqs.append(1.0 / adv.dominant_time_constant)
        if adv.largest_dead_time > 0:
            freqs.append(1.0 / adv.largest_dead_time)
        for w in freqs:
            try:
                R = rga_at_frequency(lin, w)
            except SettingsError:
                continue
            rf.append({"w": w, "rga_magnitude": np.abs(R).tolist()})
    out["rga_frequency"] = rf
    loops = []
    if pid is not None:
        for lp in pid.loops:
            i, j = lin.cv_names.index(lp.cv), lin.mv_names.index(lp.mv)
            num, den, dead = lin.transfer_element(i, j)
            row: dict[str, Any] = {"cv": lp.cv, "mv": lp.mv, "gain": lp.gain,
                                   "integral_time": _fin(lp.integral_time),
                                   "derivative_time": lp.derivative_time,
                                   "rule": getattr(lp, "rule", None)}
            try:
                # the sampled loop adds about half a sample of delay (zero-order hold; common
                # practice, e.g. Skogestad 2003)
                mg = loop_margins((num, den, dead + 0.5 * Ts), lp)
                row["margins"] = mg.as_dict()
                if mg.peak_sensitivity > 2.0:
                    warns.append(f"PID loop {lp.cv}<-{lp.mv}: peak sensitivity Ms = "
                                 f"{mg.peak_sensitivity:.2f} > 2 (little robustness; Ms below "
                                 f"1.6-2 is the usual aim, Skogestad 2003, from memory)")
                if mg.gain_margin < 1.0 or mg.phase_margin_deg < 0:
                    warns.append(f"PID loop {lp.cv}<-{lp.mv} is unstable on the controller's "
                                 f"linear model (gain margin {mg.gain_margin:.2f}, phase margin "
                                 f"{mg.phase_margin_deg:.1f} deg)")
            except SettingsError as e:
                row["margins"] = None
                row["note"] = str(e)
            row["half_rule"] = _half_rule_of(lin, lp.cv, lp.mv, Ts)
            loops.append(row)
    out["pid"] = loops
    out["mpc"] = _mpc_section(scn, prep, warns)
    return out


def _half_rule_of(lin, cv: str, mv: str, Ts: float) -> dict[str, Any] | None:
    """Skogestad's half-rule FOPDT of the (cv, mv) channel of the linear model (its real poles,
    right-half-plane zeros as inverse-response time constants, dead time, half a sample for the
    hold), or None where the rule does not apply (complex poles, left-half-plane zeros, an
    integrating or unconnected channel)."""
    from ..control.loop_analysis import half_rule

    ch = next(p for p in lin.pairs() if p["cv"] == cv and p["mv"] == mv)
    poles = [complex(p) for p in ch["poles"]]
    zeros = [complex(z) for z in ch["zeros"]]
    if (not ch["connected"] or ch["integrating"] or not poles
            or any(abs(p.imag) > 1e-9 * max(1.0, abs(p)) or p.real >= 0 for p in poles)
            or any(abs(z.imag) > 1e-9 * max(1.0, abs(z)) or z.real <= 0 for z in zeros)):
        return None
    fit = half_rule(ch["gain"], [-1.0 / p.real for p in poles], ch["dead_time"],
                    inverse_response=[1.0 / z.real for z in zeros], sample_time=Ts)
    return {"gain": fit.gain, "time_constant": fit.time_constants[0], "dead_time": fit.dead_time}


def _mpc_section(scn: Scenario, prep, warns: list[str]) -> dict[str, Any] | None:
    """Linear analysis of the scenario's first MPC (unconstrained), or None without one."""
    from ..control.mpc_analysis import unconstrained_analysis
    from .runner import build_controller

    specs = [(label, spec) for label, spec in scn.data["controllers"].items()
             if spec.get("kind") == "mpc"]
    if not specs:
        return None
    label, spec = specs[0]
    ctl = build_controller(label, spec, prep)
    try:
        an = unconstrained_analysis(ctl)
    except SettingsError as e:
        raise e.within(e.owner, "unconstrained analysis of the MPC").at(
            f"controllers.{label}").in_file(scn.file) from None
    warns.extend(f"MPC '{label}': {w}" for w in an.warnings)
    rep = an.as_dict()
    rep["label"] = label
    rep["sensitivity_peak"] = _fin(rep["sensitivity_peak"])
    rep["sensitivity_peak_w"] = _fin(rep["sensitivity_peak_w"])
    return rep


def _has_cv_bounds(model) -> bool:
    lo, hi = model.bounds("cv")
    return bool(np.all(np.isfinite(hi - lo)))


def print_design_report(rep: Mapping[str, Any]) -> None:
    """Plain-text view of :func:`design_report` (what ``mpcproto assess`` prints)."""
    tu = rep["time_unit"]
    print(f"design checks of model '{rep['model']}' (sample time {rep['sample_time']:g} {tu})")
    ga = rep.get("gain_analysis")
    if ga:
        print("\nsteady-state gain matrix (scaled by the variables' physical ranges)")
        print(f"  singular values        {', '.join(f'{s:.4g}' for s in ga['scaled_singular_values'])}")
        print(f"  condition number       {ga['scaled_condition_number']:.4g} scaled, "
              f"{ga['condition_number']:.4g} in engineering units")
        wo = ", ".join(f"{v:+.2f} {k}" for k, v in ga["weak_output_direction"].items())
        wi = ", ".join(f"{v:+.2f} {k}" for k, v in ga["weak_input_direction"].items())
        print(f"  weakest CV direction   ({wo})")
        print(f"  weakest MV direction   ({wi})")
        if ga["determinant"] is not None:
            print(f"  det G(0)               {ga['determinant']:.4g}")
        if ga["rga"] is not None:
            print("  RGA at steady state")
            for c, row in zip(ga["cv_names"], ga["rga"]):
                print(f"    {c:<22}" + "".join(f"{v:>10.3f}" for v in row))
        if ga["niederlinski"] is not None:
            pairs = ", ".join(f"{c}<-{m}" for c, m in ga["pairing"])
            print(f"  Niederlinski index     {ga['niederlinski']:.4g} for the PID pairing ({pairs})")
    for r in rep.get("rga_frequency", [])[1:]:
        print(f"\n|RGA| at w = {r['w']:.4g} rad/{tu}")
        for row in r["rga_magnitude"]:
            print("    " + "".join(f"{v:>10.3f}" for v in row))
    if rep.get("pid"):
        print("\nPID loops on the controller's linear model (half a sample added for the hold)")
        print(f"  {'loop':<32}{'gain':>10}{'Ti':>9}{'GM':>8}{'PM deg':>8}{'Ms':>7}{'Ku':>10}{'Pu':>9}")
        for lp in rep["pid"]:
            mg = lp.get("margins") or {}

            def f(v, w=8, p=3):
                return f"{v:>{w}.{p}g}" if isinstance(v, (int, float)) else f"{'-':>{w}}"

            print(f"  {lp['cv'] + '<-' + lp['mv']:<32}{f(lp['gain'], 10)}{f(lp['integral_time'], 9)}"
                  f"{f(mg.get('gain_margin'))}{f(mg.get('phase_margin_deg'), 8, 3)}"
                  f"{f(mg.get('peak_sensitivity'), 7)}{f(mg.get('ultimate_gain'), 10)}"
                  f"{f(mg.get('ultimate_period'), 9)}")
        halves = [(lp, lp["half_rule"]) for lp in rep["pid"] if lp.get("half_rule")]
        if halves:
            print("  Skogestad's half rule on each channel's linear model (FOPDT for SIMC, beside "
                  "the step-test fit the rule used):")
            for lp, h in halves:
                print(f"    {lp['cv'] + '<-' + lp['mv']:<30} gain {h['gain']:.4g}, time constant "
                      f"{h['time_constant']:.4g}, dead time {h['dead_time']:.4g} {tu}")
    mpc = rep.get("mpc")
    if mpc:
        print(f"\nMPC '{mpc['label']}' with no constraint active (linear loop: plant, estimator, "
              "control law; every CV on its setpoint)")
        print(f"  nominal spectral radius  {mpc['spectral_radius']:.4f} "
              f"({'stable' if mpc['stable'] else 'UNSTABLE'})")
        print(f"  {'plant':<28}{'spectral radius':>16}{'stable':>8}")
        for c in mpc["cases"][1:]:
            what = (f"MV gains x{c['value']:g}" if c["kind"] == "gain"
                    else f"dead time +{c['value']:g} sample(s)")
            print(f"  {what:<28}{c['spectral_radius']:>16.4f}{'yes' if c['stable'] else 'NO':>8}")
        if mpc["sensitivity_peak"] is not None:
            print(f"  output sensitivity peak  {mpc['sensitivity_peak']:.3g} at w = "
                  f"{mpc['sensitivity_peak_w']:.4g} rad/{tu} (loop broken at the plant output)")
    s = rep["sampling"]
    print("\nsampling and horizons")
    if s.get("dominant_time_constant"):
        print(f"  dominant time constant {s['dominant_time_constant']:.4g} {tu}, largest MV dead "
              f"time {s['largest_dead_time']:.4g} {tu}, settles in ~{s['settling_time']:.4g} {tu}")
        print(f"  suggested prediction horizon {s['suggested_horizon']} samples, control horizon "
              f"{s['suggested_control_horizon']}")
    else:
        print("  no settling time (integrating or unstable modes)")
    if rep["warnings"]:
        print("\nwarnings")
        for w in rep["warnings"]:
            print(f"  - {w}")
    print("\nSimulation-model figures only: a design still needs plant tests, independent safety "
          "systems and management of change before it runs a real unit.")


def scenario_locus(scn: Scenario, name: str, low: Any, high: Any, *,
                   plot: str | None = None) -> dict[str, Any]:
    """Steady states of the scenario's plant model against *name* from *low* to *high*
    (:func:`mpcproto.continuation.steady_state_locus`, from the scenario's operating point), as
    plain data; with *plot*, the locus of the first CV is drawn to that PNG file."""
    from ..continuation import plot_locus, steady_state_locus
    from .build import operating_point, plant_model

    vals = []
    for what, v in (("LOW", low), ("HIGH", high)):
        try:
            vals.append(float(v))
        except (TypeError, ValueError):
            raise ScenarioError(f"--locus {what}: expected a number; found {v!r}.",
                                file=scn.file) from None
    plant = plant_model(scn)
    op = operating_point(scn, plant)
    try:
        loc = steady_state_locus(plant, str(name), vals[0], vals[1], op=op)
    except SettingsError as e:
        raise e.within(e.owner, "--locus").in_file(scn.file) from None
    if plot:
        plot_locus(loc, plot)
    return loc.as_dict()
