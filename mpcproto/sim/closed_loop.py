"""The closed loop: plant + instruments + actuators + faults + a controller, one sample at a time.

:class:`ClosedLoop` can be stepped by hand (``reset()`` then ``step()``) or run to the end
(``run()``); :func:`simulate` is the one-call convenience over it.  Both return a
:class:`mpcproto.Trajectory`.

Order of one sample ``k`` (time ``t = t0 + k*Ts``)
--------------------------------------------------
1. DVs, setpoints and limits are read from their signals (evaluated once for the whole run).
2. The true CVs are computed from the plant state (inputs still at the previous sample's values).
3. Each instrument turns its true CV into a reading (lag, bias, noise, sensor faults, dead time,
   analyzer sample-and-hold) -> :class:`mpcproto.Measurement` with ``taken_at``/``fresh``.
4. The controller's ``step`` answers with MVs; its wall time is recorded as ``diag.step_ms``.
   With ``readback=True`` (default) a controller whose ``step`` takes the ``u_applied`` keyword
   is also told the MVs the actuators applied over the previous sample (after limits, rate
   limits and valve faults), as a valve position feedback would tell it.
5. Each actuator applies limits, rate limits and valve faults -> the MVs applied to the plant.
6. The row is recorded; the plant integrates over the sample with MVs and DVs held.

A plant integration failure ends the run: the Trajectory keeps the rows recorded so far and says
``status == "failed"`` with the integrator's message; nothing is raised.

Randomness
----------
One ``rng`` (an int seed, a ``numpy.random.SeedSequence``, a ``Generator`` or None) is split into
independent streams for the disturbance signals and the measurement noise, drawn before the run
starts, so two runs with the same seed see the same disturbances and the same noise whatever the
controller does.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..control.base import Measurement, Targets, ControlOutput, accepts_readback
from ..exceptions import MpcprotoError, SimulationError
from ..linear import delay_samples
from .._specs import refuse_unknown_keys
from ..operating import OperatingPoint
from ..validation import Boolean, Interval, Names, check, fail, shown
from ..trajectory import RUN_FAILED, RUN_LEFT_RANGE, RUN_OK, Trajectory, valid_range_events
from .instruments import (Actuator, Instrument, actuator_from_spec, fault_from_spec,
                          instrument_from_spec)
from .plant import Plant
from .signals import signal_from_spec

__all__ = ["ClosedLoop", "simulate", "split_rng"]

_SCALARS = (bool, int, float, np.bool_, np.integer, np.floating)
#: list diagnostics kept per variable: key -> role of the names (values in the role's order)
_VECTOR_DIAG = {"target_u": "mv", "target_y": "cv"}
#: list diagnostics of variable names, kept as 0/1 flags per variable: key -> role
_NAMES_DIAG = {"relaxed_cvs": "cv", "rejected_measurements": "cv", "late_measurements": "cv",
               "dropped_measurements": "cv", "active_mv_limit_names": "mv",
               "mvs_not_following": "mv"}


def split_rng(rng: Any, n: int) -> tuple[list[np.random.Generator], int | None]:
    """*n* independent generators from an int / SeedSequence / Generator / None (and the int seed)."""
    if isinstance(rng, np.random.Generator):
        return list(rng.spawn(n)), None
    if isinstance(rng, np.random.SeedSequence):
        return [np.random.default_rng(s) for s in rng.spawn(n)], None
    if rng is None or (isinstance(rng, (int, np.integer)) and not isinstance(rng, bool) and rng >= 0):
        ss = np.random.SeedSequence(None if rng is None else int(rng))
        seed = int(rng) if rng is not None else None
        return [np.random.default_rng(s) for s in ss.spawn(n)], seed
    raise fail("ClosedLoop", "rng",
               "a non-negative int seed, a numpy SeedSequence or Generator, or None", shown(rng))


_OWNER = "ClosedLoop"   # the owner of every setup error (its key: the argument path)


class ClosedLoop:
    """A steppable closed-loop simulation of a nonlinear plant under a controller.

    Parameters
    ----------
    plant_model : Model
        Built model of the plant (its parameter values are the plant's).
    controller : Controller
        Anything with ``name``, ``reset(op, t0)`` and ``step(t, meas, dv, targets, dv_forecast)``.
    op : OperatingPoint
        Where the run starts: plant state, MVs and DVs; also the reference of relative signals.
    Ts : float
        Controller sample time (model time unit); the plant integrator is built for it once.
    duration : float
        Length of the run; rounded to a whole number of samples.
    dvs : mapping DV name -> signal spec, optional
        Disturbances, relative to ``op.d`` unless the spec gives a ``base``.
    setpoints : mapping CV name -> signal spec or None, optional
        Relative to ``op.y`` unless absolute; ``None`` = no setpoint (zone only).  CVs not listed
        keep the setpoint ``op.y``.
    cv_limits : mapping CV name -> {"low": spec, "high": spec}, optional
        Zone limits given to the controller (and checked by the analysis); relative specs are
        offsets from the model's physical bound on that side.  Default: the physical bounds.
    mv_limits : mapping MV name -> {"low": spec, "high": spec, "rate": float}, optional
        Operating limits given to the controller (``rate`` per time unit).  Default: physical.
        They are hard limits, intersected with the physical bounds (recorded as ``mvlo``/``mvhi``);
        a limit wholly beyond the physical range is refused.  A controller's command outside them
        is recorded as asked (``ucmd``) and reported by :func:`mpcproto.analysis.mv_violations`.
    instruments : mapping CV name -> Instrument or spec, optional
    actuators : mapping MV name -> Actuator or spec, optional
    faults : sequence of Fault or spec, optional
    rng : int, SeedSequence, Generator or None
        Seeds the disturbance and noise streams (see module docstring).
    plant_parameters : mapping, optional
        Parameter overrides for the plant only (model mismatch), via ``Model.with_parameters``.
    integrator, integrator_options :
        CasADi plugin and options for the plant (default: the model's choice, see
        :class:`mpcproto.sim.Plant`).
    t0 : float
        Start time.
    forecast : bool
        Pass the true future measured DVs over the next ``forecast_steps`` samples as
        ``dv_forecast`` (a perfect forecast, for studies of feedforward); default False (None).
    forecast_steps : int
    readback : bool
        Pass the applied MVs of the previous sample as ``u_applied`` to a controller that takes
        it (see :mod:`mpcproto.control.base`); default True.  False: the controller only knows
        what it commanded.
    """

    def __init__(self, plant_model: Any, controller: Any, *, op: OperatingPoint, Ts: float,
                 duration: float, dvs: Mapping[str, Any] | None = None,
                 setpoints: Mapping[str, Any] | None = None,
                 cv_limits: Mapping[str, Any] | None = None,
                 mv_limits: Mapping[str, Any] | None = None,
                 instruments: Mapping[str, Any] | None = None,
                 actuators: Mapping[str, Any] | None = None,
                 faults: Sequence[Any] | None = None, rng: Any = None,
                 plant_parameters: Mapping[str, float] | None = None,
                 integrator: str | None = None, integrator_options: Mapping[str, Any] | None = None,
                 t0: float = 0.0, forecast: bool = False, forecast_steps: int = 0,
                 readback: bool = True):
        self.model = plant_model.with_parameters(plant_parameters) if plant_parameters else plant_model
        self.controller = controller
        check(readback, Boolean(), owner=_OWNER, key="readback")
        self._readback = bool(readback) and accepts_readback(controller)
        self.op = op
        for meth in ("reset", "step"):
            if not callable(getattr(controller, meth, None)):
                raise fail(_OWNER, "controller", "an mpcproto.Controller (reset(op, t0) and "
                           "step(t, meas, dv, targets))", f"{controller!r}, which has no {meth}()")
        if not isinstance(duration, (int, float)):
            raise fail(_OWNER, "duration", "a finite number > 0", repr(duration))
        check(duration, Interval(float, 0, None, closed="neither"), owner=_OWNER, key="duration")
        self.plant = Plant(self.model, Ts, integrator=integrator,
                           options=dict(integrator_options) if integrator_options else None)
        self.Ts = self.plant.Ts
        self.t0 = float(t0)
        self.n_steps = max(1, int(round(duration / self.Ts)))
        m = self.model
        for role, vec in (("state", op.x), ("mv", op.u), ("dv", op.d), ("cv", op.y)):
            if np.asarray(vec).shape != (len(m.names(role)),):
                raise fail(_OWNER, "op", f"{len(m.names(role))} {role} values for model "
                           f"'{m.name}' ({', '.join(m.names(role))})",
                           f"shape {np.asarray(vec).shape}")
        self.forecast_steps = int(forecast_steps) if forecast else 0
        (self._sig_rng, self._noise_rng), self.seed = split_rng(rng, 2)
        # the spec factories' errors name the argument path as their owner (what=); the loop's
        # own errors have the owner "ClosedLoop" and the argument path as their key
        self.faults = [fault_from_spec(f, what=f"faults[{i}]") for i, f in enumerate(faults or [])]
        for i, f in enumerate(self.faults):
            role, names = ("CV", m.cv_names) if f.on_sensor else ("MV", m.mv_names)
            check(f.variable, Names(role, tuple(names)), owner=_OWNER, key=f"faults[{i}].variable")
        self._setup_signals(dvs, setpoints, cv_limits, mv_limits)
        self._setup_instruments(instruments)
        self._setup_actuators(actuators)
        self._started = False

    # ------------------------------------------------------------------ setup
    def _names_check(self, mapping: Mapping[str, Any] | None, role: str, arg: str) -> dict:
        if mapping is None:
            return {}
        if not isinstance(mapping, Mapping):
            raise fail(_OWNER, arg, f"a mapping of {role.upper()} names",
                       type(mapping).__name__)
        names = tuple(self.model.names(role))
        for k in mapping:
            check(k, Names(role.upper(), names), owner=_OWNER, key=arg)
        return dict(mapping)

    def _series(self, spec: Any, reference: float, what: str, keep: dict | None = None,
                key: Any = None) -> np.ndarray:
        sig = signal_from_spec(spec, what=what, rng=self._sig_rng)
        if sig.relative and not math.isfinite(reference):
            raise fail(_OWNER, what, "a signal with a 'base' (an absolute value): a relative "
                       "signal needs a finite reference", "a relative signal on an unbounded range")
        if keep is not None:
            keep[key] = sig
        return np.asarray(sig.value(self.times), float) + sig.resolve(reference)

    def _setup_signals(self, dvs, setpoints, cv_limits, mv_limits) -> None:
        m, op, N = self.model, self.op, self.n_steps
        self.times = self.t0 + self.Ts * np.arange(N)
        tf = self.t0 + self.Ts * np.arange(N + self.forecast_steps)
        dvs = self._names_check(dvs, "dv", "dvs")
        self.D = np.tile(np.asarray(op.d, float), (len(tf), 1))
        for j, n in enumerate(m.dv_names):
            if n in dvs:
                sig = signal_from_spec(dvs[n], what=f"dvs.{n}", rng=self._sig_rng)
                self.D[:, j] = np.asarray(sig.value(tf), float) + sig.resolve(op.d[j])
        sps = self._names_check(setpoints, "cv", "setpoints")
        self.SP = np.tile(np.asarray(op.y, float), (N, 1))
        self._sp_signals: dict[int, Any] = {}      # kept for a setpoint preview
        for j, n in enumerate(m.cv_names):
            if n in sps:
                self.SP[:, j] = np.nan if sps[n] is None else self._series(
                    sps[n], op.y[j], f"setpoints.{n}", self._sp_signals, j)
        self.LO, self.HI = self._limit_series(cv_limits, "cv", "cv_limits")
        self.MVLO, self.MVHI = self._limit_series(mv_limits, "mv", "mv_limits", allow_rate=True)
        # the MV limits a controller gets are hard: never beyond the physical travel
        plo, phi = m.bounds("mv")
        for side, arr, beyond in (("low", self.MVLO, self.MVLO > phi),
                                  ("high", self.MVHI, self.MVHI < plo)):
            if beyond.any():
                k, j = np.argwhere(beyond)[0]
                raise fail(_OWNER, f"mv_limits.{m.mv_names[j]}.{side}",
                           f"a limit within the physical range [{plo[j]:g}, {phi[j]:g}]",
                           f"{arr[k, j]:g} at t={self.times[k]:g}")
        self.MVLO, self.MVHI = np.maximum(self.MVLO, plo), np.minimum(self.MVHI, phi)
        for arg, names, LO, HI in (("cv_limits", m.cv_names, self.LO, self.HI),
                                   ("mv_limits", m.mv_names, self.MVLO, self.MVHI)):
            bad = np.argwhere(LO > HI)
            if bad.size:
                k, j = bad[0]
                raise fail(_OWNER, f"{arg}.{names[j]}", "a low limit at or below the high limit",
                           f"low {LO[k, j]:g} above high {HI[k, j]:g} at t={self.times[k]:g}")

    def _limit_series(self, spec: Mapping[str, Any] | None, role: str, arg: str,
                      allow_rate: bool = False) -> tuple[np.ndarray, np.ndarray]:
        m, N = self.model, self.n_steps
        spec = self._names_check(spec, role, arg)
        plo, phi = m.bounds(role)
        LO, HI = np.tile(plo, (N, 1)), np.tile(phi, (N, 1))
        if allow_rate:
            self.mv_rate = np.full(len(m.names(role)), np.inf)
        for j, n in enumerate(m.names(role)):
            if n not in spec:
                continue
            s = spec[n]
            allowed = ("low", "high", "rate") if allow_rate else ("low", "high")
            if not isinstance(s, Mapping):
                raise fail(_OWNER, f"{arg}.{n}", f"a table with keys {', '.join(allowed)}",
                           shown(s))
            refuse_unknown_keys(s, allowed, what=f"{arg}.{n}")
            if "low" in s and s["low"] is not None:
                LO[:, j] = self._series(s["low"], plo[j], f"{arg}.{n}.low")
            if "high" in s and s["high"] is not None:
                HI[:, j] = self._series(s["high"], phi[j], f"{arg}.{n}.high")
            if allow_rate and "rate" in s:
                self.mv_rate[j] = check(s["rate"], Interval(float, 0, None, allow_inf=True,
                                                            noun="a rate (per time unit)"),
                                        owner=_OWNER, key=f"{arg}.{n}.rate")
        return LO, HI

    def _setup_instruments(self, instruments) -> None:
        m, N, Ts = self.model, self.n_steps, self.Ts
        spec = self._names_check(instruments, "cv", "instruments")
        self.instruments = {n: instrument_from_spec(spec.get(n, Instrument()), what=f"instruments.{n}")
                            for n in m.cv_names}
        ny = m.ny
        ins = [self.instruments[n] for n in m.cv_names]
        self._alpha = np.array([math.exp(-Ts / i.lag) if i.lag > 0 else 0.0 for i in ins])
        self._bias = np.array([i.bias for i in ins])
        self._dl = [delay_samples(i.dead_time, Ts, what=f"instrument dead time on '{n}'")
                    for i, n in zip(ins, m.cv_names)]
        self._per = [max(1, delay_samples(i.period, Ts, what=f"analyzer period on {n}"))
                     if i.period else 1 for i, n in zip(ins, m.cv_names)]
        # the noise sequence is drawn once, before the run, for the whole run
        std = np.array([i.noise_std for i in ins])
        self._noise = self._noise_rng.standard_normal((N, ny)) * std

    def _setup_actuators(self, actuators) -> None:
        m = self.model
        spec = self._names_check(actuators, "mv", "actuators")
        self.actuators = {n: actuator_from_spec(spec.get(n, Actuator()), what=f"actuators.{n}")
                          for n in m.mv_names}
        plo, phi = m.bounds("mv")
        acts = [self.actuators[n] for n in m.mv_names]
        self._act_lo = np.maximum(plo, [a.low for a in acts])
        self._act_hi = np.minimum(phi, [a.high for a in acts])
        self._act_rate = np.array([a.rate for a in acts]) * self.Ts

    # ------------------------------------------------------------------ running
    def reset(self) -> None:
        """Put plant, instruments, actuators and controller at the operating point; clear records."""
        m, op, N = self.model, self.op, self.n_steps
        self.plant.reset(op.x, op.u, op.d)
        self.controller.reset(op, self.t0)
        self._setup_preview()
        self.k = 0
        self.u_prev = np.asarray(op.u, float).copy()
        self._filt = np.asarray(op.y, float).tolist()
        self._meas_hist: list[list[float]] = []
        self._alpha_l, self._bias_l = self._alpha.tolist(), self._bias.tolist()
        self._y0_l = np.asarray(op.y, float).tolist()
        self._noise_l = self._noise.tolist()
        self._dl_per = list(zip(self._dl, self._per))
        self._y0 = np.asarray(op.y, float).copy()
        self._stuck: dict[int, float] = {}
        self._frozen: dict[int, float] = {}
        self._rec = {
            "x": np.full((N, m.nx), np.nan), "u": np.full((N, m.nu), np.nan),
            "ucmd": np.full((N, m.nu), np.nan), "y": np.full((N, m.ny), np.nan),
            "ym": np.full((N, m.ny), np.nan), "taken": np.full((N, m.ny), np.nan),
        }
        self._status: list[str] = []
        self._diag: list[dict[str, Any]] = []
        self._counts: Mapping[str, Any] = {}
        self._role_names = {"cv": list(m.cv_names), "mv": list(m.mv_names)}
        self._diag_cols = {key: [f"{key}.{n}" for n in self._role_names[role]]
                           for key, role in {**_VECTOR_DIAG, **_NAMES_DIAG}.items()}
        self._fault_flags = np.zeros((N, len(self._fault_vars())))
        self.status, self.message, self.failed_at = RUN_OK, "", None
        self.done = False
        self._started = True
        self._cv_index = {n: j for j, n in enumerate(m.cv_names)}
        self._mv_index = {n: j for j, n in enumerate(m.mv_names)}
        self._dv_mask = np.array([v.measured for v in m.variables("dv")], bool)
        self._rate_per_sample = np.where(np.isfinite(self.mv_rate), self.mv_rate * self.Ts, np.inf)
        self._has_rate = bool(np.isfinite(self._act_rate).any())
        self._sensor_faults = [f for f in self.faults if f.on_sensor]
        self._valve_faults = [f for f in self.faults if not f.on_sensor]
        self._plain_instruments = all(n == 0 for n in self._dl) and all(p == 1 for p in self._per)
        self._dv_seen = np.where(self._dv_mask, self.D[:N], np.nan)
        self._act_hi_eff = np.maximum(self._act_lo, self._act_hi)
        self._all_fresh = np.ones(m.ny, bool)
        self._all_fresh.flags.writeable = False
        for arr in (self.SP, self.LO, self.HI, self.MVLO, self.MVHI, self._dv_seen,
                    self._rate_per_sample):
            arr.flags.writeable = False    # handed to the controller as views: read-only

    def _setup_preview(self) -> None:
        """The known part of the setpoint signals over the run plus the controller's preview
        (``preview_samples`` rows from each sample on), when the controller asks for one."""
        n = getattr(self.controller, "preview_samples", 0)
        self._preview_n = int(n) if isinstance(n, (int, np.integer)) and n > 0 else 0
        if not self._preview_n:
            return
        N, ny = self.n_steps, self.model.ny
        tf = self.t0 + self.Ts * np.arange(N + self._preview_n - 1)
        K = np.zeros((len(tf), ny))
        for j, sig in self._sp_signals.items():
            K[:, j] = sig.known_shape(tf)
        self._known_sp = K

    def _fault_vars(self) -> list[str]:
        out: list[str] = []
        for f in self.faults:
            if f.variable not in out:
                out.append(f.variable)
        return out

    def _measure(self, k: int, t: float, y: np.ndarray) -> Measurement:
        # a handful of CVs: plain Python floats are faster here than small numpy arrays
        a, b, filt = self._alpha_l, self._bias_l, self._filt
        noise = self._noise_l[k]
        yl = y.tolist()
        mk = []
        for j in range(len(yl)):
            f = a[j] * filt[j] + (1.0 - a[j]) * yl[j]
            filt[j] = f
            mk.append(f + b[j] + noise[j])
        for f in self._sensor_faults:
            j = self._cv_index[f.variable]
            if not f.active(t):
                self._frozen.pop(id(f), None)
                continue
            if f.kind == "sensor_frozen":
                if id(f) not in self._frozen:
                    self._frozen[id(f)] = (self._meas_hist[k - 1][j] if k > 0
                                           else self._y0_l[j] + b[j])
                mk[j] = self._frozen[id(f)]
            elif f.kind == "sensor_drift":
                mk[j] += f.rate * (t - f.at)
            elif f.kind == "sensor_nan":
                mk[j] = math.nan
            elif f.kind == "sensor_bias":
                mk[j] += f.size
        self._meas_hist.append(mk)
        if self._plain_instruments:
            return Measurement(y=np.array(mk), taken_at=np.full(len(mk), t), fresh=self._all_fresh)
        # sample taken at js (a multiple of the analyzer period), arrived after the dead time;
        # before the run the past is the steady operating point
        hist, t0, Ts = self._meas_hist, self.t0, self.Ts
        val, taken, fresh = [], [], []
        for j, (nd, P) in enumerate(self._dl_per):
            js = ((k - nd) // P) * P
            val.append(hist[js][j] if js >= 0 else self._y0_l[j] + b[j])
            taken.append(t0 + js * Ts)
            fresh.append(js + nd == k)
        return Measurement(y=np.array(val), taken_at=np.array(taken), fresh=np.array(fresh))

    def _actuate(self, t: float, ucmd: np.ndarray) -> np.ndarray:
        cmd = ucmd if np.isfinite(ucmd).all() else np.where(np.isfinite(ucmd), ucmd, self.u_prev)
        if self._has_rate:        # a NaN request (above) holds the valve
            r = self._act_rate
            cmd = np.minimum(np.maximum(cmd, self.u_prev - r), self.u_prev + r)
        if not self._valve_faults:
            return np.minimum(np.maximum(cmd, self._act_lo), self._act_hi_eff)
        lo, hi = self._act_lo.copy(), self._act_hi.copy()
        stuck: dict[int, float] = {}
        for f in self._valve_faults:
            j = self._mv_index[f.variable]
            if not f.active(t):
                self._stuck.pop(id(f), None)
                continue
            if f.kind == "valve_saturation":
                lo[j], hi[j] = max(lo[j], f.low), min(hi[j], f.high)
            elif f.kind == "valve_stuck":
                if id(f) not in self._stuck:
                    self._stuck[id(f)] = f.position if f.position is not None else self.u_prev[j]
                stuck[j] = self._stuck[id(f)]
        u = np.minimum(np.maximum(cmd, lo), np.maximum(lo, hi))
        for j, v in stuck.items():
            u[j] = v
        return u

    def step(self) -> bool:
        """Advance one sample; returns False when the run is over (end reached or failed)."""
        if not self._started:
            raise fail("ClosedLoop", "step()", "a reset() call first", "a loop not yet reset",
                       "call reset() first")
        if self.done:
            return False
        k, m = self.k, self.model
        t = float(self.times[k])
        d = self.D[k]
        y = self.plant.y_next if self.plant.y_next is not None else self.plant.output(self.u_prev, d)
        meas = self._measure(k, t, y)
        dv_seen = self._dv_seen[k]
        targets = Targets(setpoint=self.SP[k], cv_low=self.LO[k], cv_high=self.HI[k],
                          mv_low=self.MVLO[k], mv_high=self.MVHI[k], mv_rate=self._rate_per_sample)
        fc = None
        if self.forecast_steps:
            fc = np.where(self._dv_mask, self.D[k:k + self.forecast_steps], np.nan)
        kw = {}
        if self._preview_n:           # setpoint now + the known program's change from now
            K = self._known_sp
            kw["setpoint_program"] = self.SP[k] + (K[k:k + self._preview_n] - K[k])
        t_start = time.perf_counter()
        try:
            if self._readback:
                out = self.controller.step(t, meas, dv_seen, targets, fc,
                                           u_applied=self.u_prev.copy(), **kw)
            else:
                out = self.controller.step(t, meas, dv_seen, targets, fc, **kw)
        except MpcprotoError as exc:
            return self._fail(k, f"controller '{getattr(self.controller, 'name', '?')}' raised "
                                 f"{type(exc).__name__} at t={t:g}: {exc}", rows=k)
        step_ms = (time.perf_counter() - t_start) * 1e3
        if not isinstance(out, ControlOutput):
            raise fail("ClosedLoop", "controller",
                       "a controller whose step() returns a ControlOutput",
                       f"'{getattr(self.controller, 'name', '?')}'.step() returning "
                       f"{type(out).__name__}")
        ucmd = np.asarray(out.u, float).reshape(-1)
        if ucmd.shape != self.u_prev.shape:
            raise fail("ClosedLoop", "controller",
                       f"{m.nu} MV values per step (model '{m.name}': {', '.join(m.mv_names)})",
                       f"'{getattr(self.controller, 'name', '?')}' returning {ucmd.shape[0]}")
        u = self._actuate(t, ucmd)
        rec = self._rec
        rec["x"][k], rec["u"][k], rec["ucmd"][k] = self.plant.x, u, ucmd
        rec["y"][k], rec["ym"][k], rec["taken"][k] = y, meas.y, meas.taken_at
        self._status.append(str(out.status))
        self._diag.append(self._keep_diagnostics(out.diagnostics, step_ms))
        if self.faults:
            for i, var in enumerate(self._fault_vars()):
                self._fault_flags[k, i] = float(any(f.variable == var and f.active(t)
                                                    for f in self.faults))
        self.u_prev = u
        try:
            self.plant.advance(u, d, self.D[k + 1] if k + 1 < len(self.D) else d)
        except SimulationError as exc:
            return self._fail(k, str(exc), rows=k + 1)
        self.k += 1
        if self.k >= self.n_steps:
            self.done = True
            return False
        return True

    def _keep_diagnostics(self, raw: Mapping[str, Any] | None, step_ms: float) -> dict[str, Any]:
        """The per-step diagnostics kept in the Trajectory: numbers as ``diag.KEY``, per-variable
        vectors (``target_u``, ``target_y``) as ``diag.KEY.NAME``, lists of CV/MV names
        (``relaxed_cvs``, ``rejected_measurements``...) as 0/1 flags ``diag.KEY.NAME``, words
        (``solver_status``, ``target_status``) as text series; the controller's running
        ``counts`` as the last value (``meta["controller_counts"]``).  ``step_ms`` is the
        simulator's wall time of the whole ``step`` call (it replaces a controller's own)."""
        diag: dict[str, Any] = {}
        cols = self._diag_cols
        for key, v in (raw or {}).items():
            key = str(key)
            if isinstance(v, _SCALARS):
                diag[key] = float(v)
            elif isinstance(v, str):
                diag["text:" + key] = v
            elif key == "counts" and isinstance(v, Mapping):
                self._counts = v
            elif key in _VECTOR_DIAG and isinstance(v, (list, tuple, np.ndarray)):
                names = cols[key]
                if len(v) == len(names):
                    for n, x in zip(names, v):
                        diag[n] = float(x)
            elif key in _NAMES_DIAG and isinstance(v, (list, tuple)):
                names = cols[key]
                if v:
                    on = set(map(str, v))
                    role = self._role_names[_NAMES_DIAG[key]]
                    for n, c in zip(role, names):
                        diag[c] = float(n in on)
                else:
                    for c in names:
                        diag[c] = 0.0
        diag["step_ms"] = step_ms
        return diag

    def _fail(self, k: int, message: str, rows: int) -> bool:
        self.status, self.message, self.failed_at = RUN_FAILED, message, float(self.times[k])
        self.k = rows
        self.done = True
        return False

    def run(self) -> Trajectory:
        """Reset, step to the end (or to a failure) and return the Trajectory."""
        self.reset()
        while self.step():
            pass
        return self.trajectory()

    def trajectory(self) -> Trajectory:
        """The Trajectory of the samples recorded so far."""
        if not self._started:
            raise fail("ClosedLoop", "trajectory()", "a recorded run", "nothing recorded",
                       "call reset()/run() first")
        m, n = self.model, self.k
        cols: dict[str, np.ndarray] = {}
        rec = self._rec

        def put(kind: str, names: Sequence[str], arr: np.ndarray) -> None:
            for j, name in enumerate(names):
                cols[f"{kind}.{name}"] = arr[:n, j]

        put("x", m.state_names, rec["x"])
        put("u", m.mv_names, rec["u"])
        put("ucmd", m.mv_names, rec["ucmd"])
        put("d", m.dv_names, self.D)
        put("y", m.cv_names, rec["y"])
        put("ym", m.cv_names, rec["ym"])
        put("taken", m.cv_names, rec["taken"])
        put("sp", m.cv_names, self.SP)
        put("lo", m.cv_names, self.LO)
        put("hi", m.cv_names, self.HI)
        put("mvlo", m.mv_names, self.MVLO)
        put("mvhi", m.mv_names, self.MVHI)
        put("fault", self._fault_vars(), self._fault_flags)
        # every diagnostics key in order of first appearance (a dict: one hash per key and row)
        keys = dict.fromkeys(key for dg in self._diag[:n] for key in dg)
        text = {"status": self._status[:n]}
        for key in keys:
            if key.startswith("text:"):
                text[f"diag.{key[5:]}"] = [str(dg.get(key, "")) for dg in self._diag[:n]]
            else:
                cols[f"diag.{key}"] = np.array([dg.get(key, np.nan) for dg in self._diag[:n]])
        units = {v.name: v.unit for v in m.variables() if v.role != "parameter"}
        meta = {
            "model": m.name, "controller": getattr(self.controller, "name", type(self.controller).__name__),
            "Ts": self.Ts, "time_unit": m.time_unit, "t0": self.t0, "n_steps": self.n_steps,
            "seed": self.seed, "states": list(m.state_names), "mvs": list(m.mv_names),
            "dvs": list(m.dv_names), "measured_dvs": list(m.measured_dv_names),
            "cvs": list(m.cv_names), "units": units, "plant_parameters": m.parameters,
            "integrator": self.plant.plugin, "status": self.status, "message": self.message,
            "failed_at": self.failed_at, "faults": [f.as_dict() for f in self.faults],
            "instruments": {n: vars(i) for n, i in self.instruments.items()},
            "mv_bounds": {n: [float(lo), float(hi)] for n, lo, hi in zip(m.mv_names, *m.bounds("mv"))},
            "cv_bounds": {n: [float(lo), float(hi)] for n, lo, hi in zip(m.cv_names, *m.bounds("cv"))},
            "state_bounds": {n: [float(lo), float(hi)]
                             for n, lo, hi in zip(m.state_names, *m.bounds("state"))},
            "controller_counts": dict(self._counts),
        }
        traj = Trajectory(self.times[:n], cols, text, meta)
        events = valid_range_events(traj)
        meta["range_events"] = events
        meta["outcome"] = RUN_LEFT_RANGE if events and self.status == RUN_OK else self.status
        return traj


def simulate(plant_model: Any, controller: Any, *, op: OperatingPoint, Ts: float, duration: float,
             dvs: Mapping[str, Any] | None = None, setpoints: Mapping[str, Any] | None = None,
             cv_limits: Mapping[str, Any] | None = None, mv_limits: Mapping[str, Any] | None = None,
             instruments: Mapping[str, Any] | None = None,
             actuators: Mapping[str, Any] | None = None, faults: Sequence[Any] | None = None,
             rng: Any = None, plant_parameters: Mapping[str, float] | None = None,
             integrator: str | None = None, integrator_options: Mapping[str, Any] | None = None,
             t0: float = 0.0, forecast: bool = False, forecast_steps: int = 0,
             readback: bool = True) -> Trajectory:
    """Run a closed loop from *op* for *duration* and return its :class:`mpcproto.Trajectory`.

    A convenience over ``ClosedLoop(plant_model, controller, op=op, Ts=Ts, duration=duration,
    ...).run()``; the arguments are those of :class:`ClosedLoop`.  A plant integration failure
    does not raise: the Trajectory ends there with ``status == "failed"`` and the message.
    """
    return ClosedLoop(plant_model, controller, op=op, Ts=Ts, duration=duration, dvs=dvs,
                      setpoints=setpoints, cv_limits=cv_limits, mv_limits=mv_limits,
                      instruments=instruments, actuators=actuators, faults=faults, rng=rng,
                      plant_parameters=plant_parameters, integrator=integrator,
                      integrator_options=integrator_options, t0=t0, forecast=forecast,
                      forecast_steps=forecast_steps, readback=readback).run()
