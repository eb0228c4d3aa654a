"""The predictive controller's run time: reset, one sample's step, limits and readback.

:class:`ControllerRuntime` holds the part of :class:`~mpcproto.control.mpc.PredictiveController`
that runs a closed loop: :meth:`reset`, :meth:`step` (estimator, then the QPs of
:class:`~mpcproto.control.mpc_qp.ControllerQP`, the fallback rules, the one projection onto the
MV limits) and the step's :class:`~mpcproto.control.mpc_results.StepDiagnostics`.
"""

from __future__ import annotations

import time

import numpy as np

from ..exceptions import NotBuiltError
from ..validation import fail
from .base import (STATUS_FAILED, STATUS_FALLBACK, STATUS_HOLD, STATUS_MEASUREMENT_REJECTED,
                   STATUS_MV_NOT_FOLLOWING, STATUS_OK, ControlOutput, Measurement, Targets)
from .estimator import NO_EVENTS
from .limits import project_command, project_with_activity
from .mpc_results import ABSENT, blank_diagnostics
from .preview import rows_by_sample, stage_references

__all__ = ["ControllerRuntime"]

#: samples an MV that did not follow its command stays limited at its position (readback)
_NOT_FOLLOWING_HOLD = 5
#: a readback within this fraction of the MV's scale of the previous MV is that MV: the round-off
#: of an actuator's arithmetic (a few ulps) neither counts as a difference nor revises the
#: estimator's input (our rule)
_READBACK_TOL = 1e-9


class ControllerRuntime:
    """Reset and step of the predictive controller (a part of ``PredictiveController``)."""

    def reset(self, op=None, t0: float = 0.0) -> None:
        """Start bumplessly at *op* (default: the model's operating point) at time *t0*.

        The estimator starts at the deviation state of *op* when it has the model's state layout
        (plant states; delay states at the operating MVs/DVs), else at zero; the previous MVs are
        the operating point's.
        """
        self._check_built("reset")
        m = self.dmodel
        op = m.op if op is None else op
        x0 = np.zeros(m.nx)
        npl = getattr(m, "n_plant_states", m.nx)
        if np.shape(op.x) == np.shape(m.op.x) and len(m.op.x) == npl:
            x0[:npl] = np.asarray(op.x, float) - np.asarray(m.op.x, float)
            # delay states of MVs/DVs at the new point: the delayed input, a shift register
            for i, nm in enumerate(m.state_names[npl:], start=npl):
                src = nm.split("[")[0]
                if src in m.mv_names:
                    x0[i] = op.u[m.mv_names.index(src)] - m.op.u[m.mv_names.index(src)]
                elif src in m.dv_names:
                    x0[i] = op.d[m.dv_names.index(src)] - m.op.d[m.dv_names.index(src)]
        self.estimator_.reset(x0, t0)
        # solver state of a previous run (warm start, adaptive step size, learned active sets)
        # must not leak into this one: a rerun from the same point repeats the run exactly
        if self._qp is not None:
            self._qp.restart()
        if self.condensed_ is not None:
            self.condensed_.restart()
        if self.target_ is not None:
            self.target_.restart()
        self._last_inputs = None
        self._slim = self._tz_lim = self._zu_lim = self._u_prev_within = None
        self._op = op
        self._op_u = np.asarray(m.op.u, float)
        self._op_d = np.asarray(m.op.d, float)
        self._op_y = np.asarray(m.op.y, float)
        r = self._resolved
        self._pref_dev = r["preferred_value"] - self._op_u
        self._slack_tol = 1e-4 * r["cv_scale"]
        self._slack_tol_list = self._slack_tol.tolist()
        self._mv_names = list(m.mv_names)
        self._cv_names = list(m.cv_names)
        self._fast = self.fast_path and self.solver_ in ("osqp", "daqp")
        # the step's constants: shapes, the feedforward flags, all MVs known
        self._nu, self._ny, self._nd = m.nu, m.ny, m.nd
        self._shape_u, self._shape_y, self._shape_d = (m.nu,), (m.ny,), (m.nd,)
        self._ff = np.asarray(r.feedforward, bool)
        self._ff_all = bool(self._ff.all())
        self._all_known, self._all_used = np.ones(m.nu, bool).tobytes(), np.ones(m.nd, bool).tobytes()
        self._unused_key, self._unused = None, None
        self._sy_list = np.asarray(self._sy, float).tolist()
        self._su_list, self._op_u_list = np.asarray(self._su, float).tolist(), self._op_u.tolist()
        self._readback_tol = _READBACK_TOL * np.asarray(self._su, float)
        # all slacks zero (ny, N): the relaxed CVs and the largest slack of that case, by the
        # same arithmetic as the step's general rule
        self._zero_slacks = bytes(8 * m.ny * self._N)
        zero = [0.0 * b for b in self._sy_list]
        self._zero_relaxed = [n for n, a, b in zip(m.cv_names, zero, self._slack_tol_list) if a > b]
        self._zero_slack_max = max(max(zero), 0.0) if zero else 0.0
        self._lims = None
        self._z[:] = 0.0
        self._forecast_in_z = False
        self._u_prev = np.asarray(op.u, float).copy()
        self._plan = None
        self._plan_scaled = None
        self._plan_age = 0
        self._target = None
        nu = m.nu
        self._ua_prev = self._u_prev.copy()
        self._clamp_hi = np.full(nu, np.inf)
        self._clamp_lo = np.full(nu, -np.inf)
        self._clamp_left = np.zeros(nu, int)
        self._clamping = False                # any _clamp_left > 0 (a Python flag: cheap to test)
        self.counts = {"steps": 0, "fallbacks": 0, "holds": 0, "inaccurate": 0, "failed_solves": 0,
                       "target_fallbacks": 0, "rejected_measurements": 0, "late_measurements": 0,
                       "backup_solves": 0, "readback_differs": 0, "mv_not_following": 0}

    def _vec(self, v, n: int, what: str, fill: float) -> np.ndarray:
        if v is None:
            return np.full(n, fill)
        a = np.asarray(v, float)
        if a.shape != (n,):
            a = a.reshape(-1)
            if a.shape != (n,):
                raise fail("PredictiveController.step()", what, f"{n} entries (model order)",
                           f"shape {np.shape(v)}")
        return a

    def _forecast(self, dv_forecast):
        """The DV forecast as an (n, nd) array, or None; checked before anything changes."""
        if dv_forecast is None:
            return None
        return rows_by_sample(dv_forecast, self.dmodel.nd, "dv_forecast", "DVs")

    def _preview(self, program, sp_):
        """``(sp_end, departures)`` of the setpoint program (checked), or None (no preview)."""
        if program is None or not self.setpoint_preview:
            return None
        return stage_references(program, sp_, self._N)

    def _limits(self, targets: Targets):
        """Hard MV limits and rates (absolute), CV soft limits and setpoints for this sample.

        The intersections with the settings are kept for the last targets seen (compared byte
        for byte, the checks done when they change) and handed out read-only: a sample whose
        limits did not change costs no arithmetic."""
        if targets is None:
            raise fail("PredictiveController.step()", "targets", "a Targets object", "None")
        c = self._lims
        if c is None or c.resolved is not self._resolved:
            c = self._lims = _LimitCache(self._resolved, self.dmodel.nu, self.dmodel.ny)
        a, b, key = self._target_pair(targets.mv_low, targets.mv_high, c.none_lo_u, c.none_hi_u,
                                      "mv")
        if key == c.mv_key:
            mv_lo, mv_hi = c.mv
        else:
            mv_lo, mv_hi = self._mv_limits(a, b)
            c.mv_key, c.mv, c.mv_lists = key, (mv_lo, mv_hi), (mv_lo.tolist(), mv_hi.tolist())
        tr = targets.mv_rate
        if tr is None:
            rate = c.resolved.max_move
        else:
            tr = np.asarray(tr, float)
            if tr.shape != c.shape_u:
                tr = self._vec(tr, c.nu, "targets.mv_rate", np.inf)
            key = tr.tobytes()
            if key == c.rate_key:
                rate = c.rate
            else:
                rate = self._rate_limits(tr)
                c.rate_key, c.rate, c.rate_list = key, rate, rate.tolist()
        a, b, key = self._target_pair(targets.cv_low, targets.cv_high, c.none_lo_y, c.none_hi_y,
                                      "cv")
        if key == c.cv_key:
            cv_lo, cv_hi = c.cv
        else:
            cv_lo = _read_only(np.fmax(a, c.resolved.cv_low))
            cv_hi = _read_only(np.fmin(b, c.resolved.cv_high))
            c.cv_key, c.cv = key, (cv_lo, cv_hi)
        sp_ = targets.setpoint
        sp_ = c.none_sp if sp_ is None else np.asarray(sp_, float)
        if sp_.shape != c.shape_y:
            sp_ = self._vec(sp_, c.ny, "targets.setpoint", np.nan)
        c.lists = c.mv_lists + (c.max_move_list if tr is None else c.rate_list,)
        return mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_

    def _target_pair(self, low, high, none_low, none_high, kind: str):
        """A target's low and high arrays (None: none) as float arrays of the model's length
        (checked) and their byte key."""
        low = none_low if low is None else np.asarray(low, float)
        high = none_high if high is None else np.asarray(high, float)
        shape = none_low.shape
        if low.shape != shape:
            low = self._vec(low, shape[0], f"targets.{kind}_low", -np.inf)
        if high.shape != shape:
            high = self._vec(high, shape[0], f"targets.{kind}_high", np.inf)
        return low, high, low.tobytes() + high.tobytes()

    def _mv_limits(self, low, high):
        """The targets' MV limits intersected with the settings (checked, read-only)."""
        r, m = self._resolved, self.dmodel
        mv_lo = np.maximum(low, r.mv_low)
        mv_hi = np.minimum(high, r.mv_high)
        if (mv_lo > mv_hi).any():
            j = int(np.flatnonzero(mv_lo > mv_hi)[0])
            raise fail("PredictiveController.step()", f"targets.mv_low.{m.mv_names[j]}",
                       f"MV '{m.mv_names[j]}' with its low limit at or below its high limit "
                       f"{mv_hi[j]:g}", f"{mv_lo[j]:g}",
                       note="targets intersected with the settings")
        return _read_only(mv_lo), _read_only(mv_hi)

    def _rate_limits(self, tr):
        """The targets' rate limits intersected with the settings (checked, read-only)."""
        if np.any(tr <= 0):
            j = int(np.flatnonzero(tr <= 0)[0])
            raise fail("PredictiveController.step()", f"targets.mv_rate.{self.dmodel.mv_names[j]}",
                       "a rate > 0", repr(tr[j]))
        return _read_only(np.fmin(tr, self._resolved.max_move))

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None,
             setpoint_program: np.ndarray | None = None) -> ControlOutput:
        """One sample: estimate, target, solve, return the MVs (absolute) and diagnostics.

        Parameters
        ----------
        t : float
            Time now (model time unit).
        meas : Measurement
            CV values with the times they were taken and freshness flags (model order).
        dv : ndarray (nd,)
            DV values now (absolute); NaN for unmeasured DVs.
        targets : Targets
            Setpoints (NaN: none, zone control between the CV limits), CV soft limits, MV limits
            and rates (NaN rate: none).
        dv_forecast : ndarray (n, nd) or None
            Expected DV values at t, t+Ts, ... (absolute); rows past its end repeat the last one,
            NaN entries take the current value.  None: DVs held at their current values.
        u_applied : ndarray (nu,) or None
            MV readback: the MVs actually applied over the previous sample (absolute; NaN where
            unknown).  They replace the commanded ones as the previous MVs of the move
            penalties and rate limits and as the input of the estimator's last prediction, so a
            stuck, saturated or rate-limited valve neither biases the disturbance estimates nor
            makes the plan start from a position the valve never reached.
        setpoint_program : ndarray (n, ny) or None
            With ``setpoint_preview`` on: the setpoints expected at t, t+Ts, ... (absolute, CV
            order; rows past its end repeat the last one; NaN: the setpoint now); see
            :mod:`mpcproto.control.preview`.  Ignored when ``setpoint_preview`` is off.

        Returns
        -------
        ControlOutput
            ``u`` (absolute MVs, always inside the hard MV limits: see
            :mod:`mpcproto.control.limits`), ``status`` (``STATUS_OK``,
            ``STATUS_MEASUREMENT_REJECTED`` or ``STATUS_MV_NOT_FOLLOWING`` for an accepted step
            that saw a fault, ``STATUS_FALLBACK``, ``STATUS_HOLD`` or ``STATUS_FAILED``) and
            ``diagnostics`` with ``solve_ms``, ``step_ms``,
            ``target_ms``, ``solver_status``, ``iterations``, ``fallback``, ``slack_max``,
            ``cv_limits_relaxed``, ``relaxed_cvs``, ``active_mv_limits``,
            ``active_mv_limit_names``, ``active_rate_limits``, ``limits_over_rate`` (MVs moved
            more than their rate limit because a hard limit won), ``rejected_measurements``,
            ``n_rejected_measurements``, ``mvs_not_following``, ``n_mvs_not_following``,
            ``late_measurements``, ``dropped_measurements`` / ``n_dropped_measurements``
            (readings older than the estimator's history: dropped, and the step's status says
            ``measurement_rejected``), ``backup_solves`` (0-2: solves of this step the backup
            solver rescued), ``target_status``, ``target_u``, ``target_y``, ``clipped`` and
            ``counts``.
        """
        if not self.is_built:
            self._check_built("step")
        if self._op is None:
            raise NotBuiltError("PredictiveController.step(): call .reset(op, t0) before the first step.")
        t_start = time.perf_counter()
        op_u = self._op_u
        names = self._cv_names
        diag = blank_diagnostics()
        # ---- inputs checked before anything changes state
        mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_ = self._limits(targets)
        if dv_forecast is not None:
            dv_forecast = self._forecast(dv_forecast)
        preview = None if setpoint_program is None else self._preview(setpoint_program, sp_)
        if u_applied is not None:
            self._readback(u_applied)
        clamped = self._clamping              # (_clamped counts the clamps down)
        if clamped:
            mv_lo, mv_hi = self._clamped(mv_lo, mv_hi)
            diag.mvs_not_following = [self._mv_names[j] for j in np.flatnonzero(self._clamp_left)]
        # ---- measured DVs (deviation); unknown / not fed forward -> 0
        nd = self._nd
        if dv is None:
            dv = np.full(nd, np.nan)
        else:
            dv = np.asarray(dv, float)
            if dv.shape != self._shape_d:
                dv = self._vec(dv, nd, "dv", np.nan)
        use = np.isfinite(dv)
        if not self._ff_all:
            use &= self._ff
        d_now = dv - self._op_d
        key = use.tobytes()
        if key != self._all_used:                # (bytes of the booleans) some DV not used
            if key != self._unused_key:          # the DVs not used, kept while they stay so
                self._unused_key, self._unused = key, ~use
            d_now[self._unused] = 0.0
        # ---- estimator
        y = np.asarray(meas.y, float)
        if y.shape != self._shape_y:
            y = self._vec(meas.y, self._ny, "meas.y", np.nan)
        taken = np.asarray(meas.taken_at, float)
        if taken.shape != self._shape_y:
            taken = self._vec(meas.taken_at, self._ny, "meas.taken_at", np.nan)
        fresh = np.asarray(meas.fresh, bool)
        if fresh.shape != self._shape_y:
            raise fail("PredictiveController.step()", "meas.fresh",
                       f"{self._ny} entries (model order)", f"shape {fresh.shape}")
        est = self.estimator_
        info = est.update(t, y - self._op_y, taken, fresh, d_now)
        if info is NO_EVENTS:
            diag.rejected_measurements, diag.late_measurements, diag.dropped_measurements = [], [], []
        else:
            if info["rejected"]:
                self.counts["rejected_measurements"] += len(info["rejected"])
            if info["late"]:
                self.counts["late_measurements"] += len(info["late"])
            diag.rejected_measurements = [names[i] for i in info["rejected"]]
            diag.late_measurements = [names[i] for i in info["late"]]
            # readings older than the estimator's history (one taken before the run started,
            # the steady state an analyzer reports first, is no loss)
            diag.dropped_measurements = [names[i] for i in info["too_old"]
                                            if est.sample_index(taken[i]) >= 0]
        diag.backup_solves = 0
        x, w, finite = est.estimate()
        self.counts["steps"] += 1
        if not finite:
            u = self._hold(mv_lo, mv_hi, rate)
            self._u_prev_within = None
            self.counts["failed_solves"] += 1
            diag.update(solver_status="estimate_not_finite", fallback=True, solve_ms=0.0,
                        target_ms=0.0, slack_max=float("nan"), active_mv_limits=0, iterations=None)
            est.reset(None, t)
            return self._finish(u, STATUS_FAILED, diag, t_start)
        res = self._optimize(x, w, d_now, use, dv_forecast, mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_,
                             self._u_prev, diag, preview=preview)
        diag.solve_ms = res.solve_ms
        diag.solver_status = res.status
        diag.iterations = res.iterations
        if res.accepted:
            Us = res.values["u"]
            # the first move, absolute, as floats (the projection's own form): the same
            # arithmetic as Us[:, 0] * su + op_u
            u = [a * b + c for a, b, c in zip(Us[:, 0].tolist(), self._su_list, self._op_u_list)]
            self._plan_scaled = Us                  # (nu, M) scaled; unscaled on demand
            self._plan = None
            self._plan_age = 0
            S = res.values["slack"]
            diag.fallback = False
            if S.tobytes() == self._zero_slacks:   # every slack +0.0 (bit for bit): the common case
                relaxed = self._zero_relaxed.copy()
                diag.slack_max = self._zero_slack_max
            else:
                smax_cv = [a * b for a, b in zip(S.max(axis=1).tolist(), self._sy_list)]
                tol = self._slack_tol_list
                relaxed = [names[i] for i, (a, b) in enumerate(zip(smax_cv, tol)) if a > b]
                diag.slack_max = max(max(smax_cv), 0.0) if smax_cv else 0.0
            diag.cv_limits_relaxed = bool(relaxed)
            diag.relaxed_cvs = relaxed
            status = STATUS_OK
        else:
            status, u = self._fall_back(res.status, diag, op_u)
        # ---- exact limits on what is applied (solver tolerance, a stale plan, a hold or a limit
        # that stepped past the MV must not break them): the one projection, hard limits win
        lo, hi, rt = (mv_lo, mv_hi, rate) if clamped else self._lims.lists
        u, diag.clipped, at_limit, diag.active_rate_limits, diag.limits_over_rate = \
            project_with_activity(u, self._u_prev, lo, hi, rt, what="PredictiveController",
                                  summary=True)
        self._u_prev_within = (mv_lo, mv_hi)     # u is inside these limits (the next sample's)
        diag.active_mv_limits = len(at_limit)
        diag.active_mv_limit_names = [self._mv_names[j] for j in at_limit] if at_limit else []
        return self._finish(u, status, diag, t_start)

    def _readback(self, u_applied):
        """The MVs read back (checked): they replace the previous MVs where known."""
        ua = np.asarray(u_applied, float)
        if ua.shape != self._shape_u:
            ua = self._vec(ua, self._nu, "u_applied", np.nan)
        known = np.isfinite(ua)
        if known.tobytes() == self._all_known:   # (bytes of the booleans) none replaced
            ua = ua.copy()                        # ours: it may become the previous MVs
        elif not known.any():
            return
        else:
            ua = np.where(known, ua, self._u_prev)
        if (ua.tobytes() != self._u_prev.tobytes()
                and (np.abs(ua - self._u_prev) > self._readback_tol).any()):
            if self.counts["steps"] > 0:      # the estimator has predicted with u_prev
                self.estimator_.revise_input(ua - self._op_u)
                self._note_not_following(self._u_prev, ua)
            self._u_prev = ua
            self._u_prev_within = None
            self.counts["readback_differs"] += 1
        self._ua_prev = ua.copy()

    def _fall_back(self, solver_status, diag, op_u):
        """``(status, u)`` of a step whose solve was not accepted: the shifted plan or a hold."""
        if solver_status == "optimal_inaccurate":
            self.counts["inaccurate"] += 1
        else:
            self.counts["failed_solves"] += 1
        self.counts["fallbacks"] += 1
        diag.fallback = True
        diag.slack_max = float("nan")
        diag.cv_limits_relaxed = None
        diag.relaxed_cvs = []
        if self._plan is None and self._plan_scaled is not None:
            self._plan = self._plan_scaled * self._su_col + op_u[:, None]
        if self.fallback == "shift" and self._plan is not None and self._plan_age + 1 < self._N:
            self._plan_age += 1
            return STATUS_FALLBACK, self._plan[:, min(self._plan_age, self._M - 1)].copy()
        self.counts["holds"] += 1
        return STATUS_HOLD, self._u_prev.copy()

    def last_plan(self) -> np.ndarray | None:
        """MV plan (nu, M), absolute, of the last accepted solve (None before the first one).

        Column j is the MV value planned for sample j from that solve; the last column is held
        to the end of the prediction horizon.
        """
        if self._plan_scaled is None:
            return None
        if self._plan is None:
            self._plan = self._plan_scaled * self._su_col + self._op_u[:, None]
        return self._plan.copy()

    def _note_not_following(self, cmd, ua):
        """Readback: an MV that did not move at all although a move was asked for (a stuck or
        saturated valve) is limited at its position, in the direction it failed to go, for the
        next ``_NOT_FOLLOWING_HOLD`` samples; then the plan may try it again (common practice of
        MV readback, no source).  An actuator that moves but slowly is left alone."""
        tol = 1e-6 * np.maximum(1.0, np.abs(ua))
        still = np.abs(ua - self._ua_prev) <= tol
        up = still & (cmd - ua > tol)
        down = still & (ua - cmd > tol)
        if up.any() or down.any():
            self._clamp_hi = np.where(up, ua, self._clamp_hi)
            self._clamp_lo = np.where(down, ua, self._clamp_lo)
            self._clamp_left = np.where(up | down, _NOT_FOLLOWING_HOLD + 1, self._clamp_left)
            self._clamping = bool(self._clamp_left.any())
            self.counts["mv_not_following"] += int(up.sum() + down.sum())

    def _clamped(self, lo, hi):
        """MV limits with the not-following clamps applied (and counted down).

        A clamp only narrows the hard limits, never widens them: a valve read back beyond a hard
        limit clamps the MV at that limit, not at the valve's position."""
        on = self._clamp_left > 0
        hi2 = np.clip(np.where(on, np.fmin(hi, self._clamp_hi), hi), lo, hi)
        lo2 = np.clip(np.where(on, np.fmax(lo, self._clamp_lo), lo), lo, hi)
        lo2 = np.minimum(lo2, hi2)            # a clamp never makes the limits cross
        self._clamp_left = np.maximum(self._clamp_left - 1, 0)
        self._clamping = bool(self._clamp_left.any())
        self._clamp_hi = np.where(self._clamp_left > 0, self._clamp_hi, np.inf)
        self._clamp_lo = np.where(self._clamp_left > 0, self._clamp_lo, -np.inf)
        return lo2, hi2

    def _apply_limits(self, u, lo, hi, rate):
        """The command sent: :func:`~mpcproto.control.limits.project_command` from the previous
        MV (hard limits win over the rate limit)."""
        return project_command(u, self._u_prev, lo, hi, rate, what="PredictiveController")

    def _hold(self, lo, hi, rate):
        self.counts["holds"] += 1
        return self._apply_limits(self._u_prev.copy(), lo, hi, rate)

    def _finish(self, u, status, diag, t_start) -> ControlOutput:
        """Status, the estimator's prediction with the MVs sent, the step's time and counts.
        *u* is the step's own new array (the projection's): kept as the previous MVs, a copy
        sent."""
        # faults the controller saw show in the status of an otherwise accepted step
        # (the fields read directly: the mapping view's get() raises and catches for an unfilled one)
        rej, nf, drop = (diag.rejected_measurements, diag.mvs_not_following,
                         diag.dropped_measurements)
        n_rej = diag.n_rejected_measurements = 0 if rej is ABSENT else len(rej)
        n_nf = diag.n_mvs_not_following = 0 if nf is ABSENT else len(nf)
        n_drop = diag.n_dropped_measurements = 0 if drop is ABSENT else len(drop)
        if status == STATUS_OK and (n_rej or n_drop):
            status = STATUS_MEASUREMENT_REJECTED
        elif status == STATUS_OK and n_nf:
            status = STATUS_MV_NOT_FOLLOWING
        self.estimator_.predict(u, less=self._op_u)
        self._u_prev = u
        diag.step_ms = (time.perf_counter() - t_start) * 1e3
        diag.counts = dict(self.counts)
        return ControlOutput(u=u.copy(), status=status, diagnostics=diag)


class _LimitCache:
    """The step's limits of the last targets seen (:meth:`ControllerRuntime._limits`): the byte
    keys of the targets' arrays, the intersections with the settings (and as lists of floats:
    ``lists`` = the MV limits and rates of the last call, what the projection reads), and
    read-only stand-ins for targets left out (None)."""

    __slots__ = ("resolved", "nu", "ny", "shape_u", "shape_y", "none_lo_u", "none_hi_u",
                 "none_lo_y", "none_hi_y", "none_sp", "mv_key", "mv", "mv_lists", "rate_key",
                 "rate", "rate_list", "max_move_list", "cv_key", "cv", "lists")

    def __init__(self, resolved, nu: int, ny: int):
        self.resolved, self.nu, self.ny = resolved, nu, ny
        self.shape_u, self.shape_y = (nu,), (ny,)
        self.none_lo_u, self.none_hi_u = _read_only(np.full(nu, -np.inf)), _read_only(np.full(nu, np.inf))
        self.none_lo_y, self.none_hi_y = _read_only(np.full(ny, -np.inf)), _read_only(np.full(ny, np.inf))
        self.none_sp = _read_only(np.full(ny, np.nan))
        self.mv_key = self.rate_key = self.cv_key = None
        self.mv = self.rate = self.cv = self.mv_lists = self.rate_list = self.lists = None
        self.max_move_list = np.asarray(resolved.max_move, float).tolist()


def _read_only(a: np.ndarray) -> np.ndarray:
    """*a* made read-only (an array the step hands out again on later samples)."""
    a.flags.writeable = False
    return a
