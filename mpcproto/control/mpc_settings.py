"""Settings of :class:`~mpcproto.control.mpc.PredictiveController`: keys, defaults, validation.

:func:`resolve` checks every setting against the controller's model and returns the resolved
per-variable arrays (weights in engineering units, priorities folded in, the solver chosen by the
size rule); each bad value raises :class:`~mpcproto.exceptions.SettingsError` naming the key,
what was expected and what was found.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from ..exceptions import SettingsError
from ..model import suggest
from ..validation import Boolean, Interval, check, fail, shown
from .condensed import DAQP_OPTIONS
from .estimator import DISTURBANCE_MODELS
from .mpc_results import FieldView

__all__ = ["SETTINGS_KEYS", "CV_KEYS", "MV_KEYS", "DV_KEYS", "SOLVERS", "BACKUP_SOLVERS",
           "FALLBACKS", "CONDENSED_MAX_VARIABLES", "CONDENSED_MAX_ENTRIES", "resolve", "ResolvedSettings",
           "per_var", "check_model", "SCALE_FRACTION", "nice_number", "range_span", "default_scale",
           "MOVE_WEIGHT", "REFERENCE_SAMPLES", "default_move_weight"]

#: top-level settings keys and their defaults (see :class:`PredictiveController`)
SETTINGS_KEYS: dict[str, Any] = {
    "horizon": 30, "control_horizon": None, "cv": None, "mv": None, "dv": None,
    "terminal_cost": False, "steady_target": True, "solver": "auto", "fast_path": True,
    "solver_options": None, "state_noise": 1e-4, "history": 60, "priority_ratio": 10.0,
    "fallback": "shift", "backup_solver": "clarabel", "setpoint_preview": False,
}
#: per-CV keys and defaults (``scale`` None: derived from the CV's range, :func:`default_scale`)
CV_KEYS: dict[str, Any] = {
    "weight": 1.0, "scale": None, "low": -math.inf, "high": math.inf, "limit_penalty": 1e2,
    "limit_penalty_quadratic": 1e1, "priority": 1, "disturbance": "auto",
    "measurement_noise": 1e-3, "disturbance_noise": 1e-2,
}
#: per-MV keys and defaults (``scale`` None: derived from the MV's range, :func:`default_scale`;
#: ``move_weight`` None: derived from the sample time, :func:`default_move_weight`)
MV_KEYS: dict[str, Any] = {
    "move_weight": None, "preferred_weight": 0.0, "preferred_value": None, "low": -math.inf,
    "high": math.inf, "max_move": math.inf, "scale": None,
}
#: a default scale is this fraction of the variable's range: one scale is one typical move (a
#: rule of ours, common practice, no source; ``mpcproto new`` writes the same scales)
SCALE_FRACTION = 1.0 / 20.0
#: a default move weight is this (per squared MV scale) at the reference sample time, and
#: grows with the square of the reference sample time over the sample time (:func:`default_move_weight`)
MOVE_WEIGHT = 0.1
#: the reference sample time is the prediction horizon (in time) over this many samples
REFERENCE_SAMPLES = 40
#: keys of earlier versions that were renamed: refused with a message naming the new key
_RENAMED_KEYS = {f"rest_{k}": f"preferred_{k}" for k in ("value", "weight")}
#: per-DV keys and defaults
DV_KEYS: dict[str, Any] = {"feedforward": True}


SOLVERS = ("auto", "daqp", "osqp", "clarabel")
#: backup solvers (through cvxpy on the sparse statement)
BACKUP_SOLVERS = ("clarabel", "osqp", "daqp")
#: ``solver="auto"`` takes the condensed QP with DAQP while it has at most this many variables
#: (nu * M) and its dense prediction matrix (ny*N rows by nu*M columns) at most this many
#: entries (64 MB); beyond that the sparse form with OSQP (its cost grows with the horizon
#: instead of the square of it).  A size rule of ours, from the benchmark in benchmarks/bench_mpc.py.
CONDENSED_MAX_VARIABLES = 1000
CONDENSED_MAX_ENTRIES = 8_000_000
FALLBACKS = ("shift", "hold")
_OSQP_OPTIONS = ("eps_abs", "eps_rel", "eps_prim_inf", "eps_dual_inf", "max_iter", "polishing",
                 "polish_refine_iter", "warm_starting", "adaptive_rho", "adaptive_rho_interval",
                 "adaptive_rho_tolerance", "adaptive_rho_fraction", "rho", "sigma", "alpha",
                 "scaling", "time_limit", "check_termination", "scaled_termination", "delta",
                 "verbose", "check_dualgap")


def nice_number(v: float) -> float:
    """*v* rounded (on a log scale) to 1, 2 or 5 times a power of ten; 1 for a value <= 0 or not finite."""
    if not (math.isfinite(v) and v > 0):
        return 1.0
    e = math.floor(math.log10(v))
    best = min((abs(math.log(v / (m * 10 ** e))), m) for m in (1, 2, 5, 10))[1]
    return float(best * 10 ** e)


def range_span(low: float, high: float, nominal: float) -> float:
    """``high - low`` when both are finite and ``high > low``, else ``max(|nominal|, 1)``."""
    if math.isfinite(low) and math.isfinite(high) and high > low:
        return float(high - low)
    return max(abs(float(nominal)), 1.0)


def default_scale(*ranges: tuple[float, float], nominal: float) -> float:
    """The default scale of a CV or MV: :data:`SCALE_FRACTION` of its range, rounded by
    :func:`nice_number`.  The range is the first of *ranges* (``(low, high)`` pairs, e.g. the
    controller's limits, then the physical bounds) with both ends finite and ``high > low``, else
    ``max(|nominal|, 1)``.

    >>> default_scale((-math.inf, math.inf), (0.0, 600.0), nominal=359.2)   # 30, rounded
    20.0
    >>> default_scale((1.3, 1.7), (0.0, 1.8), nominal=1.5)
    0.02
    """
    for low, high in ranges:
        if math.isfinite(low) and math.isfinite(high) and high > low:
            return nice_number((high - low) * SCALE_FRACTION)
    return nice_number(range_span(math.nan, math.nan, nominal) * SCALE_FRACTION)


def default_move_weight(Ts: float, horizon: int) -> dict[str, Any]:
    """The default move weight (per squared MV scale) at sample time *Ts* with a prediction horizon
    of *horizon* samples, with the reference it came from.

    Rule: ``MOVE_WEIGHT * (Ts_ref / Ts) ** 2`` with ``Ts_ref = horizon * Ts / REFERENCE_SAMPLES``,
    the sample time at which the same horizon in time would span ``REFERENCE_SAMPLES`` (40)
    samples -- a horizon of about four dominant time constants (the settling time) sampled at a
    tenth of one, the rules of :func:`mpcproto.design.sampling_advice`.  So the weight is
    ``0.1 (N / 40) ** 2``: the earlier default 0.1 at a 40-sample horizon, and the same design for
    the same horizon in time whatever the sample time.

    Why the square: the cost sums the CV error every sample, ``sum_k e_k^2 ~ (1/Ts) int e^2 dt``,
    and a smooth MV path moves ``du_k ~ (du/dt) Ts`` per sample, so ``sum_k du_k^2 ~ Ts int
    (du/dt)^2 dt``.  With the move weight in ``1/Ts^2`` the ratio of the two terms, and so the
    closed loop, tends to that of one continuous-time design ``int (e^2 + r (du/dt)^2) dt`` as the
    sample time shrinks (the usual sampled quadratic cost; common practice, no source); with a
    constant weight, halving ``Ts`` quarters the price of the same MV path against the same error.

    >>> d = default_move_weight(10.0, 60)        # 600 s of horizon: Ts_ref = 15 s
    >>> round(d["move_weight"], 6), d["reference_sample_time"]
    (0.225, 15.0)
    >>> h = default_move_weight(5.0, 120)       # the same horizon in time at half the sample time
    >>> h["reference_sample_time"], round(h["move_weight"] / d["move_weight"], 12)
    (15.0, 4.0)
    """
    Ts = float(Ts)
    ts_ref = int(horizon) * Ts / REFERENCE_SAMPLES
    return {"move_weight": MOVE_WEIGHT * (ts_ref / Ts) ** 2, "reference_sample_time": ts_ref,
            "horizon_time": int(horizon) * Ts, "sample_time": Ts}


_OWNER = "PredictiveController"


def _err(key: str, expected: str, found: Any) -> SettingsError:
    return fail(_OWNER, key, expected, shown(found))


def _number(key, v, *, low=None, low_open=False, allow_inf=False) -> float:
    return check(v, Interval(float, low, None, closed="right" if low_open else "both",
                             allow_inf=allow_inf), owner=_OWNER, key=key)


def _int(key, v, low=1) -> int:
    return check(v, Interval(int, low, None), owner=_OWNER, key=key)


def _bool(key, v) -> bool:
    return check(v, Boolean(), owner=_OWNER, key=key)


@dataclass(frozen=True, eq=False, repr=False)
class ResolvedSettings(FieldView):
    """The controller's settings checked and resolved (:func:`resolve`); read-only, also read as a
    mapping (``r["cv_weight"]``).

    ``N``, ``M`` horizons; ``solver`` the chosen solver; per CV (model order): ``cv_weight``,
    ``lim_lin``, ``lim_quad`` (per engineering unit, squared where quadratic, priority factors
    applied), ``cv_scale``, ``cv_low``, ``cv_high``; per CV name: ``disturbance``, ``meas_noise``,
    ``dist_noise``; per MV: ``move_weight``, ``preferred_weight`` (per squared engineering unit),
    ``move_weight_per_scale`` (as given or by default, per squared MV scale), ``move_weight_default``
    (the default rule's figures and the MVs that used it),
    ``mv_scale``, ``preferred_value``, ``mv_low``, ``mv_high``, ``max_move``; per DV:
    ``feedforward``; ``solver_options``.
    """

    N: int
    M: int
    solver: str
    cv_weight: np.ndarray
    cv_scale: np.ndarray
    cv_low: np.ndarray
    cv_high: np.ndarray
    lim_lin: np.ndarray
    lim_quad: np.ndarray
    disturbance: dict
    meas_noise: dict
    dist_noise: dict
    move_weight: np.ndarray
    move_weight_per_scale: np.ndarray
    move_weight_default: dict
    preferred_weight: np.ndarray
    mv_scale: np.ndarray
    preferred_value: np.ndarray
    mv_low: np.ndarray
    mv_high: np.ndarray
    max_move: np.ndarray
    feedforward: np.ndarray
    solver_options: dict


ResolvedSettings._FIELDS = tuple(f.name for f in fields(ResolvedSettings))
ResolvedSettings._KEYS = frozenset(ResolvedSettings._FIELDS)


def resolve(ctrl) -> ResolvedSettings:
    """Check every setting of *ctrl* against its model; return the resolved per-variable arrays.

    Raises
    ------
    SettingsError
        Naming the setting, what was expected and what was found.
    """
    m = ctrl.dmodel
    check_model(m)
    N = _int("horizon", ctrl.horizon)
    M = N if ctrl.control_horizon is None else _int("control_horizon", ctrl.control_horizon)
    if M > N:
        raise _err("control_horizon", f"an integer between 1 and the horizon ({N})",
                   ctrl.control_horizon)
    r: dict[str, Any] = {"N": N, "M": M}
    cvs = per_var("cv", ctrl.cv, m.cv_names, CV_KEYS)
    mvs = per_var("mv", ctrl.mv, m.mv_names, MV_KEYS)
    dvs = per_var("dv", ctrl.dv, m.dv_names, DV_KEYS)
    arr = lambda rows, key: np.array([row[key] for row in rows], float)  # noqa: E731
    bounds = getattr(m, "bounds", None) or {}
    for i, (name, row) in enumerate(zip(m.cv_names, cvs)):
        p = f"cv.{name}"
        _number(f"{p}.weight", row["weight"], low=0)
        _number(f"{p}.low", row["low"], allow_inf=True)
        _number(f"{p}.high", row["high"], allow_inf=True)
        if row["low"] > row["high"]:
            raise _err(f"{p}.low", f"<= {p}.high ({row['high']!r})", row["low"])
        row["scale"] = _scale_of(p, row, bounds, "cv", i, m.op.y[i])
        _number(f"{p}.limit_penalty", row["limit_penalty"], low=0)
        _number(f"{p}.limit_penalty_quadratic", row["limit_penalty_quadratic"], low=0)
        _int(f"{p}.priority", row["priority"])
        if row["disturbance"] not in DISTURBANCE_MODELS:
            raise _err(f"{p}.disturbance", f"one of {DISTURBANCE_MODELS}", row["disturbance"])
        _number(f"{p}.measurement_noise", row["measurement_noise"], low=0, low_open=True)
        _number(f"{p}.disturbance_noise", row["disturbance_noise"], low=0, low_open=True)
    rule = default_move_weight(m.Ts, N)
    for j, (name, row) in enumerate(zip(m.mv_names, mvs)):
        p = f"mv.{name}"
        if row["move_weight"] is None:
            row["move_weight"] = rule["move_weight"]
        _number(f"{p}.move_weight", row["move_weight"], low=0)
        _number(f"{p}.preferred_weight", row["preferred_weight"], low=0)
        if row["preferred_value"] is not None:
            _number(f"{p}.preferred_value", row["preferred_value"])
        _number(f"{p}.low", row["low"], allow_inf=True)
        _number(f"{p}.high", row["high"], allow_inf=True)
        if row["low"] > row["high"]:
            raise _err(f"{p}.low", f"<= {p}.high ({row['high']!r})", row["low"])
        _number(f"{p}.max_move", row["max_move"], low=0, low_open=True, allow_inf=True)
        row["scale"] = _scale_of(p, row, bounds, "mv", j, m.op.u[j])
    for name, row in zip(m.dv_names, dvs):
        _bool(f"dv.{name}.feedforward", row["feedforward"])
    _bool("terminal_cost", ctrl.terminal_cost)
    _bool("steady_target", ctrl.steady_target)
    _bool("fast_path", ctrl.fast_path)
    _bool("setpoint_preview", ctrl.setpoint_preview)
    if ctrl.solver not in SOLVERS:
        raise _err("solver", f"one of {SOLVERS}", ctrl.solver)
    kind = ctrl.solver
    if kind == "auto":
        nvar = m.nu * M
        small = (nvar <= CONDENSED_MAX_VARIABLES
                 and nvar * m.ny * N <= CONDENSED_MAX_ENTRIES)
        kind = "daqp" if small else "osqp"
    r["solver"] = kind
    if ctrl.backup_solver == "none":          # the spelling a TOML file can give
        ctrl.backup_solver = None
    if ctrl.backup_solver is not None and ctrl.backup_solver not in BACKUP_SOLVERS:
        raise _err("backup_solver", f"one of {BACKUP_SOLVERS} or 'none'", ctrl.backup_solver)
    if ctrl.fallback not in FALLBACKS:
        raise _err("fallback", f"one of {FALLBACKS}", ctrl.fallback)
    if ctrl.terminal_cost and not ctrl.steady_target:
        raise _err("terminal_cost", "false when steady_target is false (the terminal cost "
                   "pulls the last state to the steady target)", ctrl.terminal_cost)
    opts = {} if ctrl.solver_options is None else ctrl.solver_options
    if not isinstance(opts, Mapping):
        raise _err("solver_options", "a mapping of solver setting names to values", opts)
    if kind == "osqp":
        known = _OSQP_OPTIONS
    elif kind == "daqp":
        known = DAQP_OPTIONS
    else:
        import clarabel

        known = tuple(k for k in dir(clarabel.DefaultSettings()) if not k.startswith("_"))
    chose = (f" (solver 'auto' chose {kind} for this size; set solver to 'osqp' or 'clarabel' "
             f"to use that solver's settings)" if ctrl.solver == "auto" else "")
    for k in opts:
        if k not in known:
            raise fail(_OWNER, f"solver_options.{k}",
                       f"a {kind} option ({', '.join(sorted(known))})",
                       f"the unknown option '{k}'{suggest(k, known)}", chose.strip(" ()") or None)
    _number("state_noise", ctrl.state_noise, low=0)
    _int("history", ctrl.history)
    _number("priority_ratio", ctrl.priority_ratio, low=1, low_open=True)
    prio = arr(cvs, "priority")
    pf = float(ctrl.priority_ratio) ** (prio.max() - prio)
    r.update(
        cv_weight=arr(cvs, "weight") / arr(cvs, "scale") ** 2 * pf,
        cv_scale=arr(cvs, "scale"), cv_low=arr(cvs, "low"), cv_high=arr(cvs, "high"),
        lim_lin=arr(cvs, "limit_penalty") / arr(cvs, "scale") * pf,
        lim_quad=arr(cvs, "limit_penalty_quadratic") / arr(cvs, "scale") ** 2 * pf,
        disturbance={n: row["disturbance"] for n, row in zip(m.cv_names, cvs)},
        meas_noise={n: float(row["measurement_noise"]) for n, row in zip(m.cv_names, cvs)},
        dist_noise={n: float(row["disturbance_noise"]) for n, row in zip(m.cv_names, cvs)},
        move_weight=arr(mvs, "move_weight") / arr(mvs, "scale") ** 2,
        move_weight_per_scale=arr(mvs, "move_weight"),
        move_weight_default={**rule, "used_by": [n for n in m.mv_names if (ctrl.mv or {}).get(
            n, {}).get("move_weight") is None]},
        preferred_weight=arr(mvs, "preferred_weight") / arr(mvs, "scale") ** 2,
        mv_scale=arr(mvs, "scale"),
        preferred_value=np.array([m.op.u[j] if row["preferred_value"] is None else float(row["preferred_value"])
                             for j, row in enumerate(mvs)]),
        mv_low=arr(mvs, "low"), mv_high=arr(mvs, "high"), max_move=arr(mvs, "max_move"),
        feedforward=np.array([bool(row["feedforward"]) for row in dvs], bool),
        solver_options=dict(opts),
    )
    ctrl._resolved = ResolvedSettings(**r)
    return ctrl._resolved

def _scale_of(p: str, row: Mapping[str, Any], bounds: Mapping[str, Any], role: str, i: int,
              nominal: float) -> float:
    """The given scale (checked), or the default: from the controller's limits, else the physical
    bounds, else the nominal value (:func:`default_scale`).  A model that carries no bounds at
    all (``bounds`` None: built from matrices, units unknown) and no limits keeps 1 engineering
    unit, as before the scale-aware defaults."""
    if row["scale"] is not None:
        return _number(f"{p}.scale", row["scale"], low=0, low_open=True)
    ranges = [(float(row["low"]), float(row["high"]))]
    if role in bounds:
        lo, hi = bounds[role]
        ranges.append((float(lo[i]), float(hi[i])))
    elif not all(math.isfinite(v) for v in ranges[0]):
        return 1.0
    return default_scale(*ranges, nominal=float(nominal))


def per_var(role: str, given, names, keys: Mapping[str, Any]) -> list[dict[str, Any]]:
    given = {} if given is None else given
    if not isinstance(given, Mapping):
        raise _err(role, f"a mapping of {role.upper()} name to a dict of settings", given)
    for n, row in given.items():
        if n not in names:
            raise fail(_OWNER, f"{role}.{n}", f"the name of a {role.upper()} of the model "
                       f"({', '.join(names)})", f"'{n}'{suggest(n, list(names))}")
        if not isinstance(row, Mapping):
            raise _err(f"{role}.{n}", "a mapping of setting names to values", row)
        for k in row:
            if k in _RENAMED_KEYS:
                raise fail(_OWNER, f"{role}.{n}.{k}", f"the setting '{_RENAMED_KEYS[k]}' (the "
                           f"new name of '{k}')", f"the old name '{k}'",
                           f"rename the key '{role}.{n}.{k}' to '{role}.{n}.{_RENAMED_KEYS[k]}'")
            if k not in keys:
                raise fail(_OWNER, f"{role}.{n}.{k}", f"a setting of a {role.upper()} "
                           f"({', '.join(sorted(keys))})", f"the unknown setting "
                           f"'{k}'{suggest(k, list(keys))}")
    out = []
    for n in names:
        row = dict(keys)
        row.update(given.get(n, {}))
        out.append(row)
    return out

def check_model(m) -> None:
    need = ("A", "B", "Bd", "C", "D", "Dd", "Ts", "op")
    for k in need:
        if not hasattr(m, k):
            raise fail("PredictiveController", "dmodel", "a DiscreteLinearModel",
                       f"{type(m).__name__} (missing '{k}')")
    A = np.asarray(m.A, float)
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise fail("PredictiveController", "dmodel.A", "a square matrix", f"shape {A.shape}")
    nx = A.shape[0]
    nu, nd, ny = len(m.op.mv_names), len(m.op.dv_names), len(m.op.cv_names)
    for k, shape in (("B", (nx, nu)), ("Bd", (nx, nd)), ("C", (ny, nx)), ("D", (ny, nu)),
                     ("Dd", (ny, nd))):
        got = np.shape(getattr(m, k))
        if got != shape:
            raise fail("PredictiveController", f"dmodel.{k}",
                       f"shape {shape} (states={nx}, MVs={nu}, DVs={nd}, CVs={ny})", f"{got}")
        if not np.all(np.isfinite(np.asarray(getattr(m, k), float))):
            raise fail("PredictiveController", f"dmodel.{k}", "finite entries",
                       "non-finite entries", code="non_finite")
    if not np.all(np.isfinite(A)):
        raise fail("PredictiveController", "dmodel.A", "finite entries", "non-finite entries",
                   code="non_finite")
    for k, n in (("u", nu), ("d", nd), ("y", ny)):
        if np.shape(getattr(m.op, k)) != (n,):
            raise fail("PredictiveController", f"dmodel.op.{k}", f"shape ({n},)",
                       f"{np.shape(getattr(m.op, k))}")
    if not (np.isfinite(m.Ts) and m.Ts > 0):
        raise fail("PredictiveController", "dmodel.Ts", "a finite number > 0", repr(m.Ts))
