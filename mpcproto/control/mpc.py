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

Where the parts live: the settings' keys, defaults and checks in :mod:`~mpcproto.control.mpc_settings`
(``resolve`` -> a frozen :class:`~mpcproto.control.mpc_settings.ResolvedSettings`); the build of the
estimator, the steady target and the dynamic QP, the per-sample filling and solving of both QPs and
:meth:`~PredictiveController.plan` in :mod:`~mpcproto.control.mpc_qp`; ``reset``, ``step``, the
limits and the readback in :mod:`~mpcproto.control.mpc_runtime`; the step's
:class:`~mpcproto.control.mpc_results.StepDiagnostics` and the plan's
:class:`~mpcproto.control.mpc_results.PlanResult` (dataclasses read as mappings) in
:mod:`~mpcproto.control.mpc_results`.

Caution: this is a simulation prototype.  A controller on a real plant needs independent safety
systems, management of change and the judgement of licensed engineers under local codes.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..exceptions import SettingsError
from .estimator import OWNER as ESTIMATOR
from ..model import suggest
from .mpc_qp import ControllerQP
from .mpc_results import PlanResult, StepDiagnostics
from .mpc_runtime import ControllerRuntime
from .mpc_settings import (CV_KEYS, DV_KEYS, MV_KEYS, SETTINGS_KEYS, ResolvedSettings,
                           resolve)

__all__ = ["PredictiveController", "SETTINGS_KEYS", "CV_KEYS", "MV_KEYS", "DV_KEYS",
           "ResolvedSettings", "StepDiagnostics", "PlanResult"]


class PredictiveController(ControllerQP, ControllerRuntime):
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
        Per-MV settings: ``move_weight`` (>= 0, per squared ``scale``; default ``0.1 (horizon/40)^2``,
        the same design for the same horizon in time at any sample time --
        :func:`~mpcproto.control.mpc_settings.default_move_weight`), ``preferred_weight`` (>= 0,
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
    setpoint_preview : bool
        False (default): the setpoint now is held over the horizon.  True: the setpoints known in
        advance over the horizon (``setpoint_program`` of :meth:`step`; the closed loop passes the
        known part of the scenario's setpoint signals) are per-stage references of the dynamic QP
        and the steady target is computed for the last previewed setpoint
        (:mod:`mpcproto.control.preview`); the controller then moves ahead of a programmed change.

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
        readback differed from the command by more than 1e-9 of the MV's scale
        (``readback_differs``; less is the round-off of the actuator's arithmetic), MVs found
        not following their command (``mv_not_following``; limited at their position for 5
        samples).
    """

    name = "mpc"

    def __init__(self, dmodel, *, horizon: int = 30, control_horizon: int | None = None,
                 cv: Mapping[str, Mapping[str, Any]] | None = None,
                 mv: Mapping[str, Mapping[str, Any]] | None = None,
                 dv: Mapping[str, Mapping[str, Any]] | None = None,
                 terminal_cost: bool = False, steady_target: bool = True, solver: str = "auto",
                 fast_path: bool = True, solver_options: Mapping[str, Any] | None = None,
                 state_noise: float = 1e-4, history: int = 60, priority_ratio: float = 10.0,
                 fallback: str = "shift", backup_solver: str | None = "clarabel",
                 setpoint_preview: bool = False):
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
        self.setpoint_preview = setpoint_preview
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
            raise SettingsError(owner="PredictiveController.from_settings()", key="settings",
                                expected="a mapping of setting names to values",
                                found=type(settings).__name__)
        for k in settings:
            if k not in SETTINGS_KEYS:
                known = sorted(SETTINGS_KEYS)
                raise SettingsError(owner="PredictiveController", key=str(k),
                                    expected=f"a known setting ({', '.join(known)})",
                                    found=f"the unknown setting '{k}'{suggest(k, known)}")
        obj = cls(dmodel, **dict(settings))
        obj.validate()
        return obj

    def validate(self) -> ResolvedSettings:
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
        except SettingsError as e:
            if e.owner != ESTIMATOR:
                raise
            raise e.replace(owner="PredictiveController", key=self._estimator_key(e.key)) \
                from None
        finally:
            if was_enabled:
                gc.enable()

    def _estimator_key(self, key: str | None) -> str | None:
        """The controller's key of an estimator setting's key (``disturbance.level`` ->
        ``cv.level.disturbance``; the estimator's whole disturbance model -> ``cv``)."""
        keys = {f"{s}.{n}": f"cv.{n}.{s}" for n in self.dmodel.cv_names
                for s in ("disturbance", "measurement_noise", "disturbance_noise")}
        keys["disturbance"] = "cv"
        return keys.get(key or "", key)

    @classmethod
    def from_bundle(cls, path) -> "PredictiveController":
        """The controller of a bundle written by ``mpcproto export`` (built), from the bundle alone:
        its discrete model, names, operating point and settings (see ``docs/export-bundle.md``)."""
        from .bundle import controller_from_bundle

        return controller_from_bundle(cls, path)
