"""A controller that does not look at the plant: MVs follow given signals (step tests, replay)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..control.base import ControlOutput, Measurement, Targets
from ..validation import fail
from ..model import suggest
from ..operating import OperatingPoint
from .signals import signal_from_spec

__all__ = ["OpenLoop"]


class OpenLoop:
    """MVs held at the operating point plus optional signals; implements the controller protocol.

    Parameters
    ----------
    mv_names : sequence of str
        The model's MV names (declaration order).
    moves : mapping MV name -> signal spec, optional
        Signals relative to the operating-point MV (unless the spec gives a ``base``).
    """

    name = "open_loop"

    def __init__(self, mv_names, moves: Mapping[str, Any] | None = None, *, rng: Any = None):
        self.mv_names = tuple(mv_names)
        self.moves = {}
        for k, spec in (moves or {}).items():
            if k not in self.mv_names:
                raise fail("OpenLoop", f"moves.{k}", f"an MV name (one of {', '.join(self.mv_names)})",
                           f"'{k}', which is not an MV{suggest(str(k), self.mv_names)}")
            self.moves[k] = signal_from_spec(spec, what=f"moves.{k}", rng=rng)
        self._u0 = np.zeros(len(self.mv_names))

    def reset(self, op: OperatingPoint, t0: float = 0.0) -> None:
        self._u0 = np.asarray(op.u, float).copy()

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None) -> ControlOutput:
        u = self._u0.copy()
        for j, n in enumerate(self.mv_names):
            if n in self.moves:
                s = self.moves[n]
                u[j] = s.value(t) + s.resolve(self._u0[j])
        return ControlOutput(u=u)
