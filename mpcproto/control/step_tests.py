"""Step tests of closed loops, stepped by the layer-2 plant stepper (:class:`mpcproto.stepper.Plant`).

The regulatory layer tunes a cascade's outer loop on a step test of the *closed* inner loop, and an
MPC over flow loops is identified from step tests of the closed flow loops
(:func:`~mpcproto.control.over_loops.identify_over_loops`).  Such a test is a closed loop with
ideal instruments and actuators: the true CVs are measured at the start of each sample, the
controller's command (a NaN holds the MV) is clipped to the MVs' physical bounds and held over the
sample, and one input steps once.  That is what :func:`mpcproto.simulate` does with no instruments,
actuators, faults or noise; it is written here on the stepper so that the control layer does not
import the simulator above it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..exceptions import MpcprotoError, SimulationError
from ..stepper import Plant
from ..validation import fail
from .base import ControlOutput, Measurement, Targets
from .pid import PIDController, PIDLoop

__all__ = ["StepRun", "closed_loop_step", "closed_inner_step_test"]


@dataclass
class StepRun:
    """The CVs of a closed-loop step test: ``y[k]`` at ``t[k]`` (the rows run so far when the test
    failed: ``success`` False and ``message`` says why)."""

    t: np.ndarray
    y: np.ndarray
    cv_names: list[str]
    success: bool = True
    message: str = ""

    def series(self, cv: str) -> np.ndarray:
        return self.y[:, self.cv_names.index(cv)]


def closed_loop_step(model: Any, controller: Any, op: Any, *, Ts: float, duration: float,
                     setpoints: Mapping[str, tuple[float, float]] | None = None,
                     dvs: Mapping[str, tuple[float, float]] | None = None) -> StepRun:
    """Run *controller* on the plant *model* from the operating point *op* for *duration*.

    ``setpoints`` / ``dvs``: per CV / DV an ``(at, size)`` step from its operating value (the
    others stay there).  The controller gets the measured DVs (NaN for unmeasured ones), the
    setpoints, the CVs' and MVs' physical bounds as its limits, no rate limits and no readback.
    """
    plant = Plant(model, Ts)
    Ts = plant.Ts
    n = max(1, int(round(duration / Ts)))
    times = Ts * np.arange(n)
    SP = np.tile(np.asarray(op.y, float), (n, 1))
    D = np.tile(np.asarray(op.d, float), (n, 1))
    for steps, names, arr, ref in ((setpoints, model.cv_names, SP, op.y),
                                   (dvs, model.dv_names, D, op.d)):
        for name, (at, size) in (steps or {}).items():
            j = list(names).index(name)
            arr[:, j] = np.where(times >= float(at), float(size), 0.0) + ref[j]
    cv_lo, cv_hi = model.bounds("cv")
    mv_lo, mv_hi = model.bounds("mv")
    measured = np.array([v.measured for v in model.variables("dv")], bool)
    rate = np.full(model.nu, np.inf)
    plant.reset(op.x, op.u, op.d)
    controller.reset(op, 0.0)
    u_prev = np.asarray(op.u, float).copy()
    Y = np.full((n, model.ny), np.nan)
    run = StepRun(times, Y, list(model.cv_names))
    for k in range(n):
        t = float(times[k])
        d = D[k]
        y = plant.y_next if plant.y_next is not None else plant.output(u_prev, d)
        targets = Targets(setpoint=SP[k], cv_low=cv_lo, cv_high=cv_hi, mv_low=mv_lo,
                          mv_high=mv_hi, mv_rate=rate)
        try:
            out = controller.step(t, Measurement.now(y, t), np.where(measured, d, np.nan),
                                  targets, None)
        except MpcprotoError as exc:
            return _failed(run, k, f"controller '{getattr(controller, 'name', '?')}' raised "
                                   f"{type(exc).__name__} at t={t:g}: {exc}")
        if not isinstance(out, ControlOutput):
            raise fail(f"controller '{getattr(controller, 'name', '?')}'", "step()",
                       "a ControlOutput returned", type(out).__name__)
        ucmd = np.asarray(out.u, float).reshape(-1)
        cmd = np.where(np.isfinite(ucmd), ucmd, u_prev)
        u = np.minimum(np.maximum(cmd, mv_lo), np.maximum(mv_lo, mv_hi))
        Y[k] = y
        u_prev = u
        try:
            plant.advance(u, d, D[k + 1] if k + 1 < n else d)
        except SimulationError as exc:
            return _failed(run, k + 1, str(exc))
    return run


def _failed(run: StepRun, rows: int, message: str) -> StepRun:
    return StepRun(run.t[:rows], run.y[:rows], run.cv_names, success=False, message=message)


def closed_inner_step_test(model: Any, op: Any, inner: PIDLoop, cv: str, *, Ts: float,
                           size: float, duration: float) -> Any:
    """Step the setpoint of the closed inner loop *inner* (simulated on the nonlinear model, other
    MVs held) and return the :class:`~mpcproto.control.tuning.StepData` of the outer CV *cv* --
    the step test the outer loop of a cascade is tuned on."""
    from .tuning import StepData

    ctl = PIDController.for_model(model, [inner], name="inner")
    tr = closed_loop_step(model, ctl, op, Ts=Ts, duration=duration, setpoints={inner.cv: (Ts, size)})
    if not tr.success:
        # the closed-loop run's own words say why the step test failed: shown as found
        raise fail("closed_inner_step_test", "inner",
                   f"a step test of the closed inner loop on '{inner.cv}' that runs",
                   f"a failed run: {tr.message}", note=f"cascade on '{cv}'")
    i = model.cv_names.index(cv)
    return StepData(t=tr.t, y={cv: tr.series(cv)}, mv=inner.cv, size=size, at=Ts,
                    y0={cv: float(op.y[i])})
