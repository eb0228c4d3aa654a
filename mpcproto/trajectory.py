"""The record of one closed-loop run: named time series plus metadata.

A :class:`Trajectory` is plain data.  It imports nothing from the simulator, so analysis, plotting
and report code read it without pulling in CasADi.

Column naming
-------------
Every numeric series is a column called ``"<kind>.<variable>"``:

==============  ===========================================================================
``x.NAME``      plant state (true value at the start of the sample)
``u.NAME``      MV actually applied over the sample (after actuator limits, rate limits, faults)
``ucmd.NAME``   MV the controller asked for
``d.NAME``      DV value acting on the plant over the sample (measured and unmeasured)
``y.NAME``      true CV value (what the plant really did)
``ym.NAME``     CV as the controller saw it (instrument: noise, bias, lag, dead time, analyzer,
                faults); NaN for a bad reading
``taken.NAME``  time the reading in ``ym.NAME`` was sampled at the process (analyzers, dead times)
``sp.NAME``     CV setpoint (NaN = none)
``lo.NAME``     CV low limit (zone low; -inf = none)
``hi.NAME``     CV high limit
``mvlo.NAME``   MV low operating limit given to the controller
``mvhi.NAME``   MV high operating limit given to the controller
``fault.NAME``  1 while a fault acts on variable NAME, else 0 (only for variables with faults)
``diag.KEY``    numeric controller diagnostic per step (``diag.step_ms`` is the wall time of the
                whole ``step`` call, measured by the simulator; ``diag.solve_ms`` the QP alone,
                where the controller reports it; per-variable ones as ``diag.KEY.NAME``)
==============  ===========================================================================

Text series (one string per step) live in :attr:`Trajectory.text`; ``status`` holds the
controller's status string at each step.

The time column ``t`` is the start of each sample, in the model's time unit.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .validation import fail

__all__ = ["Trajectory", "KINDS", "RUN_OK", "RUN_FAILED", "RUN_LEFT_RANGE", "valid_range_events"]

KINDS = ("x", "u", "ucmd", "d", "y", "ym", "taken", "sp", "lo", "hi", "mvlo", "mvhi", "fault", "diag")

RUN_OK = "completed"
RUN_FAILED = "failed"
#: run outcome (``meta["outcome"]``) of a completed run whose true plant left its model's
#: physical bounds: the numbers after that point describe no real unit
RUN_LEFT_RANGE = "left_valid_range"

_META_PREFIX = "# mpcproto-trajectory "


@dataclass
class Trajectory:
    """Named time series of one run.

    Attributes
    ----------
    t : ndarray, shape (N,)
        Start time of each sample.
    columns : dict of str to ndarray
        Numeric series, each of shape (N,), named ``"<kind>.<variable>"`` (see module docstring).
    text : dict of str to list of str
        Text series, each of length N (``"status"``: controller status per step).
    meta : dict
        JSON-able metadata: ``model``, ``controller``, ``Ts``, ``time_unit``, ``seed``, names by
        role (``states``, ``mvs``, ``dvs``, ``cvs``), ``units``, ``status``, ``message``,
        ``failed_at`` and whatever the producer adds.
    """

    t: np.ndarray
    columns: dict[str, np.ndarray] = field(default_factory=dict)
    text: dict[str, list[str]] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.t = np.asarray(self.t, float).reshape(-1)
        n = self.t.shape[0]
        for k, v in list(self.columns.items()):
            arr = np.asarray(v, float).reshape(-1)
            if arr.shape != (n,):
                raise fail("Trajectory", f"columns.{k}", f"{n} values (one per time)",
                           f"{arr.shape[0]}")
            self.columns[k] = arr
        for k, v in list(self.text.items()):
            lst = [str(s) for s in v]
            if len(lst) != n:
                raise fail("Trajectory", f"text.{k}", f"{n} entries (one per time)", f"{len(lst)}")
            self.text[k] = lst

    # ------------------------------------------------------------------ access
    def __len__(self) -> int:
        return int(self.t.shape[0])

    @property
    def status(self) -> str:
        """``"completed"`` or ``"failed"`` (a run that ended early keeps what it recorded)."""
        return str(self.meta.get("status", RUN_OK))

    @property
    def outcome(self) -> str:
        """``status``, or ``"left_valid_range"`` for a completed run whose true plant left its
        model's physical bounds (``meta["range_events"]``, :func:`valid_range_events`)."""
        return str(self.meta.get("outcome", self.status))

    @property
    def success(self) -> bool:
        return self.status == RUN_OK

    @property
    def message(self) -> str:
        return str(self.meta.get("message", ""))

    @property
    def Ts(self) -> float:
        if "Ts" in self.meta:
            return float(self.meta["Ts"])
        if len(self) > 1:
            return float(self.t[1] - self.t[0])
        raise fail("Trajectory", "meta.Ts", "a sample time in meta['Ts'] or at least two samples",
                   f"neither ({len(self)} sample(s))")

    def names(self, kind: str) -> list[str]:
        """Variable names that have a column of *kind* (``"y"``, ``"u"``, ...), in column order."""
        pre = kind + "."
        return [k[len(pre):] for k in self.columns if k.startswith(pre)]

    def has(self, kind: str, name: str) -> bool:
        return f"{kind}.{name}" in self.columns

    def series(self, kind: str, name: str) -> np.ndarray:
        """The column ``"<kind>.<name>"``; a clear error names the known ones otherwise."""
        key = f"{kind}.{name}"
        try:
            return self.columns[key]
        except KeyError:
            known = self.names(kind)
            raise fail("Trajectory", key, f"one of the {kind!r} series: {', '.join(known) or '(none)'}",
                       f"no series '{key}'") from None

    def __getitem__(self, key: str) -> np.ndarray:
        if key == "t":
            return self.t
        if key in self.columns:
            return self.columns[key]
        raise KeyError(f"Trajectory has no column {key!r}")

    def window(self, start: float | None = None, end: float | None = None) -> "Trajectory":
        """The samples with ``start <= t < end`` (a copy)."""
        m = np.ones(len(self), bool)
        if start is not None:
            m &= self.t >= start
        if end is not None:
            m &= self.t < end
        idx = np.flatnonzero(m)
        return Trajectory(self.t[idx], {k: v[idx] for k, v in self.columns.items()},
                          {k: [v[i] for i in idx] for k, v in self.text.items()}, dict(self.meta))

    # ------------------------------------------------------------------ CSV
    def to_csv(self, path: str | Path) -> Path:
        """Write one row per sample; the first line is a comment carrying the metadata as JSON.

        Floats are written with ``repr`` precision so :meth:`from_csv` gives back the same numbers.
        """
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        num_keys = list(self.columns)
        txt_keys = list(self.text)
        with path.open("w", newline="") as fh:
            meta = dict(_jsonable(self.meta), _text_columns=txt_keys)
            fh.write(_META_PREFIX + json.dumps(meta, sort_keys=True) + "\n")
            w = csv.writer(fh)
            w.writerow(["t", *num_keys, *txt_keys])
            cols = [self.t] + [self.columns[k] for k in num_keys]
            for i in range(len(self)):
                w.writerow([_fmt(c[i]) for c in cols] + [self.text[k][i] for k in txt_keys])
        return path

    @classmethod
    def from_csv(cls, path: str | Path) -> "Trajectory":
        """Read a file written by :meth:`to_csv`."""
        path = Path(path)
        try:
            fh = path.open(newline="")
        except OSError as exc:
            raise fail("Trajectory.from_csv", "path", "a readable file",
                       f"'{path}', which cannot be opened: {exc}") from None
        with fh:
            first = fh.readline()
            if not first.startswith(_META_PREFIX):
                raise fail("Trajectory.from_csv", "path",
                           f"a file starting with the line '{_META_PREFIX.strip()} {{...}}'",
                           f"'{path}', which was not written by Trajectory.to_csv")
            meta = json.loads(first[len(_META_PREFIX):])
            rows = list(csv.reader(fh))
        if not rows or rows[0][:1] != ["t"]:
            raise fail("Trajectory.from_csv", "path", "a header row starting with 't'",
                       f"'{path}' without one")
        header, body = rows[0], rows[1:]
        t = np.array([float(r[0]) for r in body])
        columns: dict[str, np.ndarray] = {}
        text: dict[str, list[str]] = {}
        text_keys = set(meta.get("_text_columns", []))
        for j, key in enumerate(header[1:], start=1):
            vals = [r[j] for r in body]
            if key in text_keys:
                text[key] = vals
            else:
                columns[key] = np.array([float(v) for v in vals])
        meta.pop("_text_columns", None)
        return cls(t, columns, text, meta)

    def __repr__(self) -> str:
        return (f"Trajectory({len(self)} samples, {len(self.columns)} series, "
                f"status={self.status!r})")


def valid_range_events(traj: Trajectory, *, rel_tol: float = 1e-6) -> list[dict[str, Any]]:
    """Where the TRUE plant left its model's physical bounds (``meta["state_bounds"]`` for the
    ``x.*`` columns, ``meta["cv_bounds"]`` for ``y.*``): one event per variable and side,
    ``{"variable", "kind", "side", "time", "value", "bound", "samples"}`` with the first
    sample beyond the bound (``time``), the farthest value reached (``value``) and the number of
    samples beyond.  A value counts as beyond when it passes the bound by more than *rel_tol*
    of the variable's range (of ``max(1, |bound|)`` for an unbounded range), so integrator
    round-off at a bound is no event.  Sorted by time."""
    out: list[dict[str, Any]] = []
    for kind, key in (("x", "state_bounds"), ("y", "cv_bounds")):
        for name, b in (traj.meta.get(key) or {}).items():
            if not traj.has(kind, name):
                continue
            lo, hi = float(b[0]), float(b[1])
            v = traj.series(kind, name)
            span = hi - lo if math.isfinite(hi - lo) and hi > lo else None
            for side, bound in (("low", lo), ("high", hi)):
                if not math.isfinite(bound):
                    continue
                tol = rel_tol * (span if span is not None else max(1.0, abs(bound)))
                with np.errstate(invalid="ignore"):
                    bad = (v < bound - tol) if side == "low" else (v > bound + tol)
                if not bad.any():
                    continue
                idx = np.flatnonzero(bad)
                worst = float(v[idx].min() if side == "low" else v[idx].max())
                out.append({"variable": name, "kind": "state" if kind == "x" else "cv",
                            "side": side, "time": float(traj.t[idx[0]]), "value": worst,
                            "bound": bound, "samples": int(idx.size)})
    out.sort(key=lambda e: (e["time"], e["variable"]))
    return out


def _fmt(v: float) -> str:
    return repr(float(v))


def _jsonable(meta: Mapping[str, Any]) -> dict[str, Any]:
    def conv(v: Any) -> Any:
        if isinstance(v, Mapping):
            return {str(k): conv(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [conv(x) for x in v]
        if isinstance(v, np.ndarray):
            return [conv(x) for x in v.tolist()]
        if isinstance(v, (np.floating, float)):
            f = float(v)
            return f if math.isfinite(f) else str(f)
        if isinstance(v, np.integer):
            return int(v)
        if isinstance(v, np.bool_):
            return bool(v)
        return v
    return conv(meta)
