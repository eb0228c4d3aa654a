"""Instruments (per CV), actuators (per MV) and faults, as plain settings objects.

These classes only store and validate settings; :class:`mpcproto.sim.ClosedLoop` turns them into
per-run state (filters, buffers, noise sequences) when a run starts.

Instrument spec keys (:func:`instrument_from_spec`), all optional
------------------------------------------------------------------
``noise_std``  standard deviation of white measurement noise (CV unit, >= 0; default 0)
``bias``       constant offset added to the reading (CV unit; default 0)
``lag``        first-order sensor time constant (time unit, >= 0; default 0 = none)
``dead_time``  transport/analysis delay (time unit, >= 0; rounded to whole samples like the
               plant's dead times)
``period``     analyzer cycle: a sample is taken every ``period`` (rounded to whole samples, >= 1)
               and its result arrives ``dead_time`` later and is held until the next one.
               Default: a sample every controller sample (a continuous transmitter).

The reading pipeline, per sample: true CV -> lag -> + bias + noise -> sensor faults -> dead time
-> analyzer sample-and-hold.

Actuator spec keys (:func:`actuator_from_spec`), all optional
--------------------------------------------------------------
``low``, ``high``  travel limits of the final element (MV unit; default: the model's physical
                   bounds; the physical bounds always apply as well)
``rate``           largest change per time unit (>= 0; default none)

Fault spec keys (:func:`fault_from_spec`)
-----------------------------------------
Every fault has ``kind``, ``variable`` (a CV for sensor faults, an MV for valve faults), ``at``
and optionally ``until`` (default: to the end of the run).

==================  ===========================================================
kind                extra keys
==================  ===========================================================
sensor_frozen       none: the reading stays at its value just before ``at``
sensor_drift        ``rate`` (CV unit per time unit): a growing offset
sensor_nan          none: the reading is NaN (a dropped signal)
sensor_bias         ``size``: a sudden offset
valve_stuck         *position* (default: where the valve was at ``at``)
valve_saturation    ``low`` and/or ``high``: the element cannot go beyond them
==================  ===========================================================
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from .._specs import check_keys, choice, number, shown
from ..validation import Interval, Options, check, fail

__all__ = ["Instrument", "Actuator", "Fault", "instrument_from_spec", "actuator_from_spec",
           "fault_from_spec", "FAULT_KINDS", "SENSOR_FAULTS", "VALVE_FAULTS"]

SENSOR_FAULTS = ("sensor_frozen", "sensor_drift", "sensor_nan", "sensor_bias")
VALVE_FAULTS = ("valve_stuck", "valve_saturation")
FAULT_KINDS = SENSOR_FAULTS + VALVE_FAULTS


@dataclass(frozen=True)
class Instrument:
    """How one CV is measured (see module docstring)."""

    noise_std: float = 0.0
    bias: float = 0.0
    lag: float = 0.0
    dead_time: float = 0.0
    period: float | None = None

    def __post_init__(self) -> None:
        for k in ("noise_std", "lag", "dead_time"):
            check(getattr(self, k), Interval(float, 0, None), owner="Instrument", key=k)
        check(self.bias, Interval(float), owner="Instrument", key="bias")
        if self.period is not None:
            check(self.period, Interval(float, 0, None, closed="neither"), owner="Instrument",
                  key="period")


@dataclass(frozen=True)
class Actuator:
    """Travel and rate limits of one MV's final element."""

    low: float = -math.inf
    high: float = math.inf
    rate: float = math.inf

    def __post_init__(self) -> None:
        if math.isnan(self.low) or math.isnan(self.high) or not self.low <= self.high:
            raise fail("Actuator", "low", f"a low travel limit <= high ({self.high!r})",
                       repr(self.low))
        check(self.rate, Interval(float, 0, None, allow_inf=True), owner="Actuator", key="rate")


@dataclass(frozen=True)
class Fault:
    """A fault on one variable from ``at`` until ``until`` (None = end of run)."""

    kind: str
    variable: str
    at: float
    until: float | None = None
    rate: float = 0.0          # sensor_drift
    size: float = 0.0          # sensor_bias
    position: float | None = None   # valve_stuck
    low: float = -math.inf     # valve_saturation
    high: float = math.inf     # valve_saturation

    def __post_init__(self) -> None:
        check(self.kind, Options(tuple(FAULT_KINDS), noun="a fault kind"), owner="Fault",
              key="kind")
        if self.until is not None and not self.until > self.at:
            raise fail(f"Fault {self.kind} on '{self.variable}'", "until",
                       f"a time after 'at' ({self.at:g})", f"{self.until:g}")

    @property
    def on_sensor(self) -> bool:
        return self.kind in SENSOR_FAULTS

    def active(self, t: float) -> bool:
        return t >= self.at and (self.until is None or t < self.until)

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"kind": self.kind, "variable": self.variable, "at": self.at}
        if self.until is not None:
            out["until"] = self.until
        extra = {"sensor_drift": ("rate",), "sensor_bias": ("size",), "valve_stuck": ("position",),
                 "valve_saturation": ("low", "high")}.get(self.kind, ())
        for k in extra:
            v = getattr(self, k)
            if v is not None and not (isinstance(v, float) and math.isinf(v)):
                out[k] = v
        return out


def instrument_from_spec(spec: Mapping[str, Any] | Instrument, *, what: str) -> Instrument:
    """An :class:`Instrument` from a plain dict (keys in the module docstring)."""
    if isinstance(spec, Instrument):
        return spec
    if not isinstance(spec, Mapping):
        raise fail(what, None, "an instrument table", shown(spec))
    keys = ("noise_std", "bias", "lag", "dead_time", "period")
    check_keys(spec, keys, (), what=what, kind="instrument")
    return Instrument(
        noise_std=number(spec, "noise_std", what=what, low=0.0, default=0.0),
        bias=number(spec, "bias", what=what, default=0.0),
        lag=number(spec, "lag", what=what, low=0.0, default=0.0),
        dead_time=number(spec, "dead_time", what=what, low=0.0, default=0.0),
        period=number(spec, "period", what=what, low=0.0, strict_low=True, default=None))


def actuator_from_spec(spec: Mapping[str, Any] | Actuator, *, what: str) -> Actuator:
    """An :class:`Actuator` from a plain dict (keys ``low``, ``high``, ``rate``)."""
    if isinstance(spec, Actuator):
        return spec
    if not isinstance(spec, Mapping):
        raise fail(what, None, "an actuator table", shown(spec))
    check_keys(spec, ("low", "high", "rate"), (), what=what, kind="actuator")
    low = number(spec, "low", what=what, default=-math.inf, allow_inf=True)
    high = number(spec, "high", what=what, default=math.inf, allow_inf=True)
    if not low <= high:
        raise fail(what, "low", f"a value <= 'high' ({high:g})", f"{low:g}")
    return Actuator(low=low, high=high,
                    rate=number(spec, "rate", what=what, low=0.0, default=math.inf, allow_inf=True))


_FAULT_EXTRA = {
    "sensor_frozen": ((), ()),
    "sensor_drift": (("rate",), ()),
    "sensor_nan": ((), ()),
    "sensor_bias": (("size",), ()),
    "valve_stuck": ((), ("position",)),
    "valve_saturation": ((), ("low", "high")),
}


def fault_from_spec(spec: Mapping[str, Any] | Fault, *, what: str) -> Fault:
    """A :class:`Fault` from a plain dict (keys in the module docstring).

    The variable name is checked against the model when the run is set up (the closed loop knows
    the model; this function does not).
    """
    if isinstance(spec, Fault):
        return spec
    if not isinstance(spec, Mapping):
        raise fail(what, None, "a fault table with a 'kind'", shown(spec))
    kind = choice(spec.get("kind"), FAULT_KINDS, what=what, key="kind", noun="fault kind")
    req, opt = _FAULT_EXTRA[kind]
    body = {k: v for k, v in spec.items() if k != "kind"}
    check_keys(body, ("variable", "at", "until") + req + opt, ("variable", "at") + req,
               what=what, kind=kind)
    var = body["variable"]
    if not isinstance(var, str) or not var:
        raise fail(what, "variable", "a variable name (a string)", shown(var))
    w = f"{what} ({kind} on '{var}')"
    at = number(body, "at", what=w)
    until = number(body, "until", what=w, default=None)
    if until is not None and until <= at:
        raise fail(w, "until", f"a time after 'at' ({at:g})", f"{until:g}")
    kw: dict[str, Any] = {}
    if kind == "sensor_drift":
        kw["rate"] = number(body, "rate", what=w)
    if kind == "sensor_bias":
        kw["size"] = number(body, "size", what=w)
    if kind == "valve_stuck":
        kw["position"] = number(body, "position", what=w, default=None)
    if kind == "valve_saturation":
        if "low" not in body and "high" not in body:
            raise fail(w, None, "'low' and/or 'high' (the reduced travel)", "neither")
        kw["low"] = number(body, "low", what=w, default=-math.inf)
        kw["high"] = number(body, "high", what=w, default=math.inf)
        if not kw["low"] <= kw["high"]:
            raise fail(w, "low", f"a value <= 'high' ({kw['high']:g})", f"{kw['low']:g}")
    return Fault(kind=kind, variable=var, at=at, until=until, **kw)
