"""A supervisory controller over PID loops: the MPC writes setpoints to the loops below it.

On a real unit the predictive controller rarely drives valves: it writes setpoints to flow (or
temperature) loops, which reject the fast upsets at the valve (a supply-pressure change, a sticky
valve's offset) before they reach the process.  :class:`OverLoops` simulates that arrangement
through the ordinary controller protocol, so the simulator needs no change:

* the *inner loops* (:class:`~mpcproto.control.pid.PIDLoop`, each on a secondary CV such as a
  flow meter, moving a plant MV such as a valve) run as a
  :class:`~mpcproto.control.pid.PIDController` on the plant's measurements, with the setpoints
  of their CVs taken from the outer controller;
* the *outer* controller (any controller with a ``dmodel``, normally a
  :class:`~mpcproto.control.mpc.PredictiveController`) sees the CVs of its own model; its MVs
  are named after the inner loops' CVs (a flow setpoint is named like the flow) or after plant
  MVs without an inner loop (passed straight through the one hard-limit projection);
* the outer controller's MV readback for a setpoint is the setpoint it wrote while the loop can
  follow, and the loop's *measured* CV (the flow as the meter reads it) while the loop's valve
  sits at a hard limit and cannot (common practice, no source: a setpoint anchored to the measured
  flow at all times would follow every upset the loop is there to reject); for MVs passed through
  it is the plant MV applied.

:func:`identify_over_loops` builds the outer controller's model the way it is done in practice:
step tests of the *closed* inner loops (each loop setpoint, each passed-through MV and each
measured DV stepped in turn on the nonlinear plant model, the inner loops running), each response
fitted (FOPDT, SOPDT or integrating: :func:`mpcproto.control.tuning.fit_step`) and assembled into
a transfer-matrix model (:func:`mpcproto.models.transfer_matrix.transfer_matrix_model`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..exceptions import SettingsError
from ..operating import OperatingPoint
from ..validation import did_you_mean, fail
from .base import FATAL, FALLBACK, ControlOutput, Measurement, Targets, accepts_readback
from .describe import describe_controller
from .limits import project_value
from .pid import PIDController, PIDLoop

__all__ = ["OverLoops", "identify_over_loops"]


class OverLoops:
    """An outer controller over inner PID loops (module docstring); the controller protocol.

    Parameters
    ----------
    outer : controller with ``dmodel``
        Its CVs: plant CVs; its MVs: inner-loop CV names (setpoints) or plant MVs without a loop;
        its DVs: plant DVs.
    plant_model : Model
        The plant's variables (names and order of the vectors the simulator passes).
    loops : sequence of PIDLoop
        The inner loops on the plant (CV = secondary measurement, MV = plant MV).
    """

    def __init__(self, outer: Any, plant_model: Any, loops: Sequence[PIDLoop], *,
                 name: str = "mpc_over_loops"):
        self.name = str(name)
        self.outer = outer
        self.inner = PIDController.for_model(plant_model, list(loops), name=f"{name}.inner")
        self._plant = plant_model
        self.loops = tuple(self.inner.loops)
        cvs, mvs, dvs = (tuple(plant_model.cv_names), tuple(plant_model.mv_names),
                         tuple(plant_model.dv_names))
        self.cv_names, self.mv_names = cvs, mvs
        dm = getattr(outer, "dmodel", None)
        if dm is None:
            raise fail(f"OverLoops '{name}'", "outer",
                       "a controller with a 'dmodel' (its CV, MV and DV names)",
                       f"{type(outer).__name__} without one")
        inner_cvs = {lp.cv: lp for lp in self.loops}
        for c in dm.cv_names:
            if c not in cvs:
                raise fail(f"OverLoops '{name}'", "outer.cv", f"a plant CV ({', '.join(cvs)})",
                           f"'{c}'", did_you_mean(c, cvs))
        self._oc = [cvs.index(c) for c in dm.cv_names]
        self._od = [dvs.index(d) if d in dvs else -1 for d in dm.dv_names]
        self._omv: list[tuple[str, int]] = []     # ("sp", plant CV index) or ("mv", plant MV index)
        self._valve: dict[int, int] = {cvs.index(lp.cv): mvs.index(lp.mv) for lp in self.loops}
        looped = {lp.mv for lp in self.loops}
        for m in dm.mv_names:
            if m in inner_cvs:
                self._omv.append(("sp", cvs.index(m)))
            elif m in mvs and m not in looped:
                self._omv.append(("mv", mvs.index(m)))
            else:
                raise fail(f"OverLoops '{name}'", "outer.mv",
                           f"the CV of an inner loop ({', '.join(inner_cvs) or 'none'}) or a plant "
                           f"MV without a loop", f"'{m}'")
        self._readback = accepts_readback(outer)
        self._u_last: list[float] = []

    def describe(self) -> dict[str, Any]:
        """What the controller has (see :func:`mpcproto.control.describe.describe_controller`)."""
        d = dict(describe_controller(self.outer, self._plant))
        d["structure"] = [f"predictive controller writing setpoints to "
                          f"{', '.join(lp.cv + ' loop' for lp in self.loops)}"] + [
            f"inner loop {lp.cv}<-{lp.mv}" for lp in self.loops]
        d.setdefault("tuning", {})["loops"] = [lp.as_dict() for lp in self.loops]
        return d

    def reset(self, op: OperatingPoint, t0: float = 0.0) -> None:
        self.inner.reset(op, t0)
        self.outer.reset(None, t0)
        self._u_last = np.asarray(op.u, float).tolist()
        self._sp_last = {i: float(op.y[i]) for i in self._valve}

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None) -> ControlOutput:
        oc = self._oc
        om = Measurement(y=meas.y[oc], taken_at=meas.taken_at[oc], fresh=meas.fresh[oc])
        dvv = np.asarray(dv, float).reshape(-1)
        odv = np.array([dvv[i] if i >= 0 else math.nan for i in self._od])
        lo, hi, rb = [], [], []
        ua = None if u_applied is None else np.asarray(u_applied, float).reshape(-1)
        for kind, i in self._omv:
            if kind == "sp":        # a loop setpoint: within its CV's limits
                lo.append(targets.cv_low[i])
                hi.append(targets.cv_high[i])
                j = self._valve[i]
                a = ua[j] if ua is not None else math.nan
                tol = 1e-6 * max(1.0, abs(a)) if math.isfinite(a) else 0.0
                stuck = math.isfinite(a) and (abs(a - targets.mv_low[j]) <= tol
                                              or abs(a - targets.mv_high[j]) <= tol)
                rb.append(meas.y[i] if stuck and math.isfinite(meas.y[i]) else self._sp_last[i])
            else:
                lo.append(targets.mv_low[i])
                hi.append(targets.mv_high[i])
                rb.append(ua[i] if ua is not None else math.nan)
        ot = Targets(setpoint=targets.setpoint[oc], cv_low=targets.cv_low[oc],
                     cv_high=targets.cv_high[oc], mv_low=np.array(lo), mv_high=np.array(hi),
                     mv_rate=None)
        kw = {"u_applied": np.array(rb)} if self._readback else {}
        out = self.outer.step(t, om, odv, ot, **kw)
        sp = np.asarray(targets.setpoint, float).copy()
        for (kind, i), v in zip(self._omv, np.asarray(out.u, float)):
            if kind == "sp":
                sp[i] = v
                if math.isfinite(v):
                    self._sp_last[i] = float(v)
        it = Targets(setpoint=sp, cv_low=targets.cv_low, cv_high=targets.cv_high,
                     mv_low=targets.mv_low, mv_high=targets.mv_high, mv_rate=targets.mv_rate)
        inn = self.inner.step(t, meas, dv, it, u_applied=u_applied)
        u = inn.u.tolist()
        rate = (targets.mv_rate.tolist() if targets.mv_rate is not None
                else [math.inf] * len(u))
        for (kind, i), v in zip(self._omv, np.asarray(out.u, float)):
            if kind == "mv":        # passed through: the one projection onto the hard limits
                u[i] = project_value(float(v), self._u_last[i], float(targets.mv_low[i]),
                                     float(targets.mv_high[i]), rate[i],
                                     what=f"OverLoops '{self.name}' ({self.mv_names[i]})")
        self._u_last = u
        status = out.status if (out.status in FATAL or out.status in FALLBACK) else inn.status
        diag = {f"outer.{k}": v for k, v in (out.diagnostics or {}).items()
                if isinstance(v, (int, float, np.floating, np.integer))}
        diag.update({f"inner.{k}": v for k, v in inn.diagnostics.items()})
        for (kind, i), v in zip(self._omv, np.asarray(out.u, float)):
            if kind == "sp":
                diag[f"setpoint.{self.cv_names[i]}"] = float(v)
        return ControlOutput(u=np.array(u), status=status, diagnostics=diag)


class _Stepper:
    """Inner loops plus one plant MV held at a step (a step test of a passed-through MV)."""

    def __init__(self, inner: PIDController, j: int, size: float, at: float):
        self.name, self.inner, self.j, self.size, self.at = "step", inner, j, size, at

    def reset(self, op, t0=0.0):
        self.inner.reset(op, t0)
        self._u0 = float(op.u[self.j])

    def step(self, t, meas, dv, targets, dv_forecast=None):
        out = self.inner.step(t, meas, dv, targets)
        out.u[self.j] = self._u0 + (self.size if t >= self.at - 1e-9 else 0.0)
        return out


def identify_over_loops(plant: Any, op: OperatingPoint, Ts: float, loops: Sequence[PIDLoop], *,
                        cvs: Sequence[str], mvs: Sequence[str], sizes: Mapping[str, float],
                        duration: float, name: str = "closed_inner_loops") -> Any:
    """The outer controller's model from step tests of the closed inner loops (module docstring).

    ``mvs``: the outer MVs (inner-loop CVs, i.e. setpoints, or plant MVs without a loop);
    ``sizes``: the step size of each outer MV and of each measured DV to include; ``cvs``: the
    outer CVs.  Returns the transfer-matrix :class:`~mpcproto.Model` (nominal values = the plant's
    at *op*; setpoint ranges = the inner CVs' physical bounds).
    """
    from ..models.transfer_matrix import TransferElement, transfer_matrix_model
    from .step_tests import closed_loop_step
    from .tuning import StepData, fit_step

    inner = PIDController.for_model(plant, list(loops), name="inner")
    inner_cvs = {lp.cv for lp in loops}
    cv_lo, cv_hi = plant.bounds("cv")
    mv_lo, mv_hi = plant.bounds("mv")
    dvs = [d for d in sizes if d in plant.dv_names]

    def test(inp: str) -> dict[str, Any]:
        size = float(sizes[inp])
        at = 2 * Ts
        if inp in inner_cvs:
            tr = closed_loop_step(plant, inner, op, Ts=Ts, duration=duration,
                                  setpoints={inp: (at, size)})
        elif inp in plant.dv_names:
            tr = closed_loop_step(plant, inner, op, Ts=Ts, duration=duration, dvs={inp: (at, size)})
        else:
            tr = closed_loop_step(plant, _Stepper(inner, plant.mv_names.index(inp), size, at), op,
                                  Ts=Ts, duration=duration)
        if not tr.success:
            # the closed-loop run's own words say why the step test failed: shown as found
            raise fail("identify_over_loops", f"sizes.{inp}", f"a step test of '{inp}' that runs",
                       f"a failed run: {tr.message}")
        els = {}
        for c in cvs:
            i = plant.cv_names.index(c)
            data = StepData(t=tr.t, y={c: tr.series(c)}, mv=inp, size=size, at=at,
                            y0={c: float(op.y[i])})
            try:
                f = fit_step(data, c)
            except SettingsError as exc:
                if exc.code == "no_response":
                    els[c] = None              # no effect of this input on this CV
                    continue
                raise
            els[c] = TransferElement(f.gain, tuple(f.time_constants), dead_time=f.dead_time,
                                     integrating=f.kind == "integrating")
        return els

    cols = {inp: test(inp) for inp in list(mvs) + dvs}
    mv_spec = {}
    for m in mvs:
        if m in inner_cvs:
            i = plant.cv_names.index(m)
            mv_spec[m] = {"nominal": float(op.y[i]), "low": float(cv_lo[i]), "high": float(cv_hi[i])}
        elif m in plant.mv_names:
            j = plant.mv_names.index(m)
            mv_spec[m] = {"nominal": float(op.u[j]), "low": float(mv_lo[j]), "high": float(mv_hi[j])}
        else:
            raise fail("identify_over_loops", "mvs", "an inner loop's CV or a plant MV",
                       f"'{m}'")
    cv_spec = {c: {"nominal": float(op.y[plant.cv_names.index(c)])} for c in cvs}
    dv_spec = {d: {"nominal": float(op.d[plant.dv_names.index(d)]), "measured": True} for d in dvs}
    elements = {c: {m: cols[m][c] for m in mvs} for c in cvs}
    dv_elements = {c: {d: cols[d][c] for d in dvs} for c in cvs} if dvs else None
    return transfer_matrix_model(name, mv_spec, cv_spec, elements, dvs=dv_spec or None,
                                 dv_elements=dv_elements, time_unit=plant.time_unit)
