"""The one controller protocol the simulator knows.

Every controller (the MPC, a set of PID loops, anything a user writes) implements
:class:`Controller`: ``reset`` at an operating point, then one ``step`` call per sample that takes
the measurements, the measured DVs and the targets and returns the MVs plus diagnostics.

Conventions
-----------
* Vectors are in the model's declaration order: CVs for measurements/targets, MVs for outputs, DVs
  for ``dv`` (entries of *unmeasured* DVs are NaN and must not be used).
* Times are in the model's time unit.
* A measurement carries the time it was *taken* (``taken_at``), which for a slow analyzer with a dead
  time is earlier than the time it arrives; ``fresh`` marks values that arrived at this sample.
  A NaN value is a bad or missing reading.
* MV readback (common practice, no source): ``step`` may take the keyword ``u_applied``, the MV
  values the actuators actually applied over the previous sample (valve position feedback; NaN
  where unknown).  A stuck, saturated or rate-limited valve then shows up at once: a PID loop uses
  it for its anti-windup tracking, the MPC as the previous MV of its move penalties and rate
  limits and as the input its estimator predicts with.  The keyword is optional on both sides:
  the simulator passes it only to controllers whose ``step`` accepts it
  (:func:`accepts_readback`), and a controller must work when it is None (no feedback).
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass, field
from typing import Any, Protocol, runtime_checkable

import numpy as np

from ..operating import OperatingPoint

__all__ = ["Measurement", "Targets", "ControlOutput", "Controller", "accepts_readback",
           "STATUS_OK", "STATUS_INACCURATE", "STATUS_FALLBACK", "STATUS_HOLD", "STATUS_FAILED",
           "STATUS_MEASUREMENT_REJECTED", "STATUS_MV_NOT_FOLLOWING",
           "ACCEPTED", "DEGRADED", "FALLBACK", "FATAL"]

# Status strings, grouped like a solver's: accepted, degraded, fallback, fatal.
STATUS_OK = "ok"
# the step's answer was accepted but the controller saw a fault at that sample: a reading it had
# to reject (NaN, dropped signal) or an MV that did not follow its command (readback)
STATUS_MEASUREMENT_REJECTED = "measurement_rejected"
STATUS_MV_NOT_FOLLOWING = "mv_not_following"
STATUS_INACCURATE = "inaccurate"   # solver answered but not to tolerance: treated as a fallback
STATUS_FALLBACK = "fallback_shifted_plan"
STATUS_HOLD = "fallback_hold"
STATUS_FAILED = "failed"
ACCEPTED = frozenset({STATUS_OK})
DEGRADED = frozenset({STATUS_MEASUREMENT_REJECTED, STATUS_MV_NOT_FOLLOWING})
FALLBACK = frozenset({STATUS_INACCURATE, STATUS_FALLBACK, STATUS_HOLD})
FATAL = frozenset({STATUS_FAILED})


@dataclass
class Measurement:
    """What the controller sees of the CVs at one sample."""

    y: np.ndarray                 # latest value per CV (NaN = bad/missing)
    taken_at: np.ndarray          # time each value was sampled at the process
    fresh: np.ndarray             # bool per CV: arrived at this sample

    @classmethod
    def now(cls, y: np.ndarray, t: float) -> "Measurement":
        """Every CV measured at time *t* and fresh (an ideal instrument)."""
        y = np.asarray(y, float).reshape(-1)
        return cls(y=y, taken_at=np.full(y.shape, float(t)), fresh=np.ones(y.shape, bool))


@dataclass
class Targets:
    """Setpoints and limits at one sample (NaN setpoint = none; +-inf limit = none)."""

    setpoint: np.ndarray          # per CV
    cv_low: np.ndarray            # per CV (zone low / soft limit)
    cv_high: np.ndarray           # per CV
    mv_low: np.ndarray            # per MV (operating limits, within the physical ones)
    mv_high: np.ndarray           # per MV
    mv_rate: np.ndarray | None = None  # per MV largest move per sample (inf = none)


@dataclass
class ControlOutput:
    """One controller step's answer."""

    u: np.ndarray                 # MVs to apply (absolute values)
    status: str = STATUS_OK
    diagnostics: dict[str, Any] = field(default_factory=dict)  # solve_ms, slack, active limits...


@runtime_checkable
class Controller(Protocol):
    """What the simulator needs of a controller."""

    name: str

    def reset(self, op: OperatingPoint, t0: float = 0.0) -> None:
        """Start (bumplessly) at operating point *op* at time *t0*."""

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None) -> ControlOutput:
        """One sample: return the MVs to hold until the next sample.

        ``u_applied`` (optional, keyword only): the MVs actually applied over the previous sample
        (absolute, MV order, NaN where unknown); None when there is no readback.
        """


def accepts_readback(controller: Any) -> bool:
    """Does ``controller.step`` take the ``u_applied`` keyword (or any keyword, ``**kwargs``)?

    Controllers written before the readback keyword existed keep working: the simulator asks
    this once and leaves the keyword out for them.
    """
    step = getattr(controller, "step", None)
    if step is None:
        return False
    try:
        params = inspect.signature(step).parameters.values()
    except (TypeError, ValueError):
        return False
    return any(p.name == "u_applied" and p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)
               or p.kind == p.VAR_KEYWORD for p in params)
