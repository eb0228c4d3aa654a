r"""Transfer-function matrices written as TOML tables (a step-test model in a scenario or a file).

A plant identified from step tests is a matrix of elements, one per (CV, MV or DV) pair.  Written
as data (a ``[plant]`` / ``[controller_model]`` table with ``kind = "transfer_matrix"``, or a
``.toml`` file named as a model reference), it reads::

    kind = "transfer_matrix"          # only in a scenario's [plant] / [controller_model]
    name = "drum_step_test"           # optional
    description = "..."               # optional
    time_unit = "min"                 # "s", "min" or "h": the unit of time constants and dead times

    [mvs.feed_valve]                  # every variable: unit, nominal, low, high (physical range)
    unit = "%"; nominal = 40.0; low = 0.0; high = 100.0
    [dvs.inflow]                      # DVs may add measured = false
    unit = "m3/h"; nominal = 12.0; low = 0.0; high = 30.0
    [cvs.level]                       # a CV's nominal is its value with every input at its nominal
    unit = "%"; nominal = 50.0; low = 0.0; high = 100.0

    [elements.level]                  # elements.<cv>.<mv or dv>
    feed_valve = { gain = 0.08, integrating = true, dead_time = 0.5 }
    inflow = { gain = -0.3, time_constants = [2.0, 0.5], lead = 0.4, dead_time = 1.2 }

An element is ``gain`` (CV units per input unit; for an integrating element the ramp rate, CV
units per time unit per input unit), ``time_constants`` (none, one or two, > 0), ``lead``
(numerator time constant, needs a time constant), ``dead_time`` (>= 0) and ``integrating``
(true for ``K/s`` times the rest):

.. math:: g(s) = \frac{K(\tau_a s + 1)}{s^{[\text{integrating}]}\prod_k(\tau_k s + 1)} e^{-\theta s}

The table is checked here (every message starts with the key path, e.g.
``plant.elements.level.feed_valve.gain``) and realized by
:func:`~mpcproto.models.transfer_matrix.transfer_matrix_model`.  Nothing in it is evaluated.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from .._specs import as_float, shown
from ..exceptions import ModelError, join_key
from ..model import TIME_UNITS, Model, suggest
from .transfer_matrix import TransferElement, transfer_matrix_model

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

__all__ = ["TABLE_KEYS", "check_transfer_table", "transfer_table_model", "read_transfer_file"]

#: Keys of a transfer-matrix table (``kind`` only where a scenario section holds it).
TABLE_KEYS = ("kind", "name", "description", "time_unit", "mvs", "dvs", "cvs", "elements")
_VAR_KEYS = ("unit", "nominal", "low", "high", "description")
_ELEMENT_KEYS = ("gain", "time_constants", "lead", "dead_time", "integrating")


def _fail(key: str, expected: str, found: str) -> ModelError:
    return ModelError(key=key, expected=expected, found=found)


def _table(v: Any, key: str) -> dict:
    if not isinstance(v, Mapping):
        raise _fail(key, "a table", shown(v))
    return dict(v)


def _refuse_unknown(d: Mapping, allowed: tuple[str, ...], key: str) -> None:
    for k in d:
        if k not in allowed:
            raise _fail(f"{key}.{k}", f"one of the keys {', '.join(allowed)}",
                        f"the unknown key '{k}'{suggest(str(k), list(allowed))}")


def _number(v: Any, key: str) -> float:
    f = as_float(v)
    if f is None or not math.isfinite(f):
        raise _fail(key, "a finite number", shown(v))
    return f


def _variables(tbl: Any, role: str, key: str) -> list[dict[str, Any]]:
    allowed = _VAR_KEYS + (("measured",) if role == "dv" else ())
    out = []
    for name, spec in _table(tbl, key).items():
        where = f"{key}.{name}"
        if not str(name).isidentifier():
            raise _fail(where, "a variable name (letters, digits, underscores)", repr(name))
        spec = _table(spec, where)
        _refuse_unknown(spec, allowed, where)
        for k in ("unit", "nominal", "low", "high"):
            if k not in spec:
                raise _fail(f"{where}.{k}", f"the key '{k}' (every variable gives unit, nominal, "
                            "low and high: its physical range)", "nothing")
        if not isinstance(spec["unit"], str):
            raise _fail(f"{where}.unit", "a string (the unit)", shown(spec["unit"]))
        entry: dict[str, Any] = {"name": name, "unit": spec["unit"]}
        for k in ("nominal", "low", "high"):
            entry[k] = _number(spec[k], f"{where}.{k}")
        if not entry["low"] < entry["high"]:
            raise _fail(f"{where}.high", f"a value above low ({entry['low']:g})", shown(spec["high"]))
        if not entry["low"] <= entry["nominal"] <= entry["high"]:
            raise _fail(f"{where}.nominal", f"a value within [low, high] = [{entry['low']:g}, "
                        f"{entry['high']:g}]", shown(spec["nominal"]))
        if "description" in spec:
            if not isinstance(spec["description"], str):
                raise _fail(f"{where}.description", "a string", shown(spec["description"]))
            entry["description"] = spec["description"]
        if "measured" in spec:
            if not isinstance(spec["measured"], bool):
                raise _fail(f"{where}.measured", "true or false", shown(spec["measured"]))
            entry["measured"] = spec["measured"]
        out.append(entry)
    return out


def check_transfer_table(table: Any, *, what: str = "plant") -> dict[str, Any]:
    """Check a transfer-matrix table and return it as normalized plain data.

    Parameters
    ----------
    table : mapping
        The table (see the module docstring).
    what : str
        Key path of the table, first in every message (``"plant"``, ``"controller_model"``, or
        a file name).

    Returns
    -------
    dict
        ``kind``, ``name``, ``description``, ``time_unit``, ``mvs``, ``dvs``, ``cvs`` (lists of
        variable dicts) and ``elements`` (``{cv: {input: element dict}}``).

    Raises
    ------
    ModelError
        Naming the key path (also in its ``key`` attribute), what was expected and what was found.
    """
    t = _table(table, what)
    _refuse_unknown(t, TABLE_KEYS, what)
    if "kind" in t and t["kind"] != "transfer_matrix":
        raise _fail(f"{what}.kind", "'transfer_matrix'", shown(t["kind"]))
    for k in ("time_unit", "mvs", "cvs", "elements"):
        if k not in t:
            raise _fail(f"{what}.{k}", f"the key '{k}' (a transfer matrix needs time_unit, mvs, "
                        "cvs and elements)", "nothing")
    if t["time_unit"] not in TIME_UNITS:
        raise _fail(f"{what}.time_unit", f"one of {', '.join(repr(u) for u in TIME_UNITS)}",
                    shown(t["time_unit"]))
    for k in ("name", "description"):
        if k in t and not isinstance(t[k], str):
            raise _fail(f"{what}.{k}", "a string", shown(t[k]))
    mvs = _variables(t["mvs"], "mv", f"{what}.mvs")
    dvs = _variables(t.get("dvs", {}), "dv", f"{what}.dvs")
    cvs = _variables(t["cvs"], "cv", f"{what}.cvs")
    for role, vs in (("mvs", mvs), ("cvs", cvs)):
        if not vs:
            raise _fail(f"{what}.{role}", f"at least one {role[:-1].upper()}", "an empty table")
    names = [v["name"] for v in mvs + dvs + cvs]
    for n in names:
        if names.count(n) > 1:
            raise _fail(what, "every variable under its own name", f"'{n}' declared twice")
    inputs = [v["name"] for v in mvs + dvs]
    cv_names = [v["name"] for v in cvs]
    elements: dict[str, dict[str, Any]] = {}
    for cv, row in _table(t["elements"], f"{what}.elements").items():
        key = f"{what}.elements.{cv}"
        if cv not in cv_names:
            raise _fail(key, f"the name of a CV ({', '.join(cv_names)})",
                        f"'{cv}'{suggest(str(cv), cv_names)}")
        for inp, spec in _table(row, key).items():
            where = f"{key}.{inp}"
            if inp not in inputs:
                raise _fail(where, f"the name of an MV or DV ({', '.join(inputs)})",
                            f"'{inp}'{suggest(str(inp), inputs)}")
            spec = _table(spec, where)
            _refuse_unknown(spec, _ELEMENT_KEYS, where)
            if "gain" not in spec:
                raise _fail(f"{where}.gain", "the key 'gain' (CV units per input unit; the ramp "
                            "rate for an integrating element)", "nothing")
            try:
                TransferElement.coerce(spec, where)
            except ModelError as e:
                raise e.replace(owner=None, key=join_key(where, e.key)) from None
            elements.setdefault(cv, {})[inp] = dict(spec)
    for cv in cv_names:
        if not elements.get(cv):
            raise _fail(f"{what}.elements.{cv}", f"at least one element moving the CV '{cv}' "
                        "(a CV no input moves cannot be controlled)", "none")
    for mv in (v["name"] for v in mvs):
        if not any(mv in row for row in elements.values()):
            raise _fail(f"{what}.elements", f"an element for the MV '{mv}' (an MV that moves no "
                        "CV is of no use to a controller)", "none")
    return {"kind": "transfer_matrix", "name": t.get("name", what), "description":
            t.get("description", ""), "time_unit": t["time_unit"], "mvs": mvs, "dvs": dvs,
            "cvs": cvs, "elements": elements}


def transfer_table_model(table: Any, *, what: str = "plant") -> Model:
    """Check a transfer-matrix table (see :func:`check_transfer_table`) and build its model."""
    t = check_transfer_table(table, what=what)
    mv_names = {v["name"] for v in t["mvs"]}
    mv_el = {cv: {i: e for i, e in row.items() if i in mv_names} for cv, row in t["elements"].items()}
    dv_el = {cv: {i: e for i, e in row.items() if i not in mv_names}
             for cv, row in t["elements"].items()}
    dv_el = {cv: row for cv, row in dv_el.items() if row}
    return transfer_matrix_model(
        t["name"], mvs=t["mvs"], cvs=t["cvs"], elements=mv_el, dvs=t["dvs"] or None,
        dv_elements=dv_el if t["dvs"] and dv_el else None, time_unit=t["time_unit"],
        description=t["description"] or f"transfer matrix ({what})")


def read_transfer_file(path: str | Path) -> dict[str, Any]:
    """The table of a transfer-matrix ``.toml`` file (not yet checked); errors name the file."""
    p = Path(path)
    try:
        text = p.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise ModelError(f"{p}: expected a transfer-matrix TOML file; found no file at this path "
                         f"(looked in {p.resolve().parent}).") from None
    except (OSError, UnicodeDecodeError) as e:
        raise ModelError(f"{p}: expected a readable UTF-8 TOML file; found: {e}.") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ModelError(f"{p}: expected valid TOML; found a syntax error: {e}.") from None
    raw.setdefault("name", p.stem)
    return raw
