"""Reading plain-dict specs (scenario tables, keyword dicts) with errors that name the key.

Shared by every factory that takes a user spec (signals, instruments, actuators, faults, PID
settings): each check raises :class:`~mpcproto.exceptions.SettingsError` whose message starts with
*what* (the key path), says what was expected and shows what was found.  Layer 0: imports nothing
of the package but the exceptions and :func:`~mpcproto.model.suggest`.
"""

from __future__ import annotations

import copy
import math
import numbers
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .exceptions import SettingsError, join_key
from .model import suggest
from .validation import shown

__all__ = ["shown", "as_float", "choice", "number", "check_keys", "refuse_unknown_keys",
           "paired_series", "plain_copy"]


def plain_copy(v: Any) -> Any:
    """A deep copy of plain data (a parsed TOML file: dicts, lists, numbers, strings), several
    times faster than ``copy.deepcopy``; anything else is handed to ``copy.deepcopy``.  Recursive:
    for data whose nesting was checked (``scenario.schema.MAX_DEPTH``)."""
    t = type(v)
    if t is dict:
        return {k: plain_copy(x) for k, x in v.items()}
    if t is list:
        return [plain_copy(x) for x in v]
    if t in (str, float, int, bool) or v is None:
        return v
    return copy.deepcopy(v)


def refuse_unknown_keys(spec: Mapping[Any, Any], allowed: Sequence[str], *, what: str,
                       context: str = "", error: type[Exception] = SettingsError,
                       remedy: str = "", key: str | None = None) -> None:
    """Raise *error* (default :class:`SettingsError`) for the first key of *spec* not in
    *allowed*, at that key (below *key*, the path of *spec* itself, if given)."""
    names = list(allowed)
    for k in spec:
        if k not in names:
            raise error(owner=what, key=join_key(key, str(k)),
                        expected=f"one of the keys {', '.join(names)}{context}",
                        found=f"the unknown key {shown(k)}{suggest(str(k), names)}",
                        fix=remedy.strip() or None)


def check_keys(spec: Mapping[str, Any], allowed: Sequence[str], required: Sequence[str], *,
               what: str, kind: str) -> None:
    """Raise :class:`SettingsError` for a missing or unknown key of a spec dict."""
    refuse_unknown_keys(spec, allowed, what=what, context=f" for kind '{kind}'")
    for k in required:
        if k not in spec:
            raise SettingsError(owner=what, key=k, expected=f"the key '{k}' (kind '{kind}' needs it)",
                                found=f"keys {', '.join(map(str, spec))}")


def as_float(v: Any) -> float | None:
    """*v* as a float if it is a real number (not a bool, not a string), else None.

    Integers too large for a float give +-inf (refused later as not finite).
    """
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        return None
    try:
        return float(v)
    except OverflowError:
        return math.inf if v > 0 else -math.inf
    except (TypeError, ValueError):
        return None


def choice(value: Any, options: Sequence[str], *, what: str, key: str, noun: str) -> str:
    """*value* if it is one of the strings *options*, else a :class:`SettingsError` naming *key*."""
    if isinstance(value, str) and value in options:
        return value
    found = (f"the unknown {noun} {value!r}{suggest(value, list(options))}"
             if isinstance(value, str) else shown(value))
    raise SettingsError(owner=what, key=key, expected=f"one of: {', '.join(options)}",
                        found=found)


def number(spec: Mapping[str, Any], key: str, *, what: str, low: float = -math.inf,
           strict_low: bool = False, default: Any = None, allow_inf: bool = False) -> float:
    """Read ``spec[key]`` as a float in range, or raise a :class:`SettingsError` naming it."""
    if key not in spec:
        return default
    v = spec[key]
    f = as_float(v)
    if f is None:
        raise SettingsError(owner=what, key=key, expected="a number", found=shown(v))
    if math.isnan(f) or (math.isinf(f) and not allow_inf):
        raise SettingsError(owner=what, key=key, expected="a finite number", found=shown(v))
    if (f <= low) if strict_low else (f < low):
        rel = ">" if strict_low else ">="
        raise SettingsError(owner=what, key=key, expected=f"a number {rel} {low:g}",
                            found=f"{f:g}")
    return f


def paired_series(t: Any, y: Any, *, what: str, min_len: int = 5,
                  finite_y: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Sample times *t* and values *y* as 1-D float arrays of the same length (>= *min_len*).

    *t* must be finite; *y* too unless *finite_y* is False (NaN readings are then left to the
    caller).  Raises :class:`SettingsError` naming *what*, the expected form and what was found.
    """
    try:
        ta = np.asarray(t, float).reshape(-1)
        ya = np.asarray(y, float).reshape(-1)
    except (TypeError, ValueError, OverflowError):
        raise SettingsError(f"t and y must be sequences of numbers; found {shown(t)} and "
                            f"{shown(y)}.", owner=what) from None
    if ta.shape != ya.shape or ta.size < min_len:
        raise SettingsError(f"t and y must be 1-D of the same length (>= {min_len}); "
                            f"found shapes {ta.shape} and {ya.shape}.", owner=what)
    if not np.all(np.isfinite(ta)) or (finite_y and not np.all(np.isfinite(ya))):
        raise SettingsError(f"t{'' if not finite_y else ' and y'} must be finite; found "
                            f"NaN or inf.", owner=what)
    return ta, ya
