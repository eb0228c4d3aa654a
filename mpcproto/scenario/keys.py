"""The words of the scenario format and the checker its parsers share.

The vocabulary (top-level keys, criterion checks, distributions...), the key-path splitter and
:class:`_Ctx`, which raises the :class:`~mpcproto.exceptions.ScenarioError` of a key with the
file, the key path, what was expected and what was found.  Used by :mod:`.sections` (the section
parsers) and :mod:`.schema` (the scenario type, loading and the parse that calls the sections).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

from ..exceptions import ScenarioError
from .._specs import as_float, shown as _show
from ..model import suggest

# ----------------------------------------------------------------------------------------- vocabulary
#: The pass/fail checks a ``[[criteria]]`` entry may name, with the keys each one needs.
#: ``kpi`` checks read a KPI of one CV (or MV) of one controller and compare it with ``limit``.
CRITERION_CHECKS: dict[str, dict[str, Any]] = {
    # name: (required keys, optional keys, what it does)
    "iae_below": {"needs": ("cv", "limit"), "doc": "integral of absolute error of a CV below limit"},
    "ise_below": {"needs": ("cv", "limit"), "doc": "integral of squared error of a CV below limit"},
    "itae_below": {"needs": ("cv", "limit"), "doc": "time-weighted IAE of a CV below limit"},
    "max_error_below": {"needs": ("cv", "limit"), "doc": "largest |setpoint - CV| below limit"},
    "settling_time_below": {"needs": ("cv", "limit"), "doc": "settling time of a CV below limit "
                                                             "(optional 'band', CV units)"},
    "overshoot_below": {"needs": ("cv", "limit"), "doc": "overshoot of a CV (fraction) below limit"},
    "peak_below": {"needs": ("variable", "limit"), "doc": "highest value a variable reaches below limit"},
    "low_above": {"needs": ("variable", "limit"), "doc": "lowest value a variable reaches above limit"},
    "travel_below": {"needs": ("mv", "limit"), "doc": "total travel of an MV below limit"},
    "no_limit_violation": {"needs": (), "doc": "no limit violation event beyond 'tolerance' x the "
                                               "variable's range (any variable, or one)"},
    "no_solver_failure": {"needs": (), "doc": "the controller never failed nor fell back"},
    "solve_time_below": {"needs": ("fraction",), "doc": "worst solve time below this fraction of Ts"},
    "better_than": {"needs": ("than", "kpi", "cv", "by_percent"),
                    "doc": "this controller's KPI of a CV at least by_percent % lower than the other's"},
}
CRITERION_KEYS = {"check", "controller", "cv", "mv", "variable", "limit", "fraction", "than", "kpi",
                  "by_percent", "name", "tolerance", "band"}
BETTER_KPIS = ("iae", "ise", "itae", "max_abs_error", "settling_time", "overshoot")

#: Distributions a Monte Carlo ``[[study.draw]]`` may use, with their parameter keys.
DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "normal": ("mean", "std"),
    "uniform": ("low", "high"),
    "lognormal": ("median", "sigma"),
    "triangular": ("low", "mode", "high"),
    "choice": ("values",),
}
DRAW_OPTIONAL = {"relative", "clip_low", "clip_high"}

TOP_KEYS = ("scenario", "plant", "controller_model", "operating_point", "controllers", "setpoints",
            "limits", "disturbances", "instruments", "actuators", "faults", "criteria", "study")
SCENARIO_KEYS = ("name", "description", "duration", "sample_time", "seed", "dead_time", "ci")
PLANT_KEYS = ("model", "kind", "options", "parameters")
CONTROLLER_MODEL_KEYS = PLANT_KEYS
OP_KEYS = ("mvs", "dvs", "targets", "state_guess", "pick")
OP_PICKS = ("nearest", "stable", "unstable")
CONTROLLER_KINDS = ("mpc", "pid")
STUDY_KEYS = ("draws", "full_draws", "sweep", "draw")
SWEEP_KEYS = ("key", "values", "full_values", "label")


# ----------------------------------------------------------------------------------------- helpers
def _type_name(v: Any) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, int):
        return "an integer"
    if isinstance(v, float):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, Mapping):
        return "a table"
    if isinstance(v, list):
        return "an array"
    return f"a {type(v).__name__}"


def _found(v: Any) -> str:
    """What was found, for messages: its type and a short rendering (a table shows its keys)."""
    return _show(v) if isinstance(v, Mapping) else f"{_type_name(v)} ({_show(v)})"


class _Ctx:
    """Where we are: the file (for messages) and helpers that raise with the key path."""

    def __init__(self, file: str):
        self.file = file

    def fail(self, key: str, expected: str, found: Any, hint: str = "") -> None:
        raise ScenarioError(file=self.file, key=key or None, expected=expected, found=str(found),
                            fix=hint or None)

    def table(self, v: Any, key: str) -> dict:
        if not isinstance(v, Mapping):
            self.fail(key, "a table", _found(v))
        return dict(v)

    def keys(self, d: Mapping, key: str, allowed: tuple[str, ...] | set[str],
             required: tuple[str, ...] = ()) -> None:
        for k in d:
            if k not in allowed:
                where = f"{key}.{k}" if key else k
                self.fail(where, f"one of the keys {', '.join(sorted(allowed))} in "
                          f"{'[' + key + ']' if key else 'the top level'}",
                          f"the unknown key '{k}'{suggest(k, sorted(allowed))}")
        for k in required:
            if k not in d:
                where = f"{key}.{k}" if key else k
                self.fail(where, f"the key '{k}' (it is required)", "nothing")

    def number(self, v: Any, key: str, *, low: float = -math.inf, high: float = math.inf,
               strict_low: bool = False, integer: bool = False) -> float:
        ok_type = isinstance(v, int) if integer else isinstance(v, (int, float))
        if isinstance(v, bool) or not ok_type:
            self.fail(key, "an integer" if integer else "a number", _found(v))
        fv = as_float(v)  # an integer too large for a float is inf, refused below
        if not math.isfinite(fv):
            self.fail(key, "a finite number", _show(v))
        if (strict_low and fv <= low) or (not strict_low and fv < low) or fv > high:
            rng = []
            if low > -math.inf:
                rng.append(f"{'>' if strict_low else '>='} {low:g}")
            if high < math.inf:
                rng.append(f"<= {high:g}")
            self.fail(key, f"{'an integer' if integer else 'a number'} {' and '.join(rng)}", _show(v))
        return int(v) if integer else fv

    def string(self, v: Any, key: str, choices: tuple[str, ...] | None = None) -> str:
        if not isinstance(v, str):
            self.fail(key, "a string" + (f" (one of {', '.join(choices)})" if choices else ""),
                      _found(v))
        if choices is not None and v not in choices:
            self.fail(key, f"one of {', '.join(repr(c) for c in choices)}",
                      f"{v!r}{suggest(v, choices)}")
        return v

    def table_array(self, v: Any, key: str) -> list:
        """An array of tables (``[[key]]`` entries); the entries are checked by the caller."""
        if not isinstance(v, list):
            self.fail(key, f"an array of tables ([[{key}]] entries)", _type_name(v))
        return v

    def name_map(self, v: Any, key: str, *, values: str = "number") -> dict:
        """A table of variable name -> number (or -> table when values == 'table')."""
        d = self.table(v, key)
        out = {}
        for k, x in d.items():
            if not k.isidentifier():
                self.fail(f"{key}.{k}", "a variable name (letters, digits, underscores)", repr(k))
            if values == "number":
                out[k] = self.number(x, f"{key}.{k}")
            elif values == "table":
                out[k] = self.table(x, f"{key}.{k}")
            else:
                out[k] = x
        return out


_PIECE = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)|\[(\d+)\]|(\.)")


def _split(key: str) -> list[str | int]:
    """``"criteria[2].limit"`` -> ``["criteria", 2, "limit"]``; raises ValueError when malformed."""
    parts: list[str | int] = []
    pos = 0
    expect_name = True
    while pos < len(key):
        m = _PIECE.match(key, pos)
        if m is None:
            raise ValueError(key)
        name, idx, dot = m.groups()
        if name is not None:
            if not expect_name:
                raise ValueError(key)
            parts.append(name)
            expect_name = False
        elif idx is not None:
            if expect_name:
                raise ValueError(key)
            parts.append(int(idx))
        else:
            if expect_name:
                raise ValueError(key)
            expect_name = True
        pos = m.end()
    if expect_name or not parts:
        raise ValueError(key)
    return parts
