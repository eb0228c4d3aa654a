"""The section parsers of a scenario file (called in order by
:func:`mpcproto.scenario.schema.parse_scenario`).

Each takes the checker, the raw (TOML-parsed) file and the data being built, checks its section's
keys and writes the section's plain data; the first bad key raises the file's
:class:`~mpcproto.exceptions.ScenarioError`.
"""

from __future__ import annotations

import unicodedata
from collections.abc import Mapping
from typing import Any

from ..model import suggest
from .._specs import shown as _show
from .keys import (BETTER_KPIS, CONTROLLER_KINDS, CRITERION_CHECKS, CRITERION_KEYS, DISTRIBUTIONS,
                   DRAW_OPTIONAL, OP_KEYS, OP_PICKS, PLANT_KEYS, SCENARIO_KEYS, STUDY_KEYS,
                   SWEEP_KEYS, _Ctx, _found, _split)


def scenario_section(c: _Ctx, raw: Mapping, data: dict, default_name: str) -> None:
    """``[scenario]``: name, sample time, duration, seed, dead-time policy, CI run length."""
    # [scenario]
    s = c.table(raw["scenario"], "scenario")
    c.keys(s, "scenario", SCENARIO_KEYS, required=("sample_time",))
    name = c.string(s.get("name", default_name), "scenario.name")
    if not name or any(ch in name for ch in "/\\:*?\"<>|") or name.strip() != name:
        c.fail("scenario.name", "a name usable in a file name (no / \\ : * ? \" < > |, no "
               "surrounding blanks)", repr(name))
    if any(unicodedata.category(ch) in ("Cc", "Cs", "Zl", "Zp") for ch in name):
        c.fail("scenario.name", "a name on one line without control characters (newline, tab, ...)"
               + ("" if "name" in s else "; it defaults to the file name: give scenario.name"),
               ascii(name))
    ts = c.number(s["sample_time"], "scenario.sample_time", low=0.0, strict_low=True)
    dur = None
    if "duration" in s:
        dur = c.number(s["duration"], "scenario.duration", low=0.0, strict_low=True)
        if dur < ts:
            c.fail("scenario.duration", f"a duration of at least one sample time ({ts:g})", _show(s["duration"]))
        _check_samples(c, "scenario.duration", dur, ts, s["duration"])
    seed = c.number(s.get("seed", 0), "scenario.seed", low=0, integer=True)
    ci = s.get("ci", {})
    ci = c.table(ci, "scenario.ci")
    c.keys(ci, "scenario.ci", ("duration",))
    if "duration" in ci:
        raw_ci = ci["duration"]
        ci["duration"] = c.number(raw_ci, "scenario.ci.duration", low=ts)
        _check_samples(c, "scenario.ci.duration", ci["duration"], ts, raw_ci)
    data["scenario"] = {
        "name": name,
        "description": c.string(s.get("description", ""), "scenario.description"),
        "duration": dur,
        "sample_time": ts,
        "seed": seed,
        "dead_time": c.string(s.get("dead_time", "exact"), "scenario.dead_time", ("exact", "round", "refuse")),
        "ci": ci,
    }


def operating_point_section(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[operating_point]``: MVs, DVs, targets, state guess and which steady state to pick."""
    # [operating_point]
    op = c.table(raw.get("operating_point", {}), "operating_point")
    c.keys(op, "operating_point", OP_KEYS)
    data["operating_point"] = {
        "mvs": c.name_map(op.get("mvs", {}), "operating_point.mvs"),
        "dvs": c.name_map(op.get("dvs", {}), "operating_point.dvs"),
        "targets": c.name_map(op.get("targets", {}), "operating_point.targets"),
        "state_guess": c.name_map(op.get("state_guess", {}), "operating_point.state_guess"),
        "pick": c.string(op.get("pick", "nearest"), "operating_point.pick", OP_PICKS),
    }


def controllers_section(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[controllers.<label>]``: a label and a kind each (the settings are checked when built)."""
    # [controllers.<label>]
    ctl = c.table(raw.get("controllers", {}), "controllers")
    controllers = {}
    for label, spec in ctl.items():
        key = f"controllers.{label}"
        if not label.isidentifier():
            c.fail(key, "a controller label (letters, digits, underscores)", repr(label))
        spec = c.table(spec, key)
        kind = spec.get("kind", label if label in CONTROLLER_KINDS else None)
        if kind is None:
            c.fail(f"{key}.kind", f"the key 'kind' (one of {', '.join(CONTROLLER_KINDS)}) for a "
                   f"controller labelled '{label}'", "nothing")
        kind = c.string(kind, f"{key}.kind", CONTROLLER_KINDS)
        spec = dict(spec)
        spec["kind"] = kind
        controllers[label] = spec
    data["controllers"] = controllers


def signal_sections(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[setpoints]`` and ``[disturbances]``: a signal spec per variable."""
    # signal sections: variable name -> signal spec (a table, an array of tables added together, a
    # number = an absolute constant; a setpoint may also be "none" = zone control only).  The specs
    # are checked by the simulator's signal factory in check_scenario(), which knows the model.
    for section in ("setpoints", "disturbances"):
        tbl = c.table(raw.get(section, {}), section)
        out = {}
        for k, v in tbl.items():
            key = f"{section}.{k}"
            if not k.isidentifier():
                c.fail(key, "a variable name (letters, digits, underscores)", repr(k))
            if section == "setpoints" and v == "none":
                out[k] = "none"
            elif isinstance(v, list):
                if not v:
                    c.fail(key, "a signal table or a non-empty array of them", "an empty array")
                out[k] = [c.table(x, f"{key}[{i}]") for i, x in enumerate(v)]
                for i, x in enumerate(out[k]):
                    if "kind" in x:
                        c.string(x["kind"], f"{key}[{i}].kind")
            elif isinstance(v, (int, float)) and not isinstance(v, bool):
                out[k] = c.number(v, key)
            else:
                if not isinstance(v, Mapping):
                    c.fail(key, "a signal table (with 'kind'), an array of them, a number"
                           + (' or "none"' if section == "setpoints" else ""),
                           _found(v))
                out[k] = dict(v)
                if "kind" in v:
                    c.string(v["kind"], f"{key}.kind")
        data[section] = out


def simulator_sections(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[instruments]``, ``[actuators]``, ``[faults]``: a table per variable or label."""
    # instruments (per CV), actuators (per MV), faults (per label): tables for the simulator
    for section in ("instruments", "actuators", "faults"):
        tbl = c.table(raw.get(section, {}), section)
        out = {}
        for k, v in tbl.items():
            if not k.isidentifier():
                c.fail(f"{section}.{k}", "a variable name or label (letters, digits, underscores)",
                       repr(k))
            out[k] = c.table(v, f"{section}.{k}")
        data[section] = out


def limits_section(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[limits.<variable>]``: low, high and (for an MV) rate."""
    # [limits.<variable>] low/high
    lim = c.table(raw.get("limits", {}), "limits")
    limits = {}
    for k, v in lim.items():
        key = f"limits.{k}"
        v = c.table(v, key)
        c.keys(v, key, ("low", "high", "rate"))
        entry = {}
        for side in ("low", "high"):
            if side in v:
                entry[side] = c.number(v[side], f"{key}.{side}")
        if "rate" in v:
            entry["rate"] = c.number(v["rate"], f"{key}.rate", low=0.0, strict_low=True)
        if "low" in entry and "high" in entry and entry["low"] >= entry["high"]:
            c.fail(f"{key}.high", f"a high limit above the low limit ({entry['low']:g})",
                   _show(v["high"]))
        limits[k] = entry
    data["limits"] = limits


def criteria_section(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[[criteria]]``: the pass/fail checks of the runs."""
    # [[criteria]]
    crit_raw = c.table_array(raw.get("criteria", []), "criteria")
    criteria = []
    names_seen: set[str] = set()
    for i, cr in enumerate(crit_raw):
        key = f"criteria[{i}]"
        cr = c.table(cr, key)
        c.keys(cr, key, CRITERION_KEYS, required=("check",))
        check = c.string(cr["check"], f"{key}.check", tuple(CRITERION_CHECKS))
        for need in CRITERION_CHECKS[check]["needs"]:
            if need not in cr:
                c.fail(f"{key}.{need}", f"the key '{need}' (the check '{check}' needs "
                       f"{', '.join(CRITERION_CHECKS[check]['needs'])})", "nothing")
        entry: dict[str, Any] = {"check": check}
        for k in ("controller", "cv", "mv", "variable", "than"):
            if k in cr:
                entry[k] = c.string(cr[k], f"{key}.{k}")
        if "limit" in cr:
            entry["limit"] = c.number(cr["limit"], f"{key}.limit")
        if "fraction" in cr:
            entry["fraction"] = c.number(cr["fraction"], f"{key}.fraction", low=0.0, strict_low=True)
        if "by_percent" in cr:
            entry["by_percent"] = c.number(cr["by_percent"], f"{key}.by_percent", high=100.0)
        if "tolerance" in cr:
            if check != "no_limit_violation":
                c.fail(f"{key}.tolerance", "'tolerance' only with the check 'no_limit_violation'",
                       f"the check '{check}'")
            entry["tolerance"] = c.number(cr["tolerance"], f"{key}.tolerance", low=0.0, high=1.0)
        if "band" in cr:
            if check != "settling_time_below":
                c.fail(f"{key}.band", "'band' only with the check 'settling_time_below'",
                       f"the check '{check}'")
            entry["band"] = c.number(cr["band"], f"{key}.band", low=0.0, strict_low=True)
        if "kpi" in cr:
            entry["kpi"] = c.string(cr["kpi"], f"{key}.kpi", BETTER_KPIS)
        if check == "better_than" and "controller" not in entry:
            c.fail(f"{key}.controller", "the key 'controller' (the one that should be better)", "nothing")
        if entry.get("controller") is not None and entry.get("controller") == entry.get("than"):
            c.fail(f"{key}.than", "another controller than 'controller'", repr(entry["than"]))
        nm = c.string(cr.get("name", _criterion_name(entry)), f"{key}.name")
        if nm in names_seen:
            c.fail(f"{key}.name", "a name no other criterion uses (add a 'name' key)", repr(nm))
        names_seen.add(nm)
        entry["name"] = nm
        criteria.append(entry)
    data["criteria"] = criteria


def study_section(c: _Ctx, raw: Mapping, data: dict) -> None:
    """``[study]``: Monte Carlo draws and parameter sweeps."""
    # [study]
    st = c.table(raw.get("study", {}), "study")
    c.keys(st, "study", STUDY_KEYS)
    draws = c.number(st.get("draws", 0), "study.draws", low=0, integer=True)
    full_draws = c.number(st.get("full_draws", draws), "study.full_draws", low=0, integer=True)
    sweeps = []
    sw_raw = c.table_array(st.get("sweep", []), "study.sweep")
    for i, sw in enumerate(sw_raw):
        key = f"study.sweep[{i}]"
        sw = c.table(sw, key)
        c.keys(sw, key, SWEEP_KEYS, required=("key", "values"))
        keys = sw["key"]
        keys = [keys] if isinstance(keys, str) else keys
        if not isinstance(keys, list) or not keys or not all(isinstance(k, str) for k in keys):
            c.fail(f"{key}.key", "a key path string or an array of them", _show(sw["key"]))
        for k in keys:
            _check_target_key(c, raw, k, f"{key}.key")
        vals = {}
        for vk in ("values", "full_values"):
            if vk not in sw:
                continue
            v = sw[vk]
            if not isinstance(v, list) or not v:
                c.fail(f"{key}.{vk}", "a non-empty array of values", _show(v))
            for j, x in enumerate(v):
                if isinstance(x, (Mapping, list)):
                    c.fail(f"{key}.{vk}[{j}]", "a number, string or boolean", _show(x))
            vals[vk] = list(v)
        sweeps.append({"keys": keys, "values": vals["values"],
                       "full_values": vals.get("full_values", vals["values"]),
                       "label": c.string(sw.get("label", keys[0]), f"{key}.label")})
    draw_specs = []
    dr_raw = c.table_array(st.get("draw", []), "study.draw")
    for i, dr in enumerate(dr_raw):
        key = f"study.draw[{i}]"
        dr = c.table(dr, key)
        if "distribution" not in dr:
            c.fail(f"{key}.distribution", f"the key 'distribution' (one of {', '.join(DISTRIBUTIONS)})",
                   "nothing")
        dist = c.string(dr["distribution"], f"{key}.distribution", tuple(DISTRIBUTIONS))
        allowed = {"key", "distribution", *DISTRIBUTIONS[dist], *DRAW_OPTIONAL}
        c.keys(dr, key, allowed, required=("key", *DISTRIBUTIONS[dist]))
        k = c.string(dr["key"], f"{key}.key")
        _check_target_key(c, raw, k, f"{key}.key")
        entry = {"key": k, "distribution": dist,
                 "relative": _bool(c, dr.get("relative", False), f"{key}.relative")}
        if dist == "choice":
            v = dr["values"]
            if not isinstance(v, list) or not v or any(isinstance(x, (Mapping, list)) for x in v):
                c.fail(f"{key}.values", "a non-empty array of numbers or strings", _show(v))
            entry["values"] = list(v)
        else:
            for pk in DISTRIBUTIONS[dist]:
                entry[pk] = c.number(dr[pk], f"{key}.{pk}")
            if dist == "normal" and entry["std"] < 0:
                c.fail(f"{key}.std", "a standard deviation >= 0", _show(dr["std"]))
            if dist == "lognormal":
                if entry["sigma"] < 0:
                    c.fail(f"{key}.sigma", "a sigma >= 0", _show(dr["sigma"]))
                if entry["median"] <= 0:
                    c.fail(f"{key}.median", "a median > 0", _show(dr["median"]))
            if dist == "uniform" and not entry["low"] < entry["high"]:
                c.fail(f"{key}.high", f"a value above low ({entry['low']:g})", _show(dr["high"]))
            if dist == "triangular" and not (entry["low"] <= entry["mode"] <= entry["high"]
                                             and entry["low"] < entry["high"]):
                c.fail(f"{key}.mode", "low <= mode <= high with low < high",
                       f"low={entry['low']:g}, mode={entry['mode']:g}, high={entry['high']:g}")
        for ck in ("clip_low", "clip_high"):
            if ck in dr:
                entry[ck] = c.number(dr[ck], f"{key}.{ck}")
        if ("clip_low" in entry and "clip_high" in entry and isinstance(entry["clip_low"], float)
                and isinstance(entry["clip_high"], float) and not entry["clip_low"] < entry["clip_high"]):
            c.fail(f"{key}.clip_high", f"a value above clip_low ({entry['clip_low']:g})",
                   _show(dr["clip_high"]))
        draw_specs.append(entry)
    if draw_specs and draws == 0 and full_draws == 0:
        c.fail("study.draws", "a number of Monte Carlo draws >= 1 (study.draw entries are given)", "0")
    _check_study_size(c, st, sweeps, draws if draw_specs else 0, full_draws if draw_specs else 0)
    data["study"] = {"draws": draws, "full_draws": full_draws, "sweep": sweeps, "draw": draw_specs}


def _model_section(c: _Ctx, v: Any, section: str, *, required: bool) -> dict[str, Any]:
    """``[plant]`` / ``[controller_model]``: ``model`` (a reference string) with ``options`` and
    ``parameters``, or ``kind = "transfer_matrix"`` with the matrix's keys.  Only the form is
    checked here (no code runs, no file is read); :mod:`mpcproto.models.resolve` builds it."""
    from ..exceptions import ModelError
    from ..models.transfer_table import check_transfer_table

    tbl = c.table(v, section)
    kind = c.string(tbl.get("kind", "model"), f"{section}.kind", ("model", "transfer_matrix"))
    if kind == "transfer_matrix":
        try:
            check_transfer_table(tbl, what=section)
        except ModelError as e:
            raise e.replace(key=e.key or section).in_file(c.file) from None
        return {"model": tbl, "options": {}, "parameters": {}}
    c.keys(tbl, section, PLANT_KEYS, required=("model",) if required else ())
    if "model" not in tbl and ("options" in tbl):
        c.fail(f"{section}.model", "the key 'model' (options belong to a model named here)", "nothing")
    model = c.string(tbl["model"], f"{section}.model") if "model" in tbl else None
    if model is not None and not model.strip():
        c.fail(f"{section}.model", "a model reference (see mpcproto models)", "an empty string")
    options = c.table(tbl.get("options", {}), f"{section}.options")
    for k, x in options.items():
        if isinstance(x, (Mapping, list)) and not (isinstance(x, list) and
                                                   all(isinstance(y, (int, float, str)) for y in x)):
            c.fail(f"{section}.options.{k}", "a number, string, boolean or array of them", _found(x))
    # a [controller_model] without 'model' is the plant's model with other parameter values
    return {"model": model, "options": options,
            "parameters": c.name_map(tbl.get("parameters", {}), f"{section}.parameters")}


#: Most samples one run may have.  A run keeps every sample of every signal in memory, so a
#: duration typed in the wrong unit (hours as seconds, a misplaced exponent) would otherwise fill
#: the machine's memory before anything is reported.  Ten days at a 1 s sample time fit.
MAX_SAMPLES = 1_000_000


def _check_samples(c: _Ctx, key: str, dur: float, ts: float, raw: Any) -> None:
    if dur / ts > MAX_SAMPLES:
        c.fail(key, f"at most {MAX_SAMPLES:,} samples per run (duration / sample_time; here at "
               f"most {MAX_SAMPLES * ts:g} in the model's time unit: is the duration in the "
               f"model's time unit?)", f"{_show(raw)}, {dur / ts:.3g} samples")


#: Most cases one study may have (grid points x draws, CI-sized or full).  Every case is listed
#: and checked before the first one runs; a misplaced exponent in ``draws`` would otherwise keep
#: the batch busy for hours before anything is reported.
MAX_CASES = 100_000

#: Deepest nesting of tables and arrays a scenario file may have (the deepest real key path,
#: ``controllers.pid.loops[0].tau_c``, is five deep).
MAX_DEPTH = 20


def _check_study_size(c: _Ctx, st: Mapping, sweeps: list, draws: int, full_draws: int) -> None:
    for full in (True, False):
        grid = 1
        for sw in sweeps:
            grid *= len(sw["full_values"] if full else sw["values"])
        n_draw = full_draws if full else draws
        if grid * max(n_draw, 1) <= MAX_CASES:
            continue
        key = ("study.sweep" if grid > MAX_CASES else
               "study.full_draws" if full and "full_draws" in st else "study.draws")
        c.fail(key, f"at most {MAX_CASES:,} cases per study (grid points x draws"
               f"{', with --full' if full else ''})",
               f"{grid:,} grid point(s) x {max(n_draw, 1):,} draw(s) = {grid * max(n_draw, 1):,} "
               f"cases")


def _check_depth(c: _Ctx, raw: Mapping) -> None:
    """Refuse tables/arrays nested deeper than MAX_DEPTH (checked without recursion; the key
    paths are formed only when the nesting is too deep)."""
    stack: list[tuple[Any, int]] = [(raw, 0)]
    while stack:
        v, depth = stack.pop()
        if depth > MAX_DEPTH:
            _deepest_key(c, raw)
        t = type(v)
        if t in (str, float, int, bool):
            continue
        if t is dict or isinstance(v, Mapping):
            stack.extend((x, depth + 1) for x in v.values())
        elif isinstance(v, list):
            stack.extend((x, depth + 1) for x in v)


def _deepest_key(c: _Ctx, raw: Mapping) -> None:
    """The same walk as :func:`_check_depth`, naming the first key path too deep."""
    stack: list[tuple[Any, str, int]] = [(raw, "", 0)]
    while stack:
        v, key, depth = stack.pop()
        if depth > MAX_DEPTH:
            c.fail(key.split("[")[0] or None, f"tables and arrays nested at most {MAX_DEPTH} deep",
                   f"deeper nesting below '{key[:80]}{'...' if len(key) > 80 else ''}'")
        if isinstance(v, Mapping):
            stack.extend((x, f"{key}.{k}" if key else str(k), depth + 1) for k, x in v.items())
        elif isinstance(v, list):
            stack.extend((x, f"{key}[{i}]", depth + 1) for i, x in enumerate(v))


def _bool(c: _Ctx, v: Any, key: str) -> bool:
    if not isinstance(v, bool):
        c.fail(key, "true or false", _found(v))
    return v


def _criterion_name(entry: Mapping) -> str:
    parts = [entry["check"]]
    for k in ("cv", "mv", "variable"):
        if k in entry:
            parts.append(entry[k])
    if "controller" in entry:
        parts.append(entry["controller"])
    if "than" in entry:
        parts.append("vs_" + entry["than"])
    return ":".join(parts)


#: Sections a study may address, and how deep a key path goes in each.
_ADDRESSABLE = {
    "scenario": ("duration", "seed"),
    "plant": ("parameters", "elements"),
    "controller_model": ("parameters",),
    "operating_point": ("mvs", "dvs", "targets"),
    "controllers": None, "setpoints": None, "disturbances": None, "instruments": None,
    "actuators": None, "faults": None, "limits": None, "criteria": None,
}


def _check_target_key(c: _Ctx, raw: Mapping, k: str, where: str) -> None:
    """A study key path must address something a case can change (checked before running)."""
    try:
        parts = _split(k)
    except (ValueError, TypeError):
        parts = []
    if not parts or not isinstance(parts[0], str) or len(parts) < 2:
        c.fail(where, "a dotted key path such as 'plant.parameters.volume'", repr(k))
    head = parts[0]
    if head not in _ADDRESSABLE:
        c.fail(where, f"a key path starting with one of {', '.join(_ADDRESSABLE)}",
               f"{k!r}{suggest(str(head), list(_ADDRESSABLE))}")
    sub = _ADDRESSABLE[head]
    if sub is not None and parts[1] not in sub:
        c.fail(where, f"a key path {head}.<{'|'.join(sub)}>...", f"{k!r}{suggest(str(parts[1]), sub)}")
    elements = head == "plant" and parts[1] == "elements"
    if elements and (not isinstance(raw.get("plant"), Mapping)
                     or raw["plant"].get("kind") != "transfer_matrix"):
        c.fail(where, "plant.elements.<CV>.<input>.<key> only where [plant] is a transfer matrix "
               "(kind = \"transfer_matrix\"); a model's numbers are plant.parameters.<name>",
               repr(k))
    if elements and (len(parts) < 5 or parts[4] not in ("gain", "time_constants", "lead",
                                                        "dead_time")):
        c.fail(where, "a key path plant.elements.<CV>.<MV or DV>.<gain|time_constants[i]|lead|"
               "dead_time>", repr(k))
    if head in ("plant", "controller_model", "operating_point") and len(parts) != 3 \
            and not elements:
        c.fail(where, f"a key path {head}.{parts[1]}.<name>", repr(k))
    if elements or head not in ("plant", "controller_model", "operating_point", "scenario"):
        # the addressed entry must exist in the file (a sweep changes a value, it does not invent one)
        cur: Any = raw
        for p in parts[:-1]:
            if isinstance(p, int):
                ok = isinstance(cur, list) and p < len(cur)
                cur = cur[p] if ok else None
            else:
                ok = isinstance(cur, Mapping) and p in cur
                cur = cur[p] if ok else None
            if not ok:
                c.fail(where, "a key path to a table present in the file", f"{k!r} ('{p}' is not there)")
