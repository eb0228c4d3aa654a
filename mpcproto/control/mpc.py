"""Constrained model-predictive control on a discrete linear model, compiled once in cvxpy.

:class:`PredictiveController` implements :class:`mpcproto.control.base.Controller`.  Each sample it

1. corrects its state and disturbance estimates with the measurements at the times they were taken
   (:class:`~mpcproto.control.estimator.DisturbanceEstimator`, offset-free);
2. computes where MVs and CVs should settle (:class:`~mpcproto.control.steady_target.SteadyTarget`,
   optional);
3. solves the dynamic QP below and applies the first move; a solve that is not optimal to
   tolerance is never used: the controller applies the previous plan shifted by one sample (or
   holds the MVs), flags and counts it.

The dynamic QP (deviation variables around the model's operating point; k = 1..N prediction,
j = 0..M-1 moves, the MVs are held after the control horizon M)::

    minimize   sum_k  q_i e_ik^2                         CV outside its band (setpoint or zone)
             + sum_j  r_m du_mj^2                        move suppression
             + sum_k  s_m (u_mk - pref_m)^2              MV preferred values (steady-target MVs)
             + sum_k  l_i sl_ik + h_i sl_ik^2            soft CV limits (exact penalty)
             + (x_N - x_s)' P_t (x_N - x_s)              optional terminal cost (Riccati)
    subject to x_{k+1} = A x_k + B u_k + W_k             W: measured DVs + disturbance estimates
               y_k = C x_k + D u_k + V_k
               band_lo <= y - e <= band_hi
               lim_lo <= y + sl,  y - sl <= lim_hi,  sl >= 0
               u_lo <= u <= u_hi,  r_lo <= du <= r_hi    hard MV limits and rate limits

This statement is written once in cvxpy (:mod:`mpcproto.control.dynamic_qp`); every per-sample
datum is a cvxpy Parameter entering only the linear cost and the constraint bounds (DPP).  By
default (``solver="auto"``) the same QP is solved in condensed form
(:mod:`mpcproto.control.condensed`: states eliminated, the blocked MV values the only variables, soft limits and zones as soft rows)
by DAQP's dual active set, exactly; for very large condensed QPs the sparse statement is driven
through OSQP from its compiled parameter->data map; ``fast_path=False`` solves the statement
through ``cvxpy.Problem.solve`` (the reference path).  Each step records ``solver``,
``iterations``, ``solver_status`` and, with DAQP, ``exit_flag`` and ``active_set`` (the size of
the final active set) in its diagnostics.

Both QPs are written in scaled deviations (one ``scale`` of each MV and CV is one unit; each
state is scaled by how far one scaled MV step moves it within the horizon), which keeps OSQP's
iteration counts low on units whose variables differ by orders of magnitude and the condensed
Hessian well balanced; inputs, outputs and diagnostics stay in engineering units.

Solve outcomes: a solve that is not optimal is retried once with ``backup_solver`` (Clarabel via
cvxpy), then the previous plan is applied shifted by one sample (``fallback="shift"``) or the MVs
are held; the applied MVs are always projected exactly onto the hard limits and rate limits.

Caution: this is a simulation prototype.  A controller on a real plant needs independent safety
systems, management of change and the judgement of licensed engineers under local codes.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from typing import Any

import numpy as np
import scipy.linalg as sla

from ..exceptions import NotBuiltError, SettingsError
from ..model import suggest
from ._qp import CompiledQP
from .base import (STATUS_FAILED, STATUS_FALLBACK, STATUS_HOLD, STATUS_MEASUREMENT_REJECTED,
                   STATUS_MV_NOT_FOLLOWING, STATUS_OK, ControlOutput, Measurement, Targets)
from .condensed import CondensedQP
from .dynamic_qp import (input_layout, noise_scales, state_dynamic_qp, state_scales,
                         target_preferred_weight)
from .estimator import DisturbanceEstimator
from .limits import limit_activity, project_command
from .mpc_settings import CV_KEYS, DV_KEYS, MV_KEYS, SETTINGS_KEYS, _err, resolve  # noqa: F401
from .steady_target import SteadyTarget

__all__ = ["PredictiveController", "SETTINGS_KEYS", "CV_KEYS", "MV_KEYS", "DV_KEYS"]

#: samples an MV that did not follow its command stays limited at its position (readback)
_NOT_FOLLOWING_HOLD = 5

class PredictiveController:
    """Constrained, offset-free MPC on a :class:`~mpcproto.linear.DiscreteLinearModel`.

    Construct (stores only), then :meth:`build` (validates and compiles), then :meth:`reset` at an
    operating point and :meth:`step` once per sample.  :meth:`from_settings` builds the keyword
    arguments from a plain dict (scenario files) and validates them at once.

    Parameters
    ----------
    dmodel : DiscreteLinearModel
        Controller model: deviation variables around ``dmodel.op``, sample time ``dmodel.Ts``.
    horizon : int
        Prediction horizon N in samples (>= 1).
    control_horizon : int or None
        Number of future moves M (1 <= M <= N); the MVs are held after it (move blocking).
        None: M = N.
    cv : mapping of CV name to dict
        Per-CV settings (every key optional): ``weight`` (>= 0, weight on the error outside the
        setpoint band, per squared ``scale``), ``scale`` (> 0, engineering units of one "unit of
        error"; default: 1/20 of the span of ``low``/``high`` when both are given, else of the
        CV's physical bounds, else of ``max(|operating value|, 1)``, rounded to 1-2-5 --
        :func:`~mpcproto.control.mpc_settings.default_scale`), ``low``/``high`` (static soft limits, engineering units; the run-time
        :class:`Targets` limits are intersected with them), ``limit_penalty`` (>= 0, linear slack
        penalty per ``scale``: exact penalty when large enough), ``limit_penalty_quadratic``
        (>= 0), ``priority`` (int >= 1, 1 = most important: its weights are multiplied by
        ``priority_ratio`` per class above the least important), ``disturbance`` ("output" or
        "input" disturbance model; "auto", the default, takes "input" for an integrating CV and
        "output" otherwise), ``measurement_noise`` (> 0, variance), ``disturbance_noise``
        (> 0, variance of the per-sample disturbance change).
    mv : mapping of MV name to dict
        Per-MV settings: ``move_weight`` (>= 0, per squared ``scale``), ``preferred_weight`` (>= 0,
        weight pulling the MV to its preferred value), ``preferred_value`` (engineering units; default:
        the operating point; with the steady target on, the dynamic problem rests at the target
        and ``preferred_value`` only breaks ties in the target), ``low``/``high`` (hard limits,
        intersected with the run-time ones), ``max_move`` (> 0, largest move per sample),
        ``scale`` (> 0; default as for a CV: 1/20 of the ``low``/``high`` span, else of the
        physical bounds, else of ``max(|operating value|, 1)``).
    dv : mapping of DV name to dict
        Per-DV settings: ``feedforward`` (bool, default True: a measured DV's value and forecast
        enter the prediction; False: treated as unknown).
    terminal_cost : bool
        Add the discrete-Riccati terminal weight on the distance of the last predicted state
        from the steady target (needs ``steady_target``).
    steady_target : bool
        Solve the steady-state target QP each sample and track its result.
    solver : {"auto", "daqp", "osqp", "clarabel"}
        Dynamic-QP solver.  ``"daqp"``: the condensed QP (states eliminated, decision = the
        blocked MV values, soft CV limits and zones as DAQP soft rows; see
        :mod:`mpcproto.control.condensed`) solved by DAQP's dual active set, warm-started, exact
        to round-off.  ``"osqp"``: the sparse cvxpy statement driven through OSQP (tolerance
        1e-5 by default: the applied move may differ from the optimum by ~1e-3 of the MV scale).
        ``"clarabel"``: the statement through ``cvxpy.Problem.solve``.  ``"auto"`` (default):
        ``"daqp"`` unless the condensed QP would have more than ``CONDENSED_MAX_VARIABLES``
        variables or a prediction matrix of more than ``CONDENSED_MAX_ENTRIES`` entries, then
        ``"osqp"``.  The resolved choice is ``solver_``.
    fast_path : bool
        True (default): the direct path of the solver (the condensed QP for DAQP, OSQP driven
        from the compiled parameter map).  False: the cvxpy statement solved through
        ``cvxpy.Problem.solve`` with the chosen solver (the reference path).
    solver_options : mapping
        Settings of the chosen solver under its own names (DAQP: ``primal_tol`` (default
        1e-10), ``iter_limit``, ``time_limit``...; OSQP: ``eps_abs``, ``eps_rel``, ``max_iter``,
        ``polishing``, ``adaptive_rho``...; Clarabel's own names with Clarabel).
    state_noise : float
        Estimator process noise on the plant states (>= 0), per squared state unit where one
        unit of a state a CV reads directly moves that CV by one CV ``scale`` (a mass fraction
        read as wt% thus gets 1e-4 of a level's noise; states mixed into the CVs keep their
        engineering unit); keep it well below ``disturbance_noise`` so that lasting
        errors go to the disturbance estimates (integral action).
    history : int
        Samples of estimator history for late measurements (>= 1).
    priority_ratio : float
        Weight factor between neighbouring priority classes (> 1).
    fallback : {"shift", "hold"}
        What a failed solve applies: the previous plan shifted one sample, or the previous MVs.
    backup_solver : {"clarabel", "osqp", "daqp", "none"} or None
        With the fast path: when the solver does not reach an optimal solution (DAQP: an exit
        flag other than 1 or 2), solve the cvxpy statement once more with this solver through
        cvxpy before falling back (the first such call compiles the statement -- on the DAQP path
        seconds at long horizons -- and canonicalizes for that solver).  None or "none": fall
        back at once.

    Defaults of every key are in the module constants ``SETTINGS_KEYS``, ``CV_KEYS``,
    ``MV_KEYS`` and ``DV_KEYS``.

    Attributes
    ----------
    qp_ : CompiledQP
        The dynamic problem stated in cvxpy (``qp_.problem`` is the cvxpy Problem); with the
        condensed DAQP path compiled on first use.
    condensed_ : CondensedQP or None
        After :meth:`build` with the DAQP fast path: the condensed QP.
    solver_ : str
        The resolved solver ("daqp", "osqp" or "clarabel").
    estimator_ : DisturbanceEstimator
    target_ : SteadyTarget or None
    counts : dict
        Running totals since :meth:`reset`: steps, fallbacks, holds, inaccurate, failed solves,
        target fallbacks, rejected measurements, late measurements used, samples whose MV
        readback differed from the command (``readback_differs``), MVs found not following
        their command (``mv_not_following``; limited at their position for 5 samples).
    """

    name = "mpc"

    def __init__(self, dmodel, *, horizon: int = 30, control_horizon: int | None = None,
                 cv: Mapping[str, Mapping[str, Any]] | None = None,
                 mv: Mapping[str, Mapping[str, Any]] | None = None,
                 dv: Mapping[str, Mapping[str, Any]] | None = None,
                 terminal_cost: bool = False, steady_target: bool = True, solver: str = "auto",
                 fast_path: bool = True, solver_options: Mapping[str, Any] | None = None,
                 state_noise: float = 1e-4, history: int = 60, priority_ratio: float = 10.0,
                 fallback: str = "shift", backup_solver: str | None = "clarabel"):
        self.dmodel = dmodel
        self.horizon = horizon
        self.control_horizon = control_horizon
        self.cv = cv
        self.mv = mv
        self.dv = dv
        self.terminal_cost = terminal_cost
        self.steady_target = steady_target
        self.solver = solver
        self.fast_path = fast_path
        self.solver_options = solver_options
        self.state_noise = state_noise
        self.history = history
        self.priority_ratio = priority_ratio
        self.fallback = fallback
        self.backup_solver = backup_solver
        self.is_built = False
        self._op = None

    # ================================================================== settings
    @classmethod
    def from_settings(cls, dmodel, settings: Mapping[str, Any]) -> "PredictiveController":
        """Controller from a plain dict of settings (keys: see the class docstring).

        Unknown keys and bad values raise :class:`~mpcproto.exceptions.SettingsError` naming the
        key.  The result is validated but not built: call :meth:`build`.
        """
        if not isinstance(settings, Mapping):
            raise SettingsError(f"PredictiveController.from_settings(): settings must be a mapping; "
                                f"got {type(settings).__name__}.")
        for k in settings:
            if k not in SETTINGS_KEYS:
                known = sorted(SETTINGS_KEYS)
                raise SettingsError(owner="PredictiveController", key=str(k),
                                    expected=f"a known setting ({', '.join(known)})",
                                    found=f"the unknown setting '{k}'{suggest(k, known)}")
        obj = cls(dmodel, **dict(settings))
        obj.validate()
        return obj

    def validate(self) -> dict[str, Any]:
        """Check every setting against the model; return the resolved per-variable arrays
        (see :func:`mpcproto.control.mpc_settings.resolve`).

        Raises
        ------
        SettingsError
            Naming the setting, what was expected and what was found.
        """
        self._resolved = resolve(self)
        return self._resolved

    # ================================================================== build
    def build(self) -> "PredictiveController":
        """Validate the settings, build the estimator and steady target, compile the dynamic QP.

        Returns the controller itself.  Compiled artefacts: ``qp_``, ``target_``,
        ``estimator_``, ``scales_``, ``scaled_``, ``terminal_weight_`` and ``compile_s_``.
        """
        import gc

        was_enabled = gc.isenabled()
        gc.disable()             # compilation makes many short-lived objects: collect once after
        try:
            return self._build()
        finally:
            if was_enabled:
                gc.enable()

    def _build(self) -> "PredictiveController":
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
        self._statement_args = (self.scaled_, (sx, su, sy), N, M, Pt)
        self._qp = None
        layout = input_layout(nx, nu, nd, ny, N, M, Pt is not None)
        off, o = {}, 0
        for k, s_ in layout.items():
            off[k] = slice(o, o + s_)
            o += s_
        self._zsl = off
        self._z = np.zeros(o)
        tl, o = {}, 0
        if self.target_ is not None:
            for k, s_ in self.target_.layout_.items():
                tl[k] = slice(o, o + s_)
                o += s_
        self._tsl = tl
        self._tz = np.zeros(o)
        self._steps = np.arange(1, M + 1)[None, :].astype(float)
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

    # ================================================================== running
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
        self._op = op
        self._op_u = np.asarray(m.op.u, float)
        self._op_d = np.asarray(m.op.d, float)
        self._op_y = np.asarray(m.op.y, float)
        r = self._resolved
        self._pref_dev = r["preferred_value"] - self._op_u
        self._slack_tol = 1e-4 * r["cv_scale"]
        self._slack_tol_list = self._slack_tol.tolist()
        self._mv_names = list(m.mv_names)
        self._fast = self.fast_path and self.solver_ in ("osqp", "daqp")
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
                raise SettingsError(f"PredictiveController.step(): {what} must have {n} entries "
                                    f"(model order); got shape {np.shape(v)}.")
        return a

    def _forecast(self, dv_forecast):
        """The DV forecast as an (n, nd) array, or None; checked before anything changes."""
        if dv_forecast is None:
            return None
        nd = self.dmodel.nd
        f = np.asarray(dv_forecast, float)
        if f.ndim == 1:
            f = f[None, :]
        if f.ndim != 2 or f.shape[1] != nd or f.shape[0] < 1:
            raise SettingsError(f"PredictiveController: dv_forecast must have shape (n, {nd}) "
                                f"(rows: samples from now, columns: DVs in model order); got "
                                f"{np.shape(dv_forecast)}.")
        return f

    def _limits(self, targets: Targets):
        """Hard MV limits and rates (absolute), CV soft limits and setpoints for this sample."""
        r = self._resolved
        m = self.dmodel
        nu, ny = m.nu, m.ny
        if targets is None:
            raise SettingsError("PredictiveController.step(): targets must be a Targets object; got None.")
        mv_lo = np.maximum(self._vec(targets.mv_low, nu, "targets.mv_low", -np.inf), r["mv_low"])
        mv_hi = np.minimum(self._vec(targets.mv_high, nu, "targets.mv_high", np.inf), r["mv_high"])
        if np.any(mv_lo > mv_hi):
            j = int(np.flatnonzero(mv_lo > mv_hi)[0])
            raise SettingsError(f"PredictiveController.step(): MV '{m.mv_names[j]}' has its low "
                                f"limit {mv_lo[j]:g} above its high limit {mv_hi[j]:g} (targets "
                                f"intersected with the settings).")
        rate = r["max_move"]
        if targets.mv_rate is not None:
            tr = self._vec(targets.mv_rate, nu, "targets.mv_rate", np.inf)
            if np.any(tr <= 0):
                j = int(np.flatnonzero(tr <= 0)[0])
                raise SettingsError(f"PredictiveController.step(): targets.mv_rate for MV "
                                    f"'{m.mv_names[j]}' must be > 0; got {tr[j]!r}.")
            rate = np.fmin(tr, rate)
        cv_lo = np.fmax(self._vec(targets.cv_low, ny, "targets.cv_low", -np.inf), r["cv_low"])
        cv_hi = np.fmin(self._vec(targets.cv_high, ny, "targets.cv_high", np.inf), r["cv_high"])
        sp_ = self._vec(targets.setpoint, ny, "targets.setpoint", np.nan)
        return mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None) -> ControlOutput:
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
        m, r = self.dmodel, self._resolved
        N = self._N
        op_u, op_d, op_y = self._op_u, self._op_d, self._op_y
        nu, ny, nd = m.nu, m.ny, m.nd
        names = m.cv_names
        diag: dict[str, Any] = {}
        # ---- inputs checked before anything changes state
        mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_ = self._limits(targets)
        dv_forecast = self._forecast(dv_forecast)
        if u_applied is not None:
            ua = self._vec(u_applied, nu, "u_applied", np.nan)
            known = np.isfinite(ua)
            if known.any():
                ua = np.where(known, ua, self._u_prev)
                if not np.array_equal(ua, self._u_prev):
                    if self.counts["steps"] > 0:      # the estimator has predicted with u_prev
                        self.estimator_.revise_input(ua - op_u)
                        self._note_not_following(self._u_prev, ua)
                    self._u_prev = ua
                    self.counts["readback_differs"] += 1
                self._ua_prev = ua.copy()
        if self._clamp_left.any():
            mv_lo, mv_hi = self._clamped(mv_lo, mv_hi)
            diag["mvs_not_following"] = [self._mv_names[j] for j in np.flatnonzero(self._clamp_left)]
        # ---- measured DVs (deviation); unknown / not fed forward -> 0
        dv = np.full(nd, np.nan) if dv is None else self._vec(dv, nd, "dv", np.nan)
        use = r["feedforward"] & np.isfinite(dv)
        d_now = np.where(use, dv - op_d, 0.0)
        # ---- estimator
        y = self._vec(meas.y, ny, "meas.y", np.nan)
        taken = self._vec(meas.taken_at, ny, "meas.taken_at", np.nan)
        fresh = np.asarray(meas.fresh, bool)
        if fresh.shape != (ny,):
            raise SettingsError(f"PredictiveController.step(): meas.fresh must have {ny} entries "
                                f"(model order); got shape {fresh.shape}.")
        info = self.estimator_.update(t, y - op_y, taken, fresh, d_now)
        if info["rejected"]:
            self.counts["rejected_measurements"] += len(info["rejected"])
        if info["late"]:
            self.counts["late_measurements"] += len(info["late"])
        diag["rejected_measurements"] = [names[i] for i in info["rejected"]]
        diag["late_measurements"] = [names[i] for i in info["late"]]
        # readings older than the estimator's history (one taken before the run started, the
        # steady state an analyzer reports first, is no loss)
        diag["dropped_measurements"] = [names[i] for i in info["too_old"]
                                        if self.estimator_.sample_index(taken[i]) >= 0]
        diag["backup_solves"] = 0
        x = self.estimator_.state
        w = self.estimator_.disturbance_estimate
        self.counts["steps"] += 1
        if not (np.isfinite(x).all() and np.isfinite(w).all()):
            u = self._hold(mv_lo, mv_hi, rate)
            self.counts["failed_solves"] += 1
            diag.update(solver_status="estimate_not_finite", fallback=True, solve_ms=0.0,
                        target_ms=0.0, slack_max=float("nan"), active_mv_limits=0, iterations=None)
            self.estimator_.reset(None, t)
            return self._finish(u, STATUS_FAILED, diag, t_start)
        res = self._optimize(x, w, d_now, use, dv_forecast, mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_,
                             self._u_prev, diag)
        diag["solve_ms"] = res.solve_ms
        diag["solver_status"] = res.status
        diag["iterations"] = res.iterations
        if res.accepted:
            Us = res.values["u"]
            u = Us[:, 0] * self._su + op_u
            self._plan_scaled = Us                  # (nu, M) scaled; unscaled on demand
            self._plan = None
            self._plan_age = 0
            smax_cv = (res.values["slack"].max(axis=1) * self._sy).tolist()
            tol = self._slack_tol_list
            relaxed = [names[i] for i in range(ny) if smax_cv[i] > tol[i]]
            diag["fallback"] = False
            diag["slack_max"] = max(max(smax_cv), 0.0) if ny else 0.0
            diag["cv_limits_relaxed"] = bool(relaxed)
            diag["relaxed_cvs"] = relaxed
            status = STATUS_OK
        else:
            if res.status == "optimal_inaccurate":
                self.counts["inaccurate"] += 1
            else:
                self.counts["failed_solves"] += 1
            self.counts["fallbacks"] += 1
            diag["fallback"] = True
            diag["slack_max"] = float("nan")
            diag["cv_limits_relaxed"] = None
            diag["relaxed_cvs"] = []
            if self._plan is None and self._plan_scaled is not None:
                self._plan = self._plan_scaled * self._su_col + op_u[:, None]
            if self.fallback == "shift" and self._plan is not None and self._plan_age + 1 < N:
                self._plan_age += 1
                u = self._plan[:, min(self._plan_age, self._M - 1)].copy()
                status = STATUS_FALLBACK
            else:
                u = self._u_prev.copy()
                status = STATUS_HOLD
                self.counts["holds"] += 1
        # ---- exact limits on what is applied (solver tolerance, a stale plan, a hold or a limit
        # that stepped past the MV must not break them): the one projection, hard limits win
        asked = u
        u = self._apply_limits(asked, mv_lo, mv_hi, rate)
        at_limit, at_rate, over_rate = limit_activity(u, self._u_prev, mv_lo, mv_hi, rate)
        diag["clipped"] = float(np.max(np.abs(u - asked), initial=0.0))
        diag["active_mv_limits"] = int(at_limit.sum())
        diag["active_mv_limit_names"] = [self._mv_names[j] for j in np.flatnonzero(at_limit)]
        diag["active_rate_limits"] = int(at_rate.sum())
        diag["limits_over_rate"] = int(over_rate.sum())
        return self._finish(u, status, diag, t_start)

    def _optimize(self, x, w, d_now, use, dv_forecast, mv_lo, mv_hi, rate, cv_lo, cv_hi, sp_,
                  u_prev, diag):
        """Steady target and dynamic QP for estimate (x, w); returns the dynamic QPResult."""
        m = self.dmodel
        N = self._N
        op_u, op_d, op_y = self._op_u, self._op_d, self._op_y
        nd = m.nd
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
        # ---- deviations of limits and setpoints
        lo_dev, hi_dev = mv_lo - op_u, mv_hi - op_u
        clo, chi = cv_lo - op_y, cv_hi - op_y
        spd = sp_ - op_y
        has_sp = np.isfinite(spd)
        consistent = clo <= chi
        zone_lo = np.where(consistent, clo, -np.inf)
        zone_hi = np.where(consistent, chi, np.inf)
        u_prev_dev = u_prev - op_u
        t_target = 0.0
        fast = self._fast
        # ---- steady target
        if self.target_ is not None:
            tz, ts = self._tz, self._tsl
            if nd:
                tz[ts["d"]] = d_end
            tz[ts["w"]] = w
            tz[ts["band_lo"]] = np.where(has_sp, spd, zone_lo)
            tz[ts["band_hi"]] = np.where(has_sp, spd, zone_hi)
            tz[ts["lim_lo"]] = clo
            tz[ts["lim_hi"]] = chi
            tz[ts["mv_lo"]] = lo_dev
            tz[ts["mv_hi"]] = hi_dev
            tz[ts["pref"]] = self._pref_dev
            res = self.target_.solve(tz, fast=fast, solver=self._cvxpy_solver,
                                     options=self._cvxpy_opts)
            t_target = res.solve_ms
            if not res.accepted and self.backup_solver is not None and fast:
                res2 = self.target_.solve(tz, fast=False, solver=self._backup,
                                          options=self._backup_opts)
                if res2.accepted:
                    self.counts["backup_solves"] += 1
                    diag["backup_solves"] = diag.get("backup_solves", 0) + 1
                    res = res2
            diag["target_iterations"] = res.iterations     # 0: the active set was re-used
            if res.accepted:
                self._target = (res.values["us"], res.values["ys"], res.values["xs"])
                diag["target_status"] = "ok"
            else:
                self.counts["target_fallbacks"] += 1
                diag["target_status"] = res.status
                if self._target is None:     # stay where we are
                    self._target = (np.clip(u_prev_dev, lo_dev, hi_dev),
                                    m.C @ x + self._Cw @ w, x.copy())
            us, ys, _xs = self._target
            band_lo = np.where(has_sp, ys, np.fmin(zone_lo, ys))
            band_hi = np.where(has_sp, ys, np.fmax(zone_hi, ys))
            pref = us
            diag["target_u"] = (us + op_u).tolist()
            diag["target_y"] = (ys + op_y).tolist()
        else:
            band_lo = np.where(has_sp, spd, zone_lo)
            band_hi = np.where(has_sp, spd, zone_hi)
            pref = self._pref_dev
        # ---- MV limits reachable under the rate limits (keeps the QP feasible when a limit moved
        # past the current MV: the plan then moves towards it as fast as allowed)
        reach = self._steps * rate[:, None]
        ulo = np.fmin(lo_dev[:, None], u_prev_dev[:, None] + reach)
        uhi = np.fmax(hi_dev[:, None], u_prev_dev[:, None] - reach)
        z[zs["x0"]] = x
        z[zs["u_prev"]] = u_prev_dev
        z[zs["w"]] = w
        z[zs["band_lo"]] = band_lo
        z[zs["band_hi"]] = band_hi
        z[zs["lim_lo"]] = clo
        z[zs["lim_hi"]] = chi
        z[zs["u_lo"]] = ulo.ravel(order="F")
        z[zs["u_hi"]] = uhi.ravel(order="F")
        z[zs["rate"]] = rate
        z[zs["pref"]] = pref
        if self.terminal_weight_ is not None:
            z[zs["x_term"]] = self._target[2]
        cond = self.condensed_
        if fast:
            if cond is not None:
                res = cond.solve(z)
                info = cond.last_info_
                diag["exit_flag"] = info["exit_flag"]
                diag["active_set"] = info["active_set"]
            else:
                res = self.qp_.solve_inputs(z)
            diag["solver"] = self.solver_
            if not res.accepted and self.backup_solver is not None:
                # a second opinion before falling back: the interior-point solver via cvxpy
                res2 = self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=self._backup,
                                            options=self._backup_opts)
                diag["first_solver_status"] = res.status
                if res2.accepted:
                    self.counts["backup_solves"] += 1
                    diag["backup_solves"] = diag.get("backup_solves", 0) + 1
                    res2.solve_ms += res.solve_ms
                    res = res2
        else:
            res = self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=self._cvxpy_solver,
                                       options=self._cvxpy_opts)
            diag["solver"] = f"cvxpy/{self.solver_}"
        self._last_inputs = z
        diag["target_ms"] = t_target
        return res

    def plan(self, x: np.ndarray, targets: Targets, *, disturbance: np.ndarray | None = None,
             dv: np.ndarray | None = None, dv_forecast: np.ndarray | None = None,
             u_prev: np.ndarray | None = None) -> dict[str, Any]:
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

        Returns
        -------
        dict
            ``u`` (first move, absolute, after the exact limit projection), ``u_plan`` (nu, N)
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
        diag: dict[str, Any] = {}
        res = self._optimize(x, w, d_now, use, dv_forecast, *lims, up, diag)
        if res.values and "x" not in res.values:        # condensed: states on demand
            z = self._last_inputs
            res.values["x"] = self.condensed_.states(z, res.values["u"])
            res.objective = self.condensed_.objective(z, res.values["u"])
        out: dict[str, Any] = {"status": res.status, "accepted": res.accepted,
                               "objective": res.objective, "diagnostics": diag}
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
        # faults the controller saw show in the status of an otherwise accepted step
        diag["n_rejected_measurements"] = len(diag.get("rejected_measurements", ()))
        diag["n_mvs_not_following"] = len(diag.get("mvs_not_following", ()))
        diag["n_dropped_measurements"] = len(diag.get("dropped_measurements", ()))
        if status == STATUS_OK and (diag["n_rejected_measurements"]
                                    or diag["n_dropped_measurements"]):
            status = STATUS_MEASUREMENT_REJECTED
        elif status == STATUS_OK and diag["n_mvs_not_following"]:
            status = STATUS_MV_NOT_FOLLOWING
        self.estimator_.predict(u - self._op_u)
        self._u_prev = np.asarray(u, float).copy()
        diag["step_ms"] = (time.perf_counter() - t_start) * 1e3
        diag["counts"] = dict(self.counts)
        return ControlOutput(u=np.asarray(u, float).copy(), status=status, diagnostics=diag)

    @classmethod
    def from_bundle(cls, path) -> "PredictiveController":
        """The controller of a bundle written by ``mpcproto export`` (built), from the bundle alone:
        its discrete model, names, operating point and settings (see ``docs/export-bundle.md``)."""
        from .bundle import controller_from_bundle

        return controller_from_bundle(cls, path)
