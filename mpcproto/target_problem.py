"""The target problem: the steady state and MVs that put the CVs at given values (design time).

:func:`solve_targets`
    the target problem: the MVs (within their bounds) and states that put the CVs at given targets at
    steady state, as a least-squares problem solved by IPOPT (compiled once per model)::

        minimize   sum_i ((y_i - t_i) / s_i)^2
                   + 1e-10 * (sum_j ((u_j - u_ref_j) / r_j)^2 + sum_k ((x_k - x_ref_k) / q_k)^2)
        subject to f(x, u, d) = 0,  x and u within their physical bounds,  fixed MVs held

    with ``s_i``, ``r_j``, ``q_k`` the spans of the physical bounds (or the magnitudes) of CV i, MV j
    and state k, and the references the guesses (default nominal).  The tiny second term picks one
    answer when the targets leave MVs or states free (more MVs than targets, an integrating level).
    IPOPT's answer is then finished by Newton's method (minimum-norm steps) on the balances and the
    targets it reached, in the free MVs off their bounds, so a reached target is met to rounding; a
    reached target left above ``EXACT`` (1e-10) of its value or scale is named in the message.  When
    a target cannot be reached, the answer is the least-squares compromise and the message says which
    target missed by how much and which MVs sit at a bound.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import casadi as ca
import numpy as np

from .exceptions import OperatingPointError
from .layout import ParameterLayout
from .model import suggest
from .operating import (OperatingPoint, _in_box, _newton, _require, _scale, _steady_jacobians,
                        steady_state)

__all__ = ["TargetResult", "solve_targets", "REGULARIZATION", "EXACT"]

#: weight of the MV term of the target problem: small enough not to pull reachable targets off
#: (the bias it causes is of this order relative to the CV scales), large enough to pick one answer
REGULARIZATION = 1e-10
#: a reached target whose residual is above this fraction of its value (or of its CV's scale) is
#: reported as not reached to solver precision
EXACT = 1e-10


# ---------------------------------------------------------------------------------------------
# the target problem


@dataclass(frozen=True)
class TargetResult:
    """Answer of :func:`solve_targets`.

    Attributes
    ----------
    op : OperatingPoint
        The steady state found (MVs within bounds).
    reachable : bool
        True when every target is met within tolerance.
    targets : dict
        CV name -> requested value.
    residuals : dict
        CV name -> achieved minus requested, for every targeted CV.
    unreachable : tuple of str
        The targeted CVs that missed.
    mvs_at_bounds : dict
        MV name -> ``"low"`` or ``"high"`` for free MVs that ended on a bound.
    states_at_bounds : dict
        State name -> ``"low"`` or ``"high"`` for states that ended on a physical bound (an empty
        tank, an overflowing level) -- these limit what is reachable as much as MV bounds do.
    message : str
        One paragraph for people: what was reached, what was not and why (MVs at bounds).
    solver_status : str
        IPOPT's return status.
    """

    op: OperatingPoint
    reachable: bool
    targets: dict[str, float]
    residuals: dict[str, float]
    unreachable: tuple[str, ...]
    mvs_at_bounds: dict[str, str]
    message: str
    solver_status: str
    states_at_bounds: dict[str, str] = field(default_factory=dict)

    @property
    def success(self) -> bool:
        return self.reachable

    def as_dict(self) -> dict[str, Any]:
        return {"operating_point": self.op.as_dict(), "reachable": self.reachable,
                "targets": dict(self.targets), "residuals": dict(self.residuals),
                "unreachable": list(self.unreachable), "mvs_at_bounds": dict(self.mvs_at_bounds),
                "states_at_bounds": dict(self.states_at_bounds),
                "message": self.message, "solver_status": self.solver_status}


def _target_layout(model) -> ParameterLayout:
    """Blocks of the target NLP's parameter vector (DVs, parameters, targets, weights, scales...)."""
    nx, nu, ny = model.nx, model.nu, model.ny
    return ParameterLayout([("d", model.nd), ("p", len(model.p)), ("t", ny), ("w", ny), ("sy", ny),
                            ("uref", nu), ("su", nu), ("sx", nx), ("xref", nx)],
                           owner=f"solve_targets(model '{model.name}') parameters")


def _target_solver(model):
    """IPOPT NLP for the target problem, built once per model (cached on the model)."""
    sol = getattr(model, "target_solver_", None)
    if sol is not None:
        return sol
    x = ca.MX.sym("x", model.nx)
    u = ca.MX.sym("u", model.nu)
    P = ca.MX.sym("P", _target_layout(model).size)
    blk = _target_layout(model).unpack(P)
    d, p, t, w, sy, sx = blk["d"], blk["p"], blk["t"], blk["w"], blk["sy"], blk["sx"]
    uref, su, xref = blk["uref"], blk["su"], blk["xref"]
    z = model.z_of(u, d)
    y = model.out_(x=x, u=u, d=d, z=z, p=p)["y"]
    f = model.ode_(x=x, u=u, d=d, z=z, p=p)["xdot"]
    obj = (ca.sum1(w * ((y - t) / sy) ** 2)
           + REGULARIZATION * (ca.sumsqr((u - uref) / su) + ca.sumsqr((x - xref) / sx)))
    nlp = {"x": ca.vertcat(x, u), "p": P, "f": obj, "g": f / sx}
    sol = ca.nlpsol(f"{model.name}_targets", "ipopt", nlp, {
        "ipopt.print_level": 0, "print_time": False, "ipopt.sb": "yes", "ipopt.tol": 1e-12,
        "ipopt.acceptable_tol": 1e-9, "ipopt.max_iter": 500, "error_on_fail": False,
        "ipopt.mu_strategy": "adaptive", "ipopt.bound_relax_factor": 0.0,
        "calc_lam_p": False, "show_eval_warnings": False})
    model.target_solver_ = sol
    return sol


def _mvs_at_bounds(model, u, ulo, uhi, su, fixed) -> dict[str, str]:
    """Free MVs within 1e-6 of their scale of a bound -> "low" / "high"."""
    out: dict[str, str] = {}
    for i, n in enumerate(model.mv_names):
        if n in fixed:
            continue
        tol = 1e-6 * su[i]
        if math.isfinite(ulo[i]) and u[i] <= ulo[i] + tol:
            out[n] = "low"
        elif math.isfinite(uhi[i]) and u[i] >= uhi[i] - tol:
            out[n] = "high"
    return out


def _polish(model, x, u, d, hit, t, sx, su, sy, sxdot, free_u):
    """Newton's method on ``f(x, u) = 0`` and ``y_i = t_i`` (i in *hit*), unknowns the states and
    the MVs *free_u*, in scaled units.  Returns ``(x, u)`` or ``(None, None)``."""
    if not hit and model.nx == 0:
        return None, None
    hit = np.asarray(hit, int)
    fu = np.asarray(free_u, int)
    nx = model.nx
    p = model.p

    def unpack(v):
        xx = v[:nx] * sx
        uu = u.copy()
        uu[fu] = v[nx:] * su[fu]
        return xx, uu

    def res(v):
        xx, uu = unpack(v)
        r1 = model.rhs(xx, uu, d, model.z_of(uu, d), p) / sxdot
        r2 = (model.output(xx, uu, d)[hit] - t[hit]) / sy[hit]
        return np.concatenate([r1, r2])

    def jac(v):
        xx, uu = unpack(v)
        A, B, C, D = _steady_jacobians(model, xx, uu, d, p)
        top = np.hstack([A * sx[None, :], B[:, fu] * su[fu][None, :]]) / sxdot[:, None]
        bot = np.hstack([C[hit] * sx[None, :], D[hit][:, fu] * su[fu][None, :]]) / sy[hit][:, None]
        return np.vstack([top, bot])

    v0 = np.concatenate([x / sx, u[fu] / su[fu]])
    v, err = _newton(res, jac, v0, tol=1e-15)
    if not err <= 1e-12:
        return None, None
    return unpack(v)


def solve_targets(model, targets: Mapping[str, float], *,
                  d: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                  fixed_mvs: Mapping[str, float] | None = None,
                  x_guess: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                  u_guess: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                  tolerance: float = 1e-6) -> TargetResult:
    """The steady state and MVs that bring the CVs to *targets* (least squares within MV bounds).

    Parameters
    ----------
    model : Model
        A built model.
    targets : mapping CV name -> value
        The CV targets; CVs not named are free.
    d : mapping or sequence, optional
        DV values (default nominal).
    fixed_mvs : mapping MV name -> value, optional
        MVs held at a value (not moved to meet the targets).
    x_guess, u_guess : optional
        Starting guesses (default nominal); ``u_guess`` is also the reference that picks one answer
        among many when there are more free MVs than targets.
    tolerance : float
        A target counts as reached when ``|y - target| <= tolerance * s`` with ``s`` the CV's scale
        (span of its physical bounds, else its magnitude).

    Returns
    -------
    TargetResult

    Raises
    ------
    OperatingPointError
        If no steady state satisfying the balances within the bounds is found at all.
    """
    where = f"solve_targets(model '{getattr(model, 'name', model)}')"
    _require(model, where)
    if not isinstance(targets, Mapping) or not targets:
        raise OperatingPointError(owner=where, key="targets",
                                  expected="a non-empty mapping CV name -> value",
                                  found=f"{targets!r}")
    cvs = model.cv_names
    tvec = np.zeros(model.ny)
    wvec = np.zeros(model.ny)
    tdict: dict[str, float] = {}
    for k, v in targets.items():
        if k not in cvs:
            raise OperatingPointError(owner=where, key=f"targets.{k}",
                                      expected=f"a CV of the model (one of {', '.join(cvs)})",
                                      found=f"target '{k}', which is not a CV{suggest(str(k), cvs)}")
        try:
            fv = float(v)
        except (TypeError, ValueError):
            fv = math.nan
        if not math.isfinite(fv):
            raise OperatingPointError(owner=where, key=f"targets.{k}", expected="a finite number",
                                      found=f"{v!r}")
        i = cvs.index(k)
        tvec[i], wvec[i] = fv, 1.0
        tdict[k] = fv
    dd = model.vector("dv", d, what=f"{where}: d")
    ulo, uhi = model.bounds("mv")
    ulo, uhi = ulo.copy(), uhi.copy()
    u0 = model.vector("mv", u_guess, what=f"{where}: u_guess")
    fixed = dict(fixed_mvs or {})
    for k, v in fixed.items():
        if k not in model.mv_names:
            raise OperatingPointError(owner=where, key=f"fixed_mvs.{k}",
                                      expected=f"an MV (one of {', '.join(model.mv_names)})",
                                      found=f"fixed_mvs names '{k}', which is not an MV"
                                            f"{suggest(str(k), model.mv_names)}")
        i = model.mv_names.index(k)
        fv = float(v)
        if not (ulo[i] <= fv <= uhi[i]):
            raise OperatingPointError(owner=where, key=f"fixed_mvs.{k}",
                                      expected=f"a value within its bounds [{ulo[i]:g}, {uhi[i]:g}]",
                                      found=f"fixed MV '{k}' = {fv:g}")
        ulo[i] = uhi[i] = u0[i] = fv
    u0 = np.clip(u0, ulo, uhi)
    x0 = model.vector("state", x_guess, what=f"{where}: x_guess")
    xlo, xhi = model.bounds("state")
    xnom = model.nominal("state")
    sx = _scale(xlo, xhi, xnom)
    ylo, yhi = model.bounds("cv")
    ynom = model.output(xnom, model.nominal("mv"), dd)
    sy = _scale(ylo, yhi, np.where(wvec > 0, tvec, ynom))
    su = _scale(ulo, uhi, u0)
    su = np.where(su > 0, su, 1.0)
    # steady-state residual scale: a state changing by 1e-10 of its span per time unit counts as still
    sxdot = np.maximum(sx, 1e-12)
    solver = _target_solver(model)
    P = _target_layout(model).pack(d=dd, p=model.p, t=tvec, w=wvec, sy=sy, uref=u0, su=su, sx=sxdot,
                                   xref=x0)
    # keep strictly off the state bounds (square roots of levels have no slope at 0)
    span = np.where(np.isfinite(xhi - xlo), xhi - xlo, 0.0)
    lbx = np.concatenate([xlo + 1e-9 * span, ulo])
    ubx = np.concatenate([xhi - 1e-9 * span, uhi])
    starts = [x0]
    try:  # second start: the steady state at the guessed MVs, if there is one
        starts.append(steady_state(model, u0, dd, x_guess=x0).x)
    except OperatingPointError:
        pass

    def still(x, u):
        xdot = model.rhs(x, u, dd, model.z_of(u, dd), model.p)
        return bool(np.all(np.isfinite(x)) and np.all(np.abs(xdot) <= 1e-6 * np.maximum(sx, 1e-9)))

    for xs0 in starts:
        res = solver(x0=np.concatenate([np.clip(xs0, lbx[:model.nx], ubx[:model.nx]), u0]), p=P,
                     lbx=lbx, ubx=ubx, lbg=0.0, ubg=0.0)
        status = str(solver.stats().get("return_status", "unknown"))
        wopt = np.asarray(res["x"], float).reshape(-1)
        x, u = wopt[:model.nx], np.clip(wopt[model.nx:], ulo, uhi)
        if still(x, u) and solver.stats().get("success", False):
            break
    if not still(x, u):
        raise OperatingPointError(
            f"{where}: no steady state within the bounds was found (IPOPT: {status}); the balances "
            f"cannot close with the free MVs inside their bounds"
            + (f" and the fixed MVs {fixed}" if fixed else "")
            + ". Free more MVs, widen their bounds, or check the DVs.")
    at_bounds = _mvs_at_bounds(model, u, ulo, uhi, su, fixed)
    # IPOPT stops at its tolerance (CV residuals of 1e-5 on Wood & Berry): finish with Newton's
    # method on the balances and the targets it reached, in the MVs that are free and off their
    # bounds (minimum-norm steps keep the answer IPOPT chose where it is not unique)
    yx = model.output(x, u, dd)
    hit = [cvs.index(k) for k in tdict if abs(yx[cvs.index(k)] - tdict[k]) <= tolerance * sy[cvs.index(k)]]
    xp, up = _polish(model, x, u, dd, hit, tvec, sx, su, sy, sxdot,
                     [i for i, n in enumerate(model.mv_names) if n not in fixed and n not in at_bounds])
    if xp is not None and still(xp, up) and _in_box(model, xp, tol=0.0) \
            and np.all(up >= ulo) and np.all(up <= uhi):
        x, u = xp, up
    op = OperatingPoint.at(model, x, u, dd)
    residuals = {k: float(op.y[cvs.index(k)] - v) for k, v in tdict.items()}
    missed = tuple(k for k in tdict if abs(residuals[k]) > tolerance * sy[cvs.index(k)])
    # reached, but not to the precision a steady-state solve can give: said in the message
    loose = tuple(k for k in tdict if k not in missed
                  and abs(residuals[k]) > EXACT * max(abs(tdict[k]), sy[cvs.index(k)]))
    x_at: dict[str, str] = {}
    for i, n in enumerate(model.state_names):
        tol = 1e-6 * sx[i]
        if math.isfinite(xlo[i]) and x[i] <= xlo[i] + tol:
            x_at[n] = "low"
        elif math.isfinite(xhi[i]) and x[i] >= xhi[i] - tol:
            x_at[n] = "high"
    units = {v.name: v.unit for v in model.variables()}
    if not missed:
        msg = "every target is reached: " + ", ".join(f"{k} = {tdict[k]:g} {units[k]}" for k in tdict)
        if loose:
            msg += (" -- but not to solver precision: residual " + ", ".join(
                f"{k} {residuals[k]:.3g} {units[k]}" for k in loose)
                + f" (more than {EXACT:g} of the target or scale; within the tolerance {tolerance:g})")
    else:
        parts = [f"{k}: target {tdict[k]:g} {units[k]}, closest steady value {tdict[k] + residuals[k]:.6g} "
                 f"{units[k]}" for k in missed]
        msg = ("target(s) cannot be reached at steady state within the MV bounds -- " + "; ".join(parts)
               + ". The MVs give the least-squares compromise")
        if at_bounds:
            msg += "; limiting MVs: " + ", ".join(
                f"{n} at its {side} bound {u[model.mv_names.index(n)]:g} {units[n]}" for n, side in at_bounds.items())
        if x_at:
            msg += "; states on a physical bound: " + ", ".join(
                f"{n} at its {side} bound" for n, side in x_at.items())
        msg += "."
    return TargetResult(op=op, reachable=not missed, targets=tdict, residuals=residuals,
                        unreachable=missed, mvs_at_bounds=at_bounds, message=msg, solver_status=status,
                        states_at_bounds=x_at)
