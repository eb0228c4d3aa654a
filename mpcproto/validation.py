"""Declared constraints on settings, checked with one message template.

Layer 0 (imports only the standard library, numpy and :mod:`mpcproto.exceptions`).  A check states
*what is allowed* as a constraint object; :func:`check` applies it and raises a
:class:`~mpcproto.exceptions.SettingsError` with structured fields (``owner``, ``key``,
``expected``, ``found``, ``fix``) rendered as::

    <owner>: key '<key>': expected <expected>, found <found>[; <fix>]

A caller that knows where the setting sits places the error there without reading its text:
``err.at("controllers.mpc")`` prefixes the key path, ``err.in_file(path)`` makes it the scenario's
error.

>>> check(0, Interval(int, 1, None), owner="PredictiveController", key="horizon")
Traceback (most recent call last):
...
mpcproto.exceptions.SettingsError: PredictiveController: key 'horizon': expected an integer >= 1, found 0.
>>> check(0.5, Interval(float, 0, 1, closed="left"), owner="o", key="k")
0.5
"""

from __future__ import annotations

import difflib
import math
import numbers
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .exceptions import SettingsError, join_key

__all__ = ["Constraint", "Interval", "Options", "Names", "Boolean", "Text", "Length", "Table",
           "check", "validate", "fail", "shown", "did_you_mean"]


def shown(v: Any, limit: int = 60) -> str:
    """A found value as the message shows it: ``repr`` cut to *limit* characters; a table as
    ``a table {key, ...}``."""
    if isinstance(v, Mapping):
        keys = [str(k) for k in list(v)[:4]]
        return "a table {" + ", ".join(keys) + (", ..." if len(v) > 4 else "") + "}"
    r = repr(v)
    return r if len(r) <= limit else r[:limit - 3] + "..."


def did_you_mean(name: Any, choices: Sequence[str]) -> str:
    """``"did you mean 'x'?"`` for a misspelt *name*, or an empty string."""
    close = difflib.get_close_matches(str(name), [str(c) for c in choices], n=1, cutoff=0.6)
    return f"did you mean '{close[0]}'?" if close else ""


def fail(owner: str | None, key: str | None, expected: str, found: str, fix: str | None = None,
         **fields: Any) -> SettingsError:
    """The one error of a failed check (raise it): see the module's template."""
    return SettingsError(owner=owner, key=key, expected=expected, found=found, fix=fix or None,
                         **fields)


class Constraint:
    """What a value must be.  ``describe()`` says it in words (the ``expected`` part);
    ``convert(v)`` returns the accepted value or raises ``ValueError`` with the ``found`` text."""

    fix: str | None = None

    def describe(self) -> str:  # pragma: no cover - every constraint overrides it
        raise NotImplementedError

    def convert(self, v: Any) -> Any:  # pragma: no cover
        raise NotImplementedError


def _real(v: Any) -> float | None:
    """*v* as a float if it is a real number (not a bool, not a string); a huge int gives +-inf."""
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, numbers.Real):
        return None
    try:
        return float(v)
    except OverflowError:
        return math.inf if v > 0 else -math.inf


@dataclass(frozen=True)
class Interval(Constraint):
    """A real (``float``) or integer (``int``) number between *low* and *high* (None: unbounded).

    *closed* says which ends belong to it: ``"both"`` (default), ``"left"``, ``"right"`` or
    ``"neither"``.  NaN is always refused, infinities unless *allow_inf*; booleans are not numbers.
    An integer interval accepts integers only (not ``3.0``) and returns an ``int``.
    """

    kind: type = float
    low: float | None = None
    high: float | None = None
    closed: str = "both"
    allow_inf: bool = False
    noun: str | None = None
    fix: str | None = None

    def __post_init__(self) -> None:
        if self.kind not in (float, int):
            raise TypeError("Interval kind must be float or int")
        if self.closed not in ("both", "left", "right", "neither"):
            raise TypeError("Interval closed must be 'both', 'left', 'right' or 'neither'")

    def describe(self) -> str:
        noun = self.noun or ("an integer" if self.kind is int else "a number")
        lo_in = self.closed in ("both", "left")
        hi_in = self.closed in ("both", "right")
        if self.low is not None and self.high is not None:
            return (f"{noun} in {'[' if lo_in else '('}{self.low:g}, {self.high:g}"
                    f"{']' if hi_in else ')'}")
        if self.low is not None:
            return f"{noun} {'>=' if lo_in else '>'} {self.low:g}"
        if self.high is not None:
            return f"{noun} {'<=' if hi_in else '<'} {self.high:g}"
        return noun if self.allow_inf or self.kind is int else f"a finite {noun.split(' ', 1)[1]}"

    def convert(self, v: Any) -> float | int:
        f = _real(v)
        if f is None:
            raise ValueError(shown(v))
        if math.isnan(f) or (math.isinf(f) and not (self.allow_inf and self.kind is float)):
            raise ValueError(repr(v) if not isinstance(v, (int, float)) else f"{f:g}")
        if self.kind is int and not isinstance(v, numbers.Integral):
            raise ValueError(shown(v))
        lo_in = self.closed in ("both", "left")
        hi_in = self.closed in ("both", "right")
        if self.low is not None and (f < self.low or (f == self.low and not lo_in)):
            raise ValueError(f"{v!r}" if self.kind is int else f"{f:g}")
        if self.high is not None and (f > self.high or (f == self.high and not hi_in)):
            raise ValueError(f"{v!r}" if self.kind is int else f"{f:g}")
        return int(f) if self.kind is int else f


@dataclass(frozen=True)
class Options(Constraint):
    """One of a set of strings (or other hashable values); a misspelt string gets a suggestion."""

    values: tuple[Any, ...]
    noun: str = ""
    fix: str | None = None

    def describe(self) -> str:
        listed = ", ".join(repr(v) if isinstance(v, str) else str(v) for v in self.values)
        return f"{self.noun + ' ' if self.noun else ''}one of {listed}"

    def convert(self, v: Any) -> Any:
        if isinstance(v, (str, int, float, bool)) and not isinstance(v, bool) and v in self.values:
            return v
        if isinstance(v, bool) and any(v is x for x in self.values):
            return v
        raise ValueError(shown(v))

    def hint(self, v: Any) -> str:
        return did_you_mean(v, [str(x) for x in self.values]) if isinstance(v, str) else ""


@dataclass(frozen=True)
class Names(Constraint):
    """A name of a role in a model: ``Names("CV", ("level", "temperature"))`` -- "the name of a CV
    of this model (level, temperature)"."""

    role: str
    names: tuple[str, ...]
    fix: str | None = None

    def describe(self) -> str:
        article = "an" if self.role[:1].upper() in "AEFHILMNORSX" else "a"
        listed = ", ".join(self.names) if self.names else "none"
        return f"the name of {article} {self.role} of this model ({listed})"

    def convert(self, v: Any) -> str:
        if isinstance(v, str) and v in self.names:
            return v
        raise ValueError(shown(v))

    def hint(self, v: Any) -> str:
        return did_you_mean(v, self.names) if isinstance(v, str) else ""


@dataclass(frozen=True)
class Boolean(Constraint):
    """true or false (a boolean, not a number or a string)."""

    fix: str | None = None

    def describe(self) -> str:
        return "true or false"

    def convert(self, v: Any) -> bool:
        if isinstance(v, (bool, np.bool_)):
            return bool(v)
        raise ValueError(shown(v))


@dataclass(frozen=True)
class Text(Constraint):
    """A string on one line; *empty* allows the empty string."""

    empty: bool = False
    noun: str = "a string"
    fix: str | None = None

    def describe(self) -> str:
        return self.noun if self.empty else f"{self.noun} (not empty)"

    def convert(self, v: Any) -> str:
        if isinstance(v, str) and (v or self.empty) and "\n" not in v:
            return v
        raise ValueError(shown(v))


@dataclass(frozen=True)
class Length(Constraint):
    """A sequence of *length* items (or at least *low*), each meeting *item* (optional); returns a
    1-D float array when *item* is a number interval, else a list.  An item's error names its
    index (``key[2]``)."""

    length: int | None = None
    low: int = 0
    item: Constraint | None = None
    noun: str = "a list"
    fix: str | None = None

    def describe(self) -> str:
        n = (f"of {self.length} items" if self.length is not None
             else f"of at least {self.low} item{'s' if self.low != 1 else ''}" if self.low else "")
        of = f" of {self.item.describe().split(' ', 1)[1]}s" if isinstance(self.item, Interval) \
            else ""
        return " ".join(p for p in (self.noun + of, n) if p)

    def convert(self, v: Any) -> Any:
        if isinstance(v, (str, bytes, Mapping)) or not isinstance(v, (Sequence, np.ndarray)):
            raise ValueError(shown(v))
        items = list(np.asarray(v).reshape(-1)) if isinstance(v, np.ndarray) else list(v)
        if (self.length is not None and len(items) != self.length) or len(items) < self.low:
            raise ValueError(f"{len(items)} item{'s' if len(items) != 1 else ''}")
        return items


@dataclass(frozen=True)
class Table(Constraint):
    """A mapping whose keys each meet a constraint: ``Table({"at": Interval(...)},
    required=("at",))``; unknown keys are refused (with a suggestion)."""

    keys: Mapping[str, Constraint] = field(default_factory=dict)
    required: tuple[str, ...] = ()
    noun: str = "a table"
    fix: str | None = None

    def describe(self) -> str:
        return f"{self.noun} with keys {', '.join(self.keys)}"

    def convert(self, v: Any) -> Any:
        if not isinstance(v, Mapping):
            raise ValueError(shown(v))
        return v


def check(value: Any, constraint: Constraint, *, owner: str | None = None,
          key: str | None = None, fix: str | None = None) -> Any:
    """*value* converted by *constraint*, or the :class:`SettingsError` of the module's template
    (``owner``, ``key``, ``expected`` = the constraint in words, ``found`` = the value)."""
    try:
        out = constraint.convert(value)
    except ValueError as e:
        hint = getattr(constraint, "hint", lambda _v: "")(value)
        found = str(e) + (f" ({hint})" if hint else "")
        raise fail(owner, key, constraint.describe(), found,
                   fix or constraint.fix) from None
    if isinstance(constraint, Length) and constraint.item is not None:
        out = [check(x, constraint.item, owner=owner, key=f"{key or ''}[{i}]", fix=fix)
               for i, x in enumerate(out)]
        if isinstance(constraint.item, Interval):
            out = np.asarray(out, float)
    if isinstance(constraint, Table):
        out = validate(out, constraint.keys, owner=owner, prefix=key, required=constraint.required)
    return out


def validate(values: Mapping[str, Any], table: Mapping[str, Constraint], *,
             owner: str | None = None, prefix: str | None = None,
             required: Sequence[str] = (), unknown: str = "refuse") -> dict[str, Any]:
    """Check every entry of *values* against its constraint in *table*; return the converted
    entries.  A key of *required* that is missing, or (with ``unknown="refuse"``) a key not in
    *table*, is refused; ``unknown="keep"`` passes other keys through unchecked."""
    allowed = list(table)
    out: dict[str, Any] = {}
    for k, v in values.items():
        if k not in table:
            if unknown == "keep":
                out[k] = v
                continue
            hint = did_you_mean(k, allowed)
            raise fail(owner, join_key(prefix, str(k)), f"one of the keys {', '.join(allowed)}",
                       f"the unknown key {str(k)!r}" + (f" ({hint})" if hint else ""))
        out[k] = check(v, table[k], owner=owner, key=join_key(prefix, k))
    for k in required:
        if k not in values:
            raise fail(owner, join_key(prefix, k), f"a value for '{k}' (it is required)",
                       "nothing")
    return out
