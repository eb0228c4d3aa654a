"""Time signals for disturbances, setpoints and zone limits.

Every signal is an object with ``value(t)`` that accepts a scalar or an array of times and returns
floats of the same shape.  A signal is either *relative* (``base`` is None: it is added to the
value the variable has at the operating point -- the nominal DV, the initial CV, the model's
physical bound for a limit) or *absolute* (``base`` given: ``value(t) = base + shape(t)``).

Plain-dict specs (:func:`signal_from_spec`)
-------------------------------------------
Every spec has ``"kind"`` and may have ``"base"``.  Times are in the model's time unit.

=============  ============================================================================
kind           keys (required; *optional* = default)
=============  ============================================================================
constant       ``value``
step           ``at``, ``size``
ramp           ``start``, ``duration`` (> 0), ``size`` (total change, reached at start+duration
               and held afterwards)
pulse          ``at``, ``duration`` (> 0), ``size``
sine           ``amplitude``, ``period`` (> 0); *start* = 0, *phase_deg* = 0 (zero before start)
random_walk    ``step_std`` (>= 0, standard deviation of each increment), ``interval`` (> 0,
               time between increments); *start* = 0, *low* / *high* (clip the walk),
               *seed* (else the ``rng`` given to the factory)
table          ``times`` (strictly increasing), ``values``; *interpolation* = ``"linear"`` or
               ``"hold"`` (flat before the first and after the last point)
csv            ``path``; *time_column* / *value_column* (name or 0-based index; default the
               first and second columns), *interpolation*, *max_gap* (largest allowed time
               step between rows); a regular file of at most 16 MB
=============  ============================================================================

A list of specs is their sum.  A bare number is an absolute constant.

Example
-------
>>> from mpcproto.sim import signal_from_spec
>>> s = signal_from_spec({"kind": "step", "at": 10, "size": 0.5}, what="dvs.feed")
>>> s.value([0, 10, 20]).tolist()
[0.0, 0.5, 0.5]
"""

from __future__ import annotations

import csv
import math
import os
import stat
from array import array
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._specs import as_float, check_keys, choice, number, shown
from ..exceptions import SettingsError
from ..model import suggest

__all__ = ["Signal", "Constant", "Step", "Ramp", "Pulse", "Sine", "RandomWalk", "Table", "Sum",
           "signal_from_spec", "table_from_csv", "SIGNAL_KINDS"]


class Signal:
    """Base class: ``value(t) = (base or 0) + shape(t)``."""

    kind = "signal"

    def __init__(self, base: float | None = None):
        self.base = None if base is None else float(base)

    @property
    def relative(self) -> bool:
        """True when the signal is an offset from the variable's operating value."""
        return self.base is None

    def shape(self, t: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def value(self, t: Any) -> Any:
        """Value at time(s) *t* (scalar in, float out; array in, array out)."""
        arr = np.asarray(t, float)
        out = self.shape(np.atleast_1d(arr)) + (self.base or 0.0)
        return float(out[0]) if arr.ndim == 0 else out.reshape(arr.shape)

    def __call__(self, t: Any) -> Any:
        return self.value(t)

    def known_shape(self, t: np.ndarray) -> np.ndarray:
        """The part of :meth:`shape` known in advance (a program: steps, ramps, tables...), at
        the times *t* (an array); a signal whose future is not known (a random walk) gives 0.
        What a controller's setpoint preview may see; the unknown part is held at its value now.
        """
        return self.shape(t)

    def stored_values(self, t_end: float) -> int:
        """How many values the signal keeps in memory to be evaluated up to *t_end* (a size
        estimate made before anything is allocated; 0 for a closed-form shape)."""
        return 0

    def resolve(self, reference: float) -> float:
        """Offset to add to :meth:`value`: *reference* for a relative signal, 0 otherwise."""
        return float(reference) if self.relative else 0.0

    def __repr__(self) -> str:
        fields = {k: v for k, v in vars(self).items() if not k.startswith("_")}
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in fields.items())})"


class Constant(Signal):
    """A constant ``value`` (absolute unless ``relative=True``)."""

    kind = "constant"

    def __init__(self, value: float, *, relative: bool = False):
        super().__init__(None if relative else float(value))
        self._offset = float(value) if relative else 0.0

    def shape(self, t):
        return np.full(t.shape, self._offset)


class Step(Signal):
    """0 before ``at``, ``size`` from ``at`` on."""

    kind = "step"

    def __init__(self, at: float, size: float, base: float | None = None):
        super().__init__(base)
        self.at, self.size = float(at), float(size)

    def shape(self, t):
        return np.where(t >= self.at, self.size, 0.0)


class Ramp(Signal):
    """0 before ``start``, rising linearly to ``size`` at ``start + duration``, then held."""

    kind = "ramp"

    def __init__(self, start: float, duration: float, size: float, base: float | None = None):
        super().__init__(base)
        self.start, self.duration, self.size = float(start), float(duration), float(size)

    def shape(self, t):
        return self.size * np.clip((t - self.start) / self.duration, 0.0, 1.0)


class Pulse(Signal):
    """``size`` for ``at <= t < at + duration``, 0 otherwise."""

    kind = "pulse"

    def __init__(self, at: float, duration: float, size: float, base: float | None = None):
        super().__init__(base)
        self.at, self.duration, self.size = float(at), float(duration), float(size)

    def shape(self, t):
        return np.where((t >= self.at) & (t < self.at + self.duration), self.size, 0.0)


class Sine(Signal):
    """``amplitude * sin(2 pi (t - start) / period + phase)`` from ``start`` on, 0 before."""

    kind = "sine"

    def __init__(self, amplitude: float, period: float, start: float = 0.0, phase_deg: float = 0.0,
                 base: float | None = None):
        super().__init__(base)
        self.amplitude, self.period = float(amplitude), float(period)
        self.start, self.phase_deg = float(start), float(phase_deg)

    def shape(self, t):
        arg = 2 * np.pi * (t - self.start) / self.period + np.deg2rad(self.phase_deg)
        return np.where(t >= self.start, self.amplitude * np.sin(arg), 0.0)


class RandomWalk(Signal):
    """Piecewise-constant random walk: every ``interval`` an increment N(0, step_std^2) is added.

    The increments come from *rng* (a ``numpy.random.Generator`` or a seed); they are drawn in
    order as later times are asked for, so the same seed always gives the same path whatever the
    order of the queries.  ``low``/``high`` clip the walk (the clipped value is where it continues).
    """

    kind = "random_walk"

    def __init__(self, step_std: float, interval: float, *, start: float = 0.0,
                 low: float = -math.inf, high: float = math.inf, rng: Any = None,
                 base: float | None = None):
        super().__init__(base)
        self.step_std, self.interval, self.start = float(step_std), float(interval), float(start)
        self.low, self.high = float(low), float(high)
        self._rng = np.random.default_rng(rng)
        self._path = np.zeros(1)   # value on [start + k*interval, start + (k+1)*interval)

    def _extend(self, n: int) -> None:
        have = self._path.shape[0]
        if n <= have:
            return
        inc = self._rng.standard_normal(n - have) * self.step_std
        out = np.empty(n)
        out[:have] = self._path
        v = self._path[-1]
        for i, s in enumerate(inc, start=have):
            v = min(max(v + s, self.low), self.high)
            out[i] = v
        self._path = out

    def stored_values(self, t_end: float) -> int:
        steps = (float(t_end) - self.start) / self.interval
        return 0 if not steps > 0 else (int(min(steps, 1e18)) + 1)

    def shape(self, t):
        k = np.floor((t - self.start) / self.interval).astype(np.int64)
        k = np.clip(k, -1, None)
        if k.size:
            self._extend(int(k.max()) + 1)
        return np.where(k >= 0, self._path[np.clip(k, 0, None)], 0.0)

    def known_shape(self, t):
        return np.zeros(np.shape(t))      # not known in advance (and nothing drawn here)


class Table(Signal):
    """Values at given times, linear between them (``"linear"``) or held (``"hold"``)."""

    kind = "table"

    def __init__(self, times: Sequence[float], values: Sequence[float], *,
                 interpolation: str = "linear", base: float | None = None):
        super().__init__(base)
        self.times = np.asarray(times, float)
        self.values = np.asarray(values, float)
        self.interpolation = interpolation

    def shape(self, t):
        if self.interpolation == "linear":
            return np.interp(t, self.times, self.values)
        idx = np.searchsorted(self.times, t, side="right") - 1
        return self.values[np.clip(idx, 0, len(self.values) - 1)]


class Sum(Signal):
    """Sum of several signals; absolute if any part has a base (at most one may)."""

    kind = "sum"

    def __init__(self, parts: Sequence[Signal]):
        bases = [p.base for p in parts if p.base is not None]
        super().__init__(bases[0] if bases else None)
        self.parts = list(parts)

    def stored_values(self, t_end: float) -> int:
        return sum(p.stored_values(t_end) for p in self.parts)

    def shape(self, t):
        out = np.zeros(t.shape)
        for p in self.parts:
            out = out + p.shape(t)
        return out

    def known_shape(self, t):
        out = np.zeros(t.shape)
        for p in self.parts:
            out = out + p.known_shape(t)
        return out


# ---------------------------------------------------------------------------------- factory
_KEYS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    # kind: (required, optional)
    "constant": (("value",), ()),
    "step": (("at", "size"), ("base",)),
    "ramp": (("start", "duration", "size"), ("base",)),
    "pulse": (("at", "duration", "size"), ("base",)),
    "sine": (("amplitude", "period"), ("start", "phase_deg", "base")),
    "random_walk": (("step_std", "interval"), ("start", "low", "high", "seed", "base")),
    "table": (("times", "values"), ("interpolation", "base")),
    "csv": (("path",), ("time_column", "value_column", "interpolation", "max_gap", "base")),
}
SIGNAL_KINDS = tuple(_KEYS)


def signal_from_spec(spec: Any, *, what: str, rng: Any = None,
                     base_dir: str | Path | None = None) -> Signal:
    """Build a :class:`Signal` from a plain spec (dict, list of dicts, number or Signal).

    Parameters
    ----------
    spec : Mapping, list, float or Signal
        See the module docstring for the keys of each kind.
    what : str
        Where the spec comes from (``"dvs.draw_off"``); every error message starts with it.
    rng : int, numpy.random.Generator or None
        Source of randomness for ``random_walk`` specs without their own ``seed``.
    base_dir : path, optional
        Directory relative ``csv`` paths are resolved against.

    Raises
    ------
    SettingsError
        Unknown kind (with a did-you-mean hint), missing or unknown key, a value of the wrong type
        or out of range (negative duration, non-positive period...), a table with unsorted times.
    """
    if isinstance(spec, Signal):
        return spec
    f = as_float(spec)
    if f is not None:
        if not math.isfinite(f):
            raise SettingsError(owner=what, expected="a finite constant", found=shown(spec))
        return Constant(f)
    if isinstance(spec, (list, tuple)):
        if not spec:
            raise SettingsError(owner=what, expected="a signal table or a non-empty list of them",
                                found="an empty list")
        parts = []
        for i, s in enumerate(spec):
            try:
                parts.append(signal_from_spec(s, what=what, rng=rng, base_dir=base_dir))
            except SettingsError as e:
                raise e.at(f"[{i}]") from None
        if sum(p.base is not None for p in parts) > 1:
            raise SettingsError(owner=what, key="base",
                                expected="at most one part of a summed signal with a 'base' "
                                         "(absolute value)",
                                found=f"{sum(p.base is not None for p in parts)}")
        return parts[0] if len(parts) == 1 else Sum(parts)
    if not isinstance(spec, Mapping):
        raise SettingsError(owner=what, expected="a signal table with a 'kind', a list of them or "
                            "a number", found=f"{type(spec).__name__} {shown(spec)}")
    kind = choice(spec.get("kind"), SIGNAL_KINDS, what=what, key="kind", noun="signal kind")
    req, opt = _KEYS[kind]
    body = {k: v for k, v in spec.items() if k != "kind"}
    check_keys(body, req + opt, req, what=what, kind=kind)
    w = f"{what} ({kind})"
    base = number(body, "base", what=w)
    if kind == "constant":
        return Constant(number(body, "value", what=w))
    if kind == "step":
        return Step(number(body, "at", what=w), number(body, "size", what=w), base)
    if kind == "ramp":
        return Ramp(number(body, "start", what=w),
                    number(body, "duration", what=w, low=0.0, strict_low=True),
                    number(body, "size", what=w), base)
    if kind == "pulse":
        return Pulse(number(body, "at", what=w),
                     number(body, "duration", what=w, low=0.0, strict_low=True),
                     number(body, "size", what=w), base)
    if kind == "sine":
        return Sine(number(body, "amplitude", what=w),
                    number(body, "period", what=w, low=0.0, strict_low=True),
                    number(body, "start", what=w, default=0.0),
                    number(body, "phase_deg", what=w, default=0.0), base)
    if kind == "random_walk":
        low = number(body, "low", what=w, default=-math.inf, allow_inf=True)
        high = number(body, "high", what=w, default=math.inf, allow_inf=True)
        if not low <= 0.0 <= high:
            raise SettingsError(owner=w, key="low" if low > 0 else "high",
                                expected="low <= 0 <= high (the walk starts at 0)",
                                found=f"low={low:g}, high={high:g}")
        seed = body.get("seed")
        if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int) or seed < 0):
            raise SettingsError(owner=w, key="seed", expected="an integer >= 0", found=shown(seed))
        return RandomWalk(number(body, "step_std", what=w, low=0.0),
                          number(body, "interval", what=w, low=0.0, strict_low=True),
                          start=number(body, "start", what=w, default=0.0), low=low, high=high,
                          rng=seed if seed is not None else rng, base=base)
    interp = choice(body.get("interpolation", "linear"), ("linear", "hold"), what=w,
                    key="interpolation", noun="interpolation")
    if kind == "table":
        times = _float_list(body["times"], "times", what=w)
        values = _float_list(body["values"], "values", what=w)
        if len(times) != len(values):
            raise SettingsError(owner=w, key="values",
                                expected=f"as many values as times ({len(times)})",
                                found=f"{len(values)} values")
        _check_times(times, what=w, where="'times'", key="times")
        return Table(times, values, interpolation=interp, base=base)
    if not isinstance(body["path"], (str, os.PathLike)) or not str(body["path"]):
        raise SettingsError(owner=w, key="path", expected="a file name (a string)",
                            found=shown(body["path"]))
    for key in ("time_column", "value_column"):
        c = body.get(key, 0)
        if isinstance(c, bool) or not isinstance(c, (int, str)):
            raise SettingsError(owner=w, key=key, expected="a column name (a string) or a 0-based "
                                "index (an integer)", found=shown(c))
    path = Path(body["path"])
    if base_dir is not None and not path.is_absolute():
        path = Path(base_dir) / path
    max_gap = number(body, "max_gap", what=w, low=0.0, strict_low=True)
    times, values = table_from_csv(path, time_column=body.get("time_column", 0),
                                   value_column=body.get("value_column", 1), what=w,
                                   max_gap=max_gap)
    return Table(times, values, interpolation=interp, base=base)


def _float_list(v: Any, key: str, *, what: str) -> list[float]:
    if isinstance(v, (str, bytes)) or not isinstance(v, Sequence):
        raise SettingsError(owner=what, key=key, expected="a list of numbers", found=shown(v))
    out = []
    for i, x in enumerate(v):
        f = as_float(x)
        if f is None:
            raise SettingsError(owner=what, key=f"{key}[{i}]", expected="a number", found=shown(x))
        if not math.isfinite(f):
            raise SettingsError(owner=what, key=f"{key}[{i}]", expected="a finite number",
                                found=shown(x))
        out.append(f)
    if not out:
        raise SettingsError(owner=what, key=key, expected="at least one point", found="[]")
    return out


def _check_times(times: Sequence[float], *, what: str, where: str, max_gap: float | None = None,
                 row_of=lambda i: i, key: str | None = None) -> None:
    t = np.asarray(times, float)
    d = np.diff(t)
    bad = np.flatnonzero(d <= 0)
    if bad.size:
        i = int(bad[0]) + 1
        raise SettingsError(
            f"{where} must be strictly increasing; found {t[i]:g} at {row_of(i)} after "
            f"{t[i - 1]:g} at {row_of(i - 1)}. Sort the table and remove duplicate times.",
            owner=what, key=key)
    if max_gap is not None:
        big = np.flatnonzero(d > max_gap)
        if big.size:
            i = int(big[0])
            raise SettingsError(
                f"{where} has a gap of {d[i]:g} between {t[i]:g} ({row_of(i)}) and "
                f"{t[i + 1]:g} ({row_of(i + 1)}), more than max_gap={max_gap:g}.",
                owner=what, key=key)


def _cut(text: str, limit: int = 120) -> str:
    return text if len(text) <= limit else text[:limit - 3] + "..."


#: Largest CSV table a signal may read (bytes): about a million rows of a time and a value.  The
#: limit keeps a wrong path (a log file, a data dump) from taking the memory and minutes to read.
MAX_CSV_BYTES = 16 * 1024 * 1024


def table_from_csv(path: str | Path, *, time_column: int | str = 0, value_column: int | str = 1,
                   what: str = "csv table", max_gap: float | None = None
                   ) -> tuple[list[float], list[float]]:
    """Read (times, values) from a CSV file with a header row.

    Empty or non-numeric cells, unsorted or repeated times and (with *max_gap*) time gaps larger
    than *max_gap* raise :class:`SettingsError` naming the file, the row and the column.  Only a
    regular file of at most :data:`MAX_CSV_BYTES` is read (not a device, a pipe or a folder), and
    a cell longer than the CSV reader's field limit is refused naming its row.
    """
    path = Path(path)
    w = f"file '{path}'"
    cant = f"expected a readable CSV file of at most {MAX_CSV_BYTES // 2**20} MB"
    try:
        st = path.stat()
    except FileNotFoundError:
        raise SettingsError(f"expected a readable CSV file; found that '{path}' "
                            f"cannot be read: there is no file there ({path.resolve()}; a "
                            f"relative path is taken from the scenario's folder).",
                            owner=what, key="path") from None
    except OSError as exc:
        raise SettingsError(f"{cant}; found that '{path}' cannot be read "
                            f"({exc.strerror or exc}).", owner=what, key="path") from None
    if stat.S_ISDIR(st.st_mode):
        raise SettingsError(f"expected a readable CSV file; found that '{path}' "
                            f"cannot be read: it is a directory.", owner=what, key="path")
    if not stat.S_ISREG(st.st_mode):
        raise SettingsError(f"{cant}; found that '{path}' is not a regular file (a device, a pipe "
                            f"or a socket).", owner=what, key="path")
    if st.st_size > MAX_CSV_BYTES:
        raise SettingsError(f"{cant}; found {st.st_size / 2**20:.1f} MB in '{path}'.",
                            owner=what, key="path")
    line = [0]

    def rows():
        # streamed: only the two chosen columns are kept, as floats
        with path.open(newline="") as fh:
            reader = csv.reader(fh)
            for r in reader:
                line[0] = reader.line_num
                if r and not r[0].lstrip().startswith("#"):
                    yield r

    def col(c: int | str, key: str) -> int:
        if isinstance(c, int) and not isinstance(c, bool):
            if 0 <= c < len(header):
                return c
            hint = (" (is the file separated by something other than commas? mpcproto reads "
                    "comma-separated values)" if len(header) == 1 else "")
            raise SettingsError(f"{w}: {key} {c} is out of range; the file has {len(header)} "
                                f"column(s){hint}.", owner=what, key="path")
        if c in header:
            return header.index(c)
        raise SettingsError(
            f"{w}: no column named {c!r} for {key}{suggest(str(c), header)}; "
            f"columns: {_cut(', '.join(header))}.", owner=what, key="path")

    times, values = array("d"), array("d")
    n = 0
    try:
        it = rows()
        first = next(it, None)
        if first is None:
            raise SettingsError(f"{w} needs a header row and at least one data row; found 0 rows.",
                                owner=what, key="path")
        header = [h.strip() for h in first]
        ti, vi = col(time_column, "time_column"), col(value_column, "value_column")
        n = 1
        for n, r in enumerate(it, start=2):
            for idx, dest in ((ti, times), (vi, values)):
                cell = r[idx].strip() if idx < len(r) else ""
                try:
                    f = float(cell)
                    if not math.isfinite(f):
                        raise ValueError
                except ValueError:
                    raise SettingsError(
                        f"{w}: row {n}, column '{_cut(header[idx])}' must hold a finite number; "
                        f"found {shown(cell)} (a gap in the table?).",
                        owner=what, key="path") from None
                dest.append(f)
    except csv.Error as exc:
        raise SettingsError(f"{w}: line {line[0] + 1} cannot be read as CSV ({exc}): a cell "
                            f"longer than {csv.field_size_limit():,} characters or a stray "
                            f"quote?", owner=what, key="path") from None
    except (OSError, UnicodeDecodeError) as exc:
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise SettingsError(f"expected a readable CSV text file; found that "
                            f"'{path}' cannot be read ({why}).", owner=what, key="path") from None
    if n < 2:
        raise SettingsError(f"{w} needs a header row and at least one data row; found {n} rows.",
                            owner=what, key="path")
    _check_times(times, what=what, where=f"{w}, column '{header[ti]}'", max_gap=max_gap, key="path",
                 row_of=lambda i: f"row {i + 2}")
    return times.tolist(), values.tolist()
