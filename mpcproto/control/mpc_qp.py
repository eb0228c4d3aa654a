"""The predictive controller's QPs: compiled once from the resolved settings, filled each sample.

:class:`ControllerQP` holds the part of :class:`~mpcproto.control.mpc.PredictiveController` that
builds the estimator, the steady target and the dynamic QP (condensed for DAQP or the sparse cvxpy
statement) from the resolved settings (:func:`~mpcproto.control.mpc_settings.resolve`), and the
per-sample filling and solving of both QPs (``_optimize``) with the what-if :meth:`plan`.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.linalg as sla

from ..exceptions import NotBuiltError
from ._qp import CompiledQP
from .base import Targets
from .condensed import CondensedQP
from .dynamic_qp import (input_layout, noise_scales, state_dynamic_qp, state_scales,
                         target_preferred_weight)
from .estimator import DisturbanceEstimator
from .mpc_results import ABSENT, PlanResult, StepDiagnostics
from .mpc_settings import _err
from .steady_target import SteadyTarget

__all__ = ["ControllerQP"]


class ControllerQP:
    """Build and per-sample solve of the controller's QPs (a part of ``PredictiveController``)."""

    #: take the MV limits as the reachable bounds when the previous MVs were projected inside
    #: them (False: always the general formula; the tests compare the two)
    _reach_shortcut = True

    def _build(self) -> "ControllerQP":
        t_start = time.perf_counter()
        r = self.validate()
        m = self.dmodel
        A, B, C, D = (np.asarray(m.A, float), np.asarray(m.B, float), np.asarray(m.C, float),
                      np.asarray(m.D, float))
        nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
        N, M = r["N"], r["M"]
        # -- scaling: the QPs work in scaled deviations (one MV/CV scale = 1; states scaled by how
        # far the MVs move them within the horizon), so OSQP sees a well-balanced problem
        su, sy = r["mv_scale"], r["cv_scale"]
        sx = state_scales(A, B, C, su, sy, min(N, 50))
        # the estimator's state noise is per state in CV units (see DisturbanceEstimator)
        self.estimator_ = DisturbanceEstimator(
            m, disturbance=r["disturbance"], state_noise=float(self.state_noise),
            disturbance_noise=r["dist_noise"], measurement_noise=r["meas_noise"],
            history=int(self.history), state_scale=noise_scales(C, sy, sx)).build()
        Bw, Cw = self.estimator_.Bw_, self.estimator_.Cw_
        opts = r["solver_options"]
        osqp_opts = dict(opts) if r["solver"] == "osqp" else {}
        Bd, Dd = np.asarray(m.Bd, float), np.asarray(m.Dd, float)
        nd = m.nd
        self.scales_ = {"x": sx, "u": su, "y": sy}
        As = A * (1 / sx)[:, None] * sx[None, :]
        Bs = B * (1 / sx)[:, None] * su[None, :]
        Cs = C * (1 / sy)[:, None] * sx[None, :]
        Ds = D * (1 / sy)[:, None] * su[None, :]
        Bds, Dds = Bd / sx[:, None], Dd / sy[:, None]
        Bws, Cws = Bw / sx[:, None], Cw / sy[:, None]
        wq_s = r["cv_weight"] * sy ** 2            # weights per scaled unit
        wr_s = r["move_weight"] * su ** 2
        wpref_s = r["preferred_weight"] * su ** 2
        wl_s = r["lim_lin"] * sy
        wh_s = r["lim_quad"] * sy ** 2
        self.scaled_ = {"A": As, "B": Bs, "C": Cs, "D": Ds, "Bd": Bds, "Dd": Dds, "Bw": Bws,
                        "Cw": Cws, "cv_weight": wq_s, "move_weight": wr_s, "preferred_weight": wpref_s,
                        "limit_linear": wl_s, "limit_quadratic": wh_s}
        # -- steady target (state-space steady-state form: works for integrating units too)
        if self.steady_target:
            self.target_ = SteadyTarget(
                A, B, C, D, Bd, Dd, Bw, Cw,
                band_weight=r["cv_weight"] + 1e-9 / sy ** 2, limit_linear=r["lim_lin"],
                limit_quadratic=r["lim_quad"],
                preferred_weight=target_preferred_weight(r["preferred_weight"], wq_s, su),
                solver_options=osqp_opts, scales=(sx, su, sy)).build()
        else:
            self.target_ = None
        # -- terminal weight from the discrete Riccati equation of the plant (and delay) states
        Pt = None
        if self.terminal_cost:
            if np.any(r["preferred_weight"] <= 0):
                raise _err("mv.*.preferred_weight", "> 0 for every MV when terminal_cost is true (the "
                           "Riccati terminal weight needs a positive input weight)",
                           list(r["preferred_weight"]))
            Qx = Cs.T @ np.diag(wq_s) @ Cs
            try:
                P = sla.solve_discrete_are(As, Bs, Qx, np.diag(wpref_s))
            except (np.linalg.LinAlgError, ValueError) as exc:
                raise _err("terminal_cost", "false for this model (no stabilizing Riccati solution: "
                           f"{exc})", True) from None
            Pt = P - Qx          # the last stage's own cost is already in the sum over k = 1..N
            Pt = 0.5 * (Pt + Pt.T)
            w_, V_ = np.linalg.eigh(Pt)
            Pt = (V_ * np.clip(w_, 0, None)) @ V_.T
            self.riccati_ = P / sx[:, None] / sx[None, :]          # engineering units
        self.terminal_weight_ = Pt
        A, B, C, D = As, Bs, Cs, Ds
        # -- the dynamic QP: condensed (DAQP) or the sparse cvxpy statement (OSQP / cvxpy)
        preview = bool(self.setpoint_preview)
        self._statement_args = (self.scaled_, (sx, su, sy), N, M, Pt, preview)
        self._qp = None
        layout = input_layout(nx, nu, nd, ny, N, M, Pt is not None, preview=preview)
        off, o = {}, 0
        for k, s_ in layout.items():
            off[k] = slice(o, o + s_)
            o += s_
        self._zsl = off
        self._z = np.zeros(o)
        # reach of the rate limits over the control horizon: +k for u_lo, -k for u_hi
        self._reach = np.array([1.0, -1.0])[:, None, None] * np.arange(1, M + 1)[None, :, None]
        tl, o = {}, 0
        if self.target_ is not None:
            for k, s_ in self.target_.layout_.items():
                tl[k] = slice(o, o + s_)
                o += s_
        self._tsl = tl
        self._tz = np.zeros(o)
        self._input_views()
        self._slim = self._tz_lim = None     # this sample's limits in deviations (kept)
        self._zu_lim = self._u_prev_within = None
        self._plan_idx = np.minimum(np.arange(N), M - 1)
        kind = r["solver"]
        self.solver_ = kind
        self._osqp_opts = osqp_opts
        self.condensed_ = None
        if kind == "daqp" and self.fast_path:
            self.condensed_ = CondensedQP(
                m.A, m.B, m.C, m.D, Bd, Dd, Bw, Cw, N=N, M=M, scales=(sx, su, sy),
                weights=self.scaled_, terminal=Pt, inputs=off, options=opts).build()
        else:
            self._qp = state_dynamic_qp(*self._statement_args)
            if kind == "osqp" and self.fast_path:
                self._qp.setup(osqp_opts)
        self._cvxpy_solver = kind.upper()
        self._cvxpy_opts = dict(opts)
        self._backup = None if self.backup_solver is None else self.backup_solver.upper()
        self._backup_opts = dict(opts) if self.backup_solver == kind else {}
        self._N, self._M = N, M
        self._Bd, self._Dd = Bd, Dd
        self._Bw, self._Cw = Bw, Cw
        self._su, self._sy, self._sx = su, sy, sx
        self._su_col, self._sy_col = su[:, None], sy[:, None]
        self.is_built = True
        self.compile_s_ = time.perf_counter() - t_start
        return self

    @property
    def qp_(self) -> CompiledQP:
        """The dynamic QP stated in cvxpy (sparse form), compiled on first use.

        The OSQP path and the cvxpy paths build it in :meth:`build`; with the condensed DAQP
        path it is compiled only when needed (the backup solver, a comparison), because at long
        horizons its compilation costs seconds and hundreds of MB.
        """
        if self._qp is None:
            self._check_built("qp_")
            self._qp = state_dynamic_qp(*self._statement_args)
        return self._qp

    def _check_built(self, what: str) -> None:
        if not self.is_built:
            raise NotBuiltError(f"PredictiveController.{what}(): the controller is not built; call "
                                f".build() first (after from_settings() or the constructor).")

    @property
    def preview_samples(self) -> int:
        """Rows of ``setpoint_program`` the controller uses (now and the N samples ahead) when
        ``setpoint_preview`` is on and it is built; else 0 (the closed loop passes no program)."""
        return self._N + 1 if self.is_built and self.setpoint_preview else 0

    def _input_views(self) -> None:
        """Views of the blocks of the input vectors ``z`` (dynamic QP) and ``tz`` (steady
        target) written each sample (u_lo, u_hi as (2, M, nu): the F-order of (nu, M))."""
        z, off, tz, tl = self._z, self._zsl, self._tz, self._tsl
        nu = off["u_prev"].stop - off["u_prev"].start
        self._zv = (z[off["x0"]], z[off["u_prev"]], z[off["w"]], z[off["band_lo"]],
                    z[off["band_hi"]], z[off["lim_lo"]], z[off["lim_hi"]],
                    z[off["u_lo"].start:off["u_hi"].stop].reshape(2, -1, nu),
                    z[off["rate"]], z[off["pref"]])
        self._tzv = tuple(tz[tl[k]] for k in ("d", "w", "band_lo", "band_hi", "lim_lo", "lim_hi",
                                              "mv_lo", "mv_hi", "pref")) if tl else None

    def __getstate__(self) -> dict[str, Any]:
        # views of z and tz would pickle as copies of their own: made again on unpickling
        state = dict(self.__dict__)
        state.pop("_zv", None)
        state.pop("_tzv", None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        if "_z" in state:
            self._input_views()

    def _sample_limits(self, mv_lo, mv_hi, cv_lo, cv_hi, sp_) -> "_SampleLimits":
        """The deviations of this sample's limits and setpoints (kept while they stay)."""
        c = self._slim
        key = sp_.tobytes()
        if (c is not None and c.key == key and c.mv_lo is mv_lo and c.mv_hi is mv_hi
                and c.cv_lo is cv_lo and c.cv_hi is cv_hi):
            return c
        c = self._slim = _SampleLimits(mv_lo, mv_hi, cv_lo, cv_hi, sp_, key, self._op_u,
                                       self._op_y)
        return c

    def _optimize(self, x, w, d_now, use, dv_forecast, mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_,
                  u_prev, diag, preview=None):
        """Steady target and dynamic QP for estimate (x, w); returns the dynamic QPResult.
        *preview*: ``(sp_end, departures)`` of :func:`~mpcproto.control.preview.stage_references`."""
        if preview is not None:
            sp_ = preview[0]             # the target for the end of the horizon
        N = self._N
        op_u, op_d = self._op_u, self._op_d
        nd = self._nd
        z, zs = self._z, self._zsl
        # ---- DV trajectory over the horizon (deviation), samples 0..N
        if nd:
            z[zs["d_now"]] = d_now
            if dv_forecast is None or not use.any():
                if self._forecast_in_z:
                    z[zs["dtraj"]] = 0.0
                    self._forecast_in_z = False
                d_end = d_now
            else:
                f = dv_forecast
                F = f[np.minimum(np.arange(N + 1), f.shape[0] - 1)] - op_d
                F = np.where(np.isfinite(F), F, d_now)
                dtraj = (np.where(use, F, 0.0) - d_now).ravel()
                z[zs["dtraj"]] = dtraj
                self._forecast_in_z = True
                d_end = d_now + dtraj[-nd:]
        else:
            d_end = d_now
        # ---- deviations of limits and setpoints: computed when the limits or setpoints change
        # (the limits' arrays are kept by the runtime while the targets stay: compared by
        # identity; the setpoints by their bytes), written into z's and the target's blocks
        lim = self._sample_limits(mv_lo, mv_hi, cv_lo, cv_hi, sp_)
        zx0, zup, zw, zblo, zbhi, zllo, zlhi, zu, zrate, zpref = self._zv
        lo_dev, hi_dev = lim.lo_dev, lim.hi_dev
        zllo[:] = lim.clo
        zlhi[:] = lim.chi
        u_prev_dev = np.subtract(u_prev, op_u, zup)
        t_target = 0.0
        fast = self._fast
        # ---- steady target
        if self.target_ is not None:
            tv = self._tzv
            if nd:
                tv[0][:] = d_end
            tv[1][:] = w
            if self._tz_lim is not lim:       # the blocks of limits, setpoints and preferences
                tv[2][:] = lim.tband_lo
                tv[3][:] = lim.tband_hi
                tv[4][:] = lim.clo
                tv[5][:] = lim.chi
                tv[6][:] = lo_dev
                tv[7][:] = hi_dev
                tv[8][:] = self._pref_dev
                self._tz_lim = lim
            tz = self._tz
            res = self.target_.solve(tz, fast=fast, solver=self._cvxpy_solver,
                                     options=self._cvxpy_opts)
            t_target = res.solve_ms
            if not res.accepted and self.backup_solver is not None and fast:
                res2 = self.target_.solve(tz, fast=False, solver=self._backup,
                                          options=self._backup_opts)
                if res2.accepted:
                    self.counts["backup_solves"] += 1
                    diag.backup_solves = (0 if diag.backup_solves is ABSENT else diag.backup_solves) + 1
                    res = res2
            diag.target_iterations = res.iterations     # 0: the active set was re-used
            if res.accepted:
                vals = res.values
                self._target = (vals["us"], vals["ys"], vals["xs"])
                diag.target_status = "ok"
            else:
                self.counts["target_fallbacks"] += 1
                diag.target_status = res.status
                if self._target is None:     # stay where we are
                    self._target = (np.clip(u_prev_dev, lo_dev, hi_dev),
                                    self.dmodel.C @ x + self._Cw @ w, x.copy())
            us, ys, _xs = self._target
            # a setpoint CV's band is its target value; a zone widened to take the target in
            if lim.all_sp:
                zblo[:] = ys
                zbhi[:] = ys
            else:
                np.fmin(lim.zone_lo, ys, zblo)
                np.copyto(zblo, ys, where=lim.has_sp)
                np.fmax(lim.zone_hi, ys, zbhi)
                np.copyto(zbhi, ys, where=lim.has_sp)
            pref = us
            diag.target_u = us + op_u          # read as a list
            diag.target_y = ys + self._op_y
        else:
            zblo[:] = lim.tband_lo
            zbhi[:] = lim.tband_hi
            pref = self._pref_dev
        # ---- MV limits reachable under the rate limits (keeps the QP feasible when a limit moved
        # past the current MV: the plan then moves towards it as fast as allowed)
        # When the previous MVs are the runtime's own, projected inside these very limits, every
        # reachable bound is the limit itself (u_prev + k rate >= u_prev >= lo under monotone
        # rounding, k rate >= 0): the limits broadcast over the moves, written once
        inside = self._u_prev_within
        if (self._reach_shortcut and u_prev is self._u_prev and inside is not None
                and inside[0] is mv_lo and inside[1] is mv_hi):
            if self._zu_lim is not lim:
                zu[0] = lo_dev
                zu[1] = hi_dev
                self._zu_lim = lim
        else:
            np.multiply(self._reach, rate, zu)   # (2, M, nu): u_prev +- k rate, then the limits
            zu += u_prev_dev
            np.fmin(zu[0], lo_dev, zu[0])
            np.fmax(zu[1], hi_dev, zu[1])
            self._zu_lim = None
        zx0[:] = x
        zw[:] = w
        zrate[:] = rate
        zpref[:] = pref
        if self.terminal_weight_ is not None:
            z[zs["x_term"]] = self._target[2]
        if "ref" in zs:
            z[zs["ref"]] = 0.0 if preview is None else preview[1]
        cond = self.condensed_
        if fast:
            if cond is not None:
                res = cond.solve(z)
                info = cond.last_info_
                diag.exit_flag = info["exit_flag"]
                diag.active_set = info["active_set"]
            else:
                res = self.qp_.solve_inputs(z)
            diag.solver = self.solver_
            if not res.accepted and self.backup_solver is not None:
                # a second opinion before falling back: the interior-point solver via cvxpy
                res2 = self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=self._backup,
                                            options=self._backup_opts)
                diag.first_solver_status = res.status
                if res2.accepted:
                    self.counts["backup_solves"] += 1
                    diag.backup_solves = (0 if diag.backup_solves is ABSENT else diag.backup_solves) + 1
                    res2.solve_ms += res.solve_ms
                    res = res2
        else:
            res = self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=self._cvxpy_solver,
                                       options=self._cvxpy_opts)
            diag.solver = f"cvxpy/{self.solver_}"
        self._last_inputs = z
        diag.target_ms = t_target
        return res

    def plan(self, x: np.ndarray, targets: Targets, *, disturbance: np.ndarray | None = None,
             dv: np.ndarray | None = None, dv_forecast: np.ndarray | None = None,
             u_prev: np.ndarray | None = None,
             setpoint_program: np.ndarray | None = None) -> PlanResult:
        """Solve the control problem for a given state, without touching the estimator.

        A what-if tool (and the hook the tests use to compare with LQR and with cvxpy's own
        solve): nothing of the running controller changes except the solver's warm start.

        Parameters
        ----------
        x : ndarray (nx,)
            Model state in deviation variables (plant states, then delay states).
        targets : Targets
            As in :meth:`step`.
        disturbance : ndarray (ny,) or None
            Disturbance-state values (default zero).
        dv : ndarray (nd,) or None
            DV values (absolute; NaN or None: unknown).
        dv_forecast : ndarray or None
            As in :meth:`step`.
        u_prev : ndarray (nu,) or None
            MVs applied over the last sample (absolute; default: the operating point's).
        setpoint_program : ndarray (n, ny) or None
            As in :meth:`step` (used with ``setpoint_preview`` on).

        Returns
        -------
        PlanResult
            Read as a mapping or by attribute: ``u`` (first move, absolute, after the exact limit projection), ``u_plan`` (nu, N)
            absolute, ``y_pred`` (ny, N) absolute predicted CVs at samples 1..N, ``x_pred``
            (nx, N) deviation states, ``slack`` (ny, N), ``status`` (solver word), ``accepted``,
            ``objective``, ``diagnostics``.
        """
        self._check_built("plan")
        if self._op is None:
            self.reset()
        m, r = self.dmodel, self._resolved
        x = self._vec(x, m.nx, "x", np.nan)
        w = np.zeros(m.ny) if disturbance is None else self._vec(disturbance, m.ny, "disturbance", np.nan)
        dvv = np.full(m.nd, np.nan) if dv is None else self._vec(dv, m.nd, "dv", np.nan)
        use = r["feedforward"] & np.isfinite(dvv)
        d_now = np.where(use, dvv - self._op_d, 0.0)
        up = self._op_u.copy() if u_prev is None else self._vec(u_prev, m.nu, "u_prev", np.nan)
        lims = self._limits(targets)
        dv_forecast = self._forecast(dv_forecast)
        preview = self._preview(setpoint_program, lims[5])
        diag = StepDiagnostics()
        res = self._optimize(x, w, d_now, use, dv_forecast, *lims, up, diag, preview=preview)
        if res.values and "x" not in res.values:        # condensed: states on demand
            z = self._last_inputs
            res.values["x"] = self.condensed_.states(z, res.values["u"])
            res.objective = self.condensed_.objective(z, res.values["u"])
        out = PlanResult(status=res.status, accepted=res.accepted, objective=res.objective,
                         diagnostics=diag)
        if res.values:
            Uplan = res.values["u"][:, self._plan_idx] * self._su_col + self._op_u[:, None]
            X = res.values["x"] * self._sx[:, None]
            Y = m.C @ X + self._Cw @ w[:, None] + self._op_y[:, None]
            if m.nd:
                dtraj = (self._last_inputs[self._zsl["dtraj"]].reshape(m.nd, -1, order="F")
                         + self._last_inputs[self._zsl["d_now"]][:, None])
                Y = Y + self._Dd @ dtraj[:, 1:]
            if np.any(m.D != 0):
                Y = Y + m.D @ (Uplan[:, np.minimum(np.arange(1, self._N + 1), self._N - 1)]
                               - self._op_u[:, None])
            mv_lo, mv_hi, rate = lims[0], lims[1], lims[2]
            saved = self._u_prev
            self._u_prev = up
            try:
                u0 = self._apply_limits(Uplan[:, 0], mv_lo, mv_hi, rate)
            finally:
                self._u_prev = saved
            out.update(u=u0, u_plan=Uplan, y_pred=Y, x_pred=X,
                       slack=res.values["slack"] * self._sy_col)
        return out


class _SampleLimits:
    """A sample's limits and setpoints in deviations, and what the QPs' blocks take from them:
    the MV limits, the CV limits, the setpoints, the zones (the limits where they do not cross),
    the target's bands (the setpoint, else the zone)."""

    __slots__ = ("mv_lo", "mv_hi", "cv_lo", "cv_hi", "key", "lo_dev", "hi_dev", "clo", "chi",
                 "has_sp", "all_sp", "zone_lo", "zone_hi", "tband_lo", "tband_hi")

    def __init__(self, mv_lo, mv_hi, cv_lo, cv_hi, sp_, key, op_u, op_y):
        self.mv_lo, self.mv_hi, self.cv_lo, self.cv_hi, self.key = mv_lo, mv_hi, cv_lo, cv_hi, key
        self.lo_dev, self.hi_dev = mv_lo - op_u, mv_hi - op_u
        clo, chi = cv_lo - op_y, cv_hi - op_y
        spd = sp_ - op_y
        has_sp = np.isfinite(spd)
        consistent = clo <= chi
        self.clo, self.chi, self.has_sp = clo, chi, has_sp
        self.all_sp = bool(has_sp.all())
        self.zone_lo = np.where(consistent, clo, -np.inf)
        self.zone_hi = np.where(consistent, chi, np.inf)
        self.tband_lo = np.where(has_sp, spd, self.zone_lo)
        self.tband_hi = np.where(has_sp, spd, self.zone_hi)
