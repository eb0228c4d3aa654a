"""A commented starter scenario for any model reference (the ``mpcproto new`` command).

:func:`starter_scenario` resolves the model (built-in, registered, ``file.py:function``,
``module:function`` or a transfer-matrix ``.toml``), finds its steady state at the nominal MVs and
DVs, linearizes it there and writes a scenario a new user can run at once:

* every MV, DV and CV listed in comments with its unit, nominal value and physical range;
* times from the linear model: settling time ``T = 4 tau_max + theta_max`` (slowest stable time
  constant plus the largest dead time; for an integrating unit, four times the time one MV scale
  takes to move a CV by one CV scale), sample time ``T / 60`` and run length ``3 T`` rounded to
  1-2-5 numbers (common practice, no source: 40-80 samples per settling time);
* a setpoint step on the first CV with a PID loop (2 % of its range or 5 % of its value, the
  smaller) and a step on the first measured DV (10 % of its range); with more CVs than MVs, the
  CVs without a loop get no setpoint (kept within their limits only);
* an MPC whose MV and CV scales are 1/20 of each variable's physical range, with a prediction
  horizon of one settling time; PID loops tuned by SIMC, each CV paired with the MV that moves it
  most in scaled units (greedy, one MV per CV);
* two criteria (the MPC never fails nor falls back; its slowest step within half a sample time),
  and a commented comparison criterion to fill in.

No numbers of its own beyond these rules: the model layer, :mod:`mpcproto.operating` and
:mod:`mpcproto.linear` do the work.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..control.mpc_settings import default_scale, range_span
from ..control.mpc_settings import nice_number as _nice
from ..exceptions import OperatingPointError
from ..validation import fail

__all__ = ["starter_scenario"]


def _g(v: float) -> str:
    """A TOML number."""
    s = f"{v:.6g}"
    if "e" not in s and "." not in s and "inf" not in s and "nan" not in s:
        s += ".0"
    return s


def _span(v: Any) -> float:
    """A variable's physical range, or a stand-in from its nominal value when a bound is open."""
    return range_span(v.low, v.high, v.nominal)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return _g(float(v)) if isinstance(v, float) else str(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return _inline(v)
    raise fail("starter_scenario()", "options",
               "option values a scenario (TOML) file can hold", f"{v!r}, which it cannot")


def _inline(d: Mapping[str, Any]) -> str:
    return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in d.items()) + " }" if d else "{}"


def starter_scenario(model: Any, out: str | Path, *, options: Mapping[str, Any] | None = None,
                     name: str | None = None) -> str:
    """The text of a commented starter scenario for *model*, to be written at *out*.

    Parameters
    ----------
    model : str
        A model reference as on the command line (relative files are relative to the current
        directory; the scenario refers to them relative to *out*'s folder).
    out : path
        Where the scenario will be written (its folder anchors relative references).
    options : mapping, optional
        Model options (keyword arguments of a model function).
    name : str, optional
        ``scenario.name``; default *out*'s stem.

    Raises
    ------
    ModelError, OperatingPointError
        The model cannot be built or has no steady state at its nominal MVs and DVs.
    """
    from ..operating import steady_state
    from ..linear import linearize
    from ..models.resolve import model_options, parse_reference, resolve_model

    options = dict(options or {})
    ref = parse_reference(model, what="MODEL")
    m = resolve_model(ref, options=options, what="MODEL")
    out = Path(out)
    if ref.form in ("file", "toml"):
        rel = os.path.relpath(ref.target, Path(out).resolve().parent)
        written_ref = Path(rel).as_posix() + (f":{ref.function}" if ref.function else "")
    else:
        written_ref = ref.text
    try:
        op = steady_state(m, m.nominal("mv"), m.nominal("dv"))
    except OperatingPointError as e:
        raise e.within(f"MODEL {ref.label}", "a steady state at the nominal MVs and DVs is "
                       "needed to start the study from: give the model nominal values that hold "
                       "it steady") from None
    lin = linearize(m, op)
    mvs, dvs, cvs = m.variables("mv"), m.variables("dv"), m.variables("cv")
    # the MPC's own default scales (control.mpc_settings.default_scale), written out
    mv_scale = {v.name: default_scale((v.low, v.high), nominal=v.nominal) for v in mvs}
    cv_span = {c: range_span(v.low, v.high, y) for c, v, y in zip(m.cv_names, cvs, op.y)}
    cv_scale = {c: default_scale((v.low, v.high), nominal=y) for c, v, y in zip(m.cv_names, cvs, op.y)}

    # times from the linear model
    pairs = [p for p in lin.pairs() if p["connected"]]
    taus = [t for p in pairs for t in p["time_constants"]]
    dead = max([p["dead_time"] for p in pairs] + [0.0])
    settle = 4 * max(taus) + dead if taus else 0.0
    ramps = [cv_scale[p["cv"]] / (abs(p["ramp_rate"]) * mv_scale[p["mv"]])
             for p in pairs if p["integrating"] and p["ramp_rate"]]
    if ramps:
        settle = max(settle, 4 * min(ramps) + dead)
    if not settle > 0:
        settle = 100.0
    ts = _nice(settle / 60)
    duration = _nice(3 * settle)
    horizon = int(min(120, max(10, round(settle / ts))))

    # PID pairs: greedy on the scaled effect of each MV on each CV within one settling time
    def effect(p: Mapping[str, Any]) -> float:
        if p["integrating"]:
            size = abs(p["ramp_rate"] or 0.0) * settle
        else:
            size = abs(p["gain"]) if math.isfinite(p["gain"]) else 0.0
        return size * mv_scale[p["mv"]] / cv_scale[p["cv"]]

    ranked = sorted(pairs, key=effect, reverse=True)
    pid_pairs: dict[str, str] = {}
    for p in ranked:
        if p["cv"] not in pid_pairs and p["mv"] not in pid_pairs.values() and effect(p) > 0:
            pid_pairs[p["cv"]] = p["mv"]
    pid_pairs = {c: pid_pairs[c] for c in m.cv_names if c in pid_pairs}

    tu = m.time_unit
    stem = name or out.stem
    cv0 = next(iter(pid_pairs), m.cv_names[0])
    i0 = list(m.cv_names).index(cv0)
    sp_size = _nice(min(0.02 * cv_span[cv0], 0.05 * abs(float(op.y[i0])) or math.inf))
    lines: list[str] = []
    add = lines.append
    add(f"# Starter study for the model {ref.label} ({m.description or m.name}),")
    add("# written by `mpcproto new`.  Edit the numbers; every key is described in")
    add("# docs/scenario-format.md.  Times are in the model's time unit: " + tu + ".")
    add("# Simulation only: a real unit needs its own independent safety systems, management of")
    add("# change, local codes and licensed engineers.")
    add("")
    add("[scenario]")
    add(f'name = {_toml_value(stem)}')
    add(f'description = {_toml_value("Starter study: MPC vs PID on " + m.name)}')
    add(f"sample_time = {_g(ts)}          # {tu}: settling time {settle:.4g} {tu} / 60, rounded")
    add(f"duration = {_g(duration)}           # {tu}: three settling times")
    add("seed = 1")
    add("")
    add("[plant]")
    add(f"model = {_toml_value(written_ref)}")
    opts_all = model_options(ref, what="MODEL")
    if opts_all:
        shown_opts = {k: options.get(k, o["default"]) for k, o in opts_all.items()}
        add(f"options = {_inline(shown_opts)}")
        for k, o in opts_all.items():
            allowed = ", ".join(_toml_value(a) for a in o["allowed"]) or "any value"
            add(f"#   option {k}: {allowed}" + (f"  ({o['description']})" if o["description"] else ""))
    params = m.variables("parameter")
    if params:
        add("# parameters = { name = value }   # the model's parameters (defaults):")
        for v in params:
            add(f"#   {v.name} = {_g(v.nominal)}  {v.unit}  {v.description}".rstrip())
    add("")
    add("# The variables (name: unit, nominal, physical range):")
    for role, vs in (("MV", mvs), ("DV", dvs), ("CV", cvs)):
        for v, y in zip(vs, op.y if role == "CV" else [None] * len(vs)):
            nom = float(y) if role == "CV" else float(v.nominal)
            meas = "" if role != "DV" else (" (measured)" if v.measured else " (unmeasured)")
            add(f"#   {role} {v.name}{meas}: {v.unit or '-'}, {nom:.6g}, [{v.low:.6g}, {v.high:.6g}]"
                + (f"  {v.description}" if v.description else ""))
    add("")
    add("[operating_point]              # the steady state at these MVs and DVs")
    add(f"mvs = {_inline({v.name: float(u) for v, u in zip(mvs, op.u)})}")
    if dvs:
        add(f"dvs = {_inline({v.name: float(d) for v, d in zip(dvs, op.d)})}")
    add("")
    add("[setpoints]")
    add(f'{cv0} = {{ kind = "step", at = {_g(_nice(0.05 * duration))}, size = {_g(sp_size)} }}'
        f"   # {cvs[i0].unit}: 2 % of its range (or 5 % of its value)")
    for c in m.cv_names:
        if c not in pid_pairs and len(pid_pairs) < len(m.cv_names):
            add(f'{c} = "none"   # more CVs than MVs: this one only within its limits')
    add("")
    dv0 = next((v for v in dvs if v.measured), dvs[0] if dvs else None)
    add("[disturbances]")
    if dv0 is not None:
        add(f'{dv0.name} = {{ kind = "step", at = {_g(_nice(0.5 * duration))}, size = '
            f"{_g(_nice(0.1 * _span(dv0)))} }}   # {dv0.unit}: 10 % of its range")
    else:
        add("# (the model has no DV)")
    add("")
    add("[controllers.mpc]")
    add(f"horizon = {horizon}                # samples: one settling time")
    add(f"control_horizon = {min(6, horizon)}")
    add("# scales: 1/20 of each variable's physical range (one scale = one typical move)")
    add(f"mv = {_inline({k: {'scale': s} for k, s in mv_scale.items()})}")
    add(f"cv = {_inline({k: {'scale': s} for k, s in cv_scale.items()})}")
    add("")
    add("[controllers.pid]")
    add('rule = "simc"                  # tuned from step tests of the model')
    if pid_pairs:
        add(f"pairs = {_inline(pid_pairs)}   # each CV with the MV that moves it most (scaled)")
    add("")
    add("[[criteria]]")
    add('check = "no_solver_failure"    # the MPC never failed nor fell back')
    add('controller = "mpc"')
    add("")
    add("[[criteria]]")
    add('check = "solve_time_below"     # its slowest step within half a sample time')
    add('controller = "mpc"')
    add("fraction = 0.5")
    add("")
    add("# A comparison to fill in once the first run shows the numbers:")
    add("# [[criteria]]")
    add('# check = "better_than"')
    add('# controller = "mpc"')
    add('# than = "pid"')
    add('# kpi = "iae"')
    add(f'# cv = "{cv0}"')
    add("# by_percent = 10.0")
    return "\n".join(lines) + "\n"

