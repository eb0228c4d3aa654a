"""Operating points: the OperatingPoint data type and the steady states of a model.

This module holds the :class:`OperatingPoint` data type used by every later layer and two ways to
find one (the third, :func:`~mpcproto.solve_targets`, the MVs that put the CVs at given values, is
in :mod:`mpcproto.target_problem`):

:func:`steady_states`
    every steady state for given MVs and DVs.  A CasADi Newton rootfinder (compiled once per model)
    starts from the nominal state, from any starts the caller gives and from a Latin-hypercube sample
    inside the states' physical bounds; the converged points inside the bounds are de-duplicated,
    each is given its stability (eigenvalues of the state Jacobian) and the list is sorted by the
    first state.  A unit with several steady states (the Henson-Seborg CSTR has three over a band of
    coolant temperatures) shows them all.  Where Newton's method fails from every start (a singular
    Jacobian, e.g. a level that integrates, whose steady states are not isolated), a bounded
    least-squares solve (scipy) from the nominal state and the given starts is used instead.
:func:`steady_state`
    the steady state nearest a guess (default: the nominal state; Euclidean distance in units of the
    states' ranges).  A state that is free at steady state (an integrating level) keeps its guessed
    value; Newton's method solves for the others.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import casadi as ca
import numpy as np

from .exceptions import NotBuiltError, OperatingPointError

__all__ = ["OperatingPoint", "steady_states", "steady_state"]



@dataclass(frozen=True)
class OperatingPoint:
    """A point (x, u, d) of a model, usually a steady state, with the CV values there.

    Attributes
    ----------
    model : str
        Name of the model.
    x, u, d, y : ndarray
        States, MVs, DVs and CVs (declaration order of the model).
    p : ndarray
        Parameter values the point was computed with.
    state_names, mv_names, dv_names, cv_names : tuple of str
    residual : float
        Largest absolute derivative at the point (0 for an exact steady state).
    eigenvalues : ndarray
        Eigenvalues of the state Jacobian at the point (empty if not computed).
    stable : bool or None
        True if every eigenvalue has a negative real part (None if not computed).
    """

    model: str
    x: np.ndarray
    u: np.ndarray
    d: np.ndarray
    y: np.ndarray
    p: np.ndarray
    state_names: tuple[str, ...]
    mv_names: tuple[str, ...]
    dv_names: tuple[str, ...]
    cv_names: tuple[str, ...]
    residual: float = 0.0
    eigenvalues: np.ndarray = field(default_factory=lambda: np.zeros(0, complex))
    stable: bool | None = None

    def as_dict(self) -> dict[str, Any]:
        """JSON-able view: values keyed by variable name."""
        ev = np.asarray(self.eigenvalues)
        return {
            "model": self.model,
            "states": dict(zip(self.state_names, map(float, self.x))),
            "mvs": dict(zip(self.mv_names, map(float, self.u))),
            "dvs": dict(zip(self.dv_names, map(float, self.d))),
            "cvs": dict(zip(self.cv_names, map(float, self.y))),
            "residual": float(self.residual),
            "eigenvalues": [[float(e.real), float(e.imag)] for e in ev],
            "stable": self.stable,
        }

    @classmethod
    def at(cls, model, x, u, d=None) -> "OperatingPoint":
        """The point (x, u, d) of a built *model*, with its CVs, residual and eigenvalues."""
        x = np.asarray(x, float).reshape(-1)
        u = np.asarray(u, float).reshape(-1)
        d = model.nominal("dv") if d is None else np.asarray(d, float).reshape(-1)
        z = model.z_of(u, d)
        p = model.p
        xdot = model.rhs(x, u, d, z, p)
        A = np.asarray(model.jac_(x=x, u=u, d=d, z=z, p=p)["A"], float)
        if not np.all(np.isfinite(A)):
            raise OperatingPointError(_non_finite_message(model, A, p), code="non_finite")
        ev = np.linalg.eigvals(A) if A.size else np.zeros(0, complex)
        return cls(
            model=model.name, x=x, u=u, d=d, y=model.output(x, u, d, z, p), p=p,
            state_names=model.state_names, mv_names=model.mv_names, dv_names=model.dv_names,
            cv_names=model.cv_names, residual=float(np.max(np.abs(xdot))) if xdot.size else 0.0,
            eigenvalues=ev, stable=bool(np.all(ev.real < 0)) if ev.size else True,
        )


# ---------------------------------------------------------------------------------------------
# helpers


def _non_finite_message(model, A: np.ndarray, p: np.ndarray) -> str:
    """Name the non-finite Jacobian entries d(dx_i/dt)/dx_j and any extreme parameter values."""
    names = list(model.state_names)
    bad = np.argwhere(~np.isfinite(A))
    shown = [f"d(d{names[i]}/dt)/d({names[j]}) = {A[i, j]:g}" for i, j in bad[:6]]
    more = f" and {len(bad) - 6} more" if len(bad) > 6 else ""
    pnames = list(model.names("parameter"))
    extreme = [f"{n} = {v:g}" for n, v in zip(pnames, np.asarray(p, float).reshape(-1))
               if not math.isfinite(v) or abs(v) > 1e100]
    hint = (f"; parameters with extreme values: {', '.join(extreme)}" if extreme else "")
    return (f"OperatingPoint.at(): model '{model.name}' has non-finite Jacobian entries at this "
            f"point (expected finite derivatives; found {', '.join(shown)}{more}){hint}. Check the "
            f"model's parameter values and the state, MV and DV values of the point.")


def _require(model, what: str) -> None:
    if not getattr(model, "is_built", False):
        raise NotBuiltError(f"{what}: model '{getattr(model, 'name', model)}' is not built; "
                            f"call model.build() first.")


def _scale(low: np.ndarray, high: np.ndarray, nominal: np.ndarray) -> np.ndarray:
    """Per-variable scale: the span of finite bounds, else the magnitude of the nominal (>= 1)."""
    span = high - low
    mag = np.maximum(np.abs(nominal), 1.0)
    return np.where(np.isfinite(span) & (span > 0), span, mag)


def _sample_box(model, n: int, rng: np.random.Generator) -> np.ndarray:
    """Latin-hypercube sample of *n* states inside the (slightly shrunk) physical bounds."""
    lo, hi = model.bounds("state")
    nom = model.nominal("state")
    mag = np.maximum(np.abs(nom), 1.0)
    lo = np.where(np.isfinite(lo), lo, nom - 10 * mag)
    hi = np.where(np.isfinite(hi), hi, nom + 10 * mag)
    span = hi - lo
    lo, hi = lo + 1e-3 * span, hi - 1e-3 * span
    nx = len(nom)
    out = np.empty((n, nx))
    for j in range(nx):
        strata = (rng.permutation(n) + rng.random(n)) / max(n, 1)
        out[:, j] = lo[j] + strata * (hi[j] - lo[j])
    return out


def _rootfinder(model):
    """Newton rootfinder g(x; u, d, z, p) = xdot, compiled once and cached on the model."""
    rf = getattr(model, "steady_rootfinder_", None)
    if rf is not None:
        return rf
    x = ca.MX.sym("x", model.nx)
    par = ca.MX.sym("par", model.p_layout_.size)
    g = ca.Function("steady_residual", [x, par], [model.ode_(x=x, **model.unpack_inputs(par))["xdot"]],
                    ["x", "p"], ["xdot"])
    try:
        rf = ca.rootfinder(f"{model.name}_steady", "newton", g, {
            "error_on_fail": False, "abstol": 1e-12, "abstolStep": 1e-14, "max_iter": 60,
            "show_eval_warnings": False, "print_iteration": False})
    except RuntimeError:
        # structurally singular Jacobian (an integrating state such as a level whose outflow does
        # not depend on it): steady states are not isolated; use least squares instead
        rf = False
    model.steady_rootfinder_ = rf
    return rf


def _inputs(model, u, d, where: str) -> tuple[np.ndarray, np.ndarray]:
    u = model.vector("mv", u, what=f"{where}: u")
    d = model.vector("dv", d, what=f"{where}: d")
    for role, vec in (("mv", u), ("dv", d)):
        bad = [n for n, v in zip(model.names(role), vec) if not math.isfinite(v)]
        if bad:
            raise OperatingPointError(f"{where}: the {role} value(s) of {', '.join(bad)} are not finite.")
    return u, d


def _in_box(model, x: np.ndarray, tol: float = 1e-7) -> bool:
    lo, hi = model.bounds("state")
    sc = _scale(lo, hi, model.nominal("state"))
    return bool(np.all(x >= lo - tol * sc) and np.all(x <= hi + tol * sc))


def _converged(model, x, u, d, z, p) -> bool:
    if not np.all(np.isfinite(x)):
        return False
    xdot = model.rhs(x, u, d, z, p)
    lo, hi = model.bounds("state")
    sc = _scale(lo, hi, model.nominal("state"))
    return bool(np.all(np.isfinite(xdot)) and np.all(np.abs(xdot) <= 1e-8 * np.maximum(sc, 1.0)))


def _least_squares_root(model, x0, u, d, z, p):
    """Bounded least squares on xdot = 0 (fallback for singular Jacobians)."""
    from scipy.optimize import least_squares

    lo, hi = model.bounds("state")
    x0 = np.clip(x0, np.where(np.isfinite(lo), lo, -np.inf), np.where(np.isfinite(hi), hi, np.inf))

    def f(x):
        return model.rhs(x, u, d, z, p)

    def jac(x):
        return np.asarray(model.jac_(x=x, u=u, d=d, z=z, p=p)["A"], float).reshape(model.nx, model.nx)

    try:
        sol = least_squares(f, x0, jac=jac, bounds=(lo, hi), xtol=1e-15, ftol=1e-15, gtol=1e-15,
                            max_nfev=200 * max(model.nx, 1))
    except ValueError:
        return None
    return sol.x


def _steady_jacobians(model, x, u, d, p):
    """Jacobians of xdot and y with respect to x and u at steady state (delayed copies of an MV
    move with it: the chain rule through ``z = u``)."""
    z = model.z_of(u, d)
    J = model.jac_(x=x, u=u, d=d, z=z, p=p)
    A, B, Bz, C, D, Dz = (np.asarray(J[k], float) for k in ("A", "B", "Bz", "C", "D", "Dz"))
    A, C = A.reshape(model.nx, model.nx), C.reshape(model.ny, model.nx)
    B, D = B.reshape(model.nx, model.nu), D.reshape(model.ny, model.nu)
    if model.nz:
        Bz, Dz = Bz.reshape(model.nx, model.nz), Dz.reshape(model.ny, model.nz)
        # dz/du: column i is the delayed inputs when MV i is 1 and everything else 0
        S = np.zeros((model.nz, model.nu))
        for i, e in enumerate(np.eye(model.nu)):
            S[:, i] = model.z_of(e, np.zeros(model.nd))
        B, D = B + Bz @ S, D + Dz @ S
    return A, B, C, D


def _newton(residual, jacobian, v0, *, max_iter: int = 40, tol: float = 1e-14):
    """Newton's method with minimum-norm (least-squares) steps and step halving, in scaled units.

    Works for square and underdetermined systems alike: where the solution is not unique (an
    integrating state, more MVs than targets) the minimum-norm step leaves the free directions
    where they started.  Returns ``(v, max |residual|)``.
    """
    v = np.asarray(v0, float).copy()
    r = residual(v)
    if not np.all(np.isfinite(r)):
        return v, math.inf
    best = float(np.max(np.abs(r), initial=0.0))
    for _ in range(max_iter):
        if best <= tol:
            break
        J = jacobian(v)
        if not np.all(np.isfinite(J)):
            break
        step = np.linalg.lstsq(J, -r, rcond=1e-13)[0]
        t = 1.0
        for _half in range(30):
            vn = v + t * step
            rn = residual(vn)
            mn = float(np.max(np.abs(rn), initial=0.0)) if np.all(np.isfinite(rn)) else math.inf
            if mn < best:
                break
            t *= 0.5
        else:
            break
        v, r, best = vn, rn, mn
    return v, best


def _pin_free_states(model, x_star, xg, u, d, p):
    """Where steady states are not isolated (a level that integrates), the steady state whose
    free states take their values from the guess *xg*.

    The free directions are the null space of the state Jacobian at a steady state *x_star*;
    the states that carry them (pivoted QR of the null-space basis, in scaled units) are held at
    the guess and the others solved by Newton's method from the guess.  Returns None if there is
    nothing free or Newton's method does not converge.
    """
    import scipy.linalg as sla

    lo, hi = model.bounds("state")
    sc = _scale(lo, hi, model.nominal("state"))
    A = _steady_jacobians(model, x_star, u, d, p)[0] * sc[None, :] / np.maximum(sc, 1e-12)[:, None]
    sv = np.linalg.svd(A, compute_uv=False)
    k = int(np.sum(sv <= 1e-9 * max(sv[0] if sv.size else 1.0, 1e-300)))
    if k == 0:
        return None
    N = sla.null_space(A, rcond=1e-9)
    if N.shape[1] == 0:
        return None
    _q, _r, piv = sla.qr(N.T, pivoting=True)
    pinned = np.zeros(model.nx, bool)
    pinned[piv[:N.shape[1]]] = True
    free = ~pinned
    z = model.z_of(u, d)
    xs = np.where(pinned, xg, x_star)

    def res(v):
        x = xs.copy()
        x[free] = v * sc[free]
        return model.rhs(x, u, d, z, p) / np.maximum(sc, 1e-12)

    def jac(v):
        x = xs.copy()
        x[free] = v * sc[free]
        Ax = _steady_jacobians(model, x, u, d, p)[0]
        return (Ax / np.maximum(sc, 1e-12)[:, None])[:, free] * sc[free][None, :]

    best = None
    for start in (xg, x_star):
        v, err = _newton(res, jac, start[free] / sc[free])
        x = xs.copy()
        x[free] = v * sc[free]
        if err <= 1e-12 and _converged(model, x, u, d, z, p) and _in_box(model, x):
            best = x
            break
    return best


def steady_states(model, u: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                  d: Mapping[str, float] | Sequence[float] | np.ndarray | None = None, *,
                  starts: Sequence[Sequence[float]] | np.ndarray | None = None, n_starts: int = 24,
                  rng: int | np.random.Generator | None = None) -> list[OperatingPoint]:
    """Every steady state of *model* inside its state bounds for the given MVs and DVs.

    Parameters
    ----------
    model : Model
        A built model.
    u, d : mapping name -> value, or sequence, optional
        MV and DV values (missing names take their nominal values).
    starts : array_like (k, nx), optional
        Extra starting states, tried first after the nominal state.
    n_starts : int
        Number of further starting points drawn (Latin hypercube) inside the state bounds.
    rng : int, numpy Generator or None
        Seed or generator for those draws (``None``: a fixed seed, so results are reproducible).

    Returns
    -------
    list of OperatingPoint
        Distinct steady states inside the bounds, sorted by the first state, each with its
        eigenvalues and ``stable`` flag.  Empty if none was found.
    """
    where = f"steady_states(model '{getattr(model, 'name', model)}')"
    _require(model, where)
    if not (isinstance(n_starts, (int, np.integer)) and n_starts >= 0):
        raise OperatingPointError(f"{where}: n_starts must be an int >= 0; got {n_starts!r}.")
    u, d = _inputs(model, u, d, where)
    z = model.z_of(u, d)
    p = model.p
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(0 if rng is None else rng)
    cand = [model.nominal("state")]
    if starts is not None:
        st = np.atleast_2d(np.asarray(starts, float))
        if st.shape[1] != model.nx:
            raise OperatingPointError(
                f"{where}: each start must have {model.nx} state values ({', '.join(model.state_names)}); "
                f"got shape {np.shape(starts)}.")
        cand.extend(st)
    rf = _rootfinder(model)
    if n_starts and rf is not False:
        cand.extend(_sample_box(model, int(n_starts), gen))
    par = model.pack_inputs(u, d, z, p)
    found: list[np.ndarray] = []
    if rf is not False:
        for x0 in cand:
            xs = np.asarray(rf(x0=x0, p=par)["x"], float).reshape(-1)
            if _converged(model, xs, u, d, z, p) and _in_box(model, xs):
                found.append(xs)
    if not found:
        # Newton failed everywhere or the Jacobian is structurally singular (steady states not
        # isolated): bounded least squares from the nominal state and the given starts only
        for x0 in cand:
            xs = _least_squares_root(model, x0, u, d, z, p)
            if xs is not None and _converged(model, xs, u, d, z, p) and _in_box(model, xs):
                found.append(xs)
    lo, hi = model.bounds("state")
    sc = _scale(lo, hi, model.nominal("state"))
    unique: list[np.ndarray] = []
    for xs in found:
        if not any(np.max(np.abs(xs - q) / sc, initial=0.0) < 1e-6 for q in unique):
            unique.append(xs)
    unique.sort(key=lambda v: tuple(v))
    return [OperatingPoint.at(model, xs, u, d) for xs in unique]


def steady_state(model, u: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                 d: Mapping[str, float] | Sequence[float] | np.ndarray | None = None, *,
                 x_guess: Mapping[str, float] | Sequence[float] | np.ndarray | None = None,
                 n_starts: int = 8) -> OperatingPoint:
    """The steady state nearest *x_guess* (default: the nominal state) for the given MVs and DVs.

    :func:`steady_states` searches from the guess, the nominal state and *n_starts* further points
    (fixed seed); the steady state nearest the guess (Euclidean distance in units of the states'
    ranges) is returned.  Where the steady states are not isolated (an integrating level), the
    free states keep their guessed values (a free choice at steady state) and Newton's method
    solves for the others.

    Raises
    ------
    OperatingPointError
        If no steady state inside the state bounds is found.
    """
    where = f"steady_state(model '{getattr(model, 'name', model)}')"
    _require(model, where)
    xg = model.vector("state", x_guess, what=f"{where}: x_guess")
    uu, dd = _inputs(model, u, d, where)
    ops = steady_states(model, uu, dd, starts=[xg], n_starts=n_starts)
    if not ops:
        ul = ", ".join(f"{n}={v:g}" for n, v in zip(model.mv_names, uu))
        raise OperatingPointError(
            f"{where}: no steady state inside the state bounds for MVs ({ul}); the unit may not "
            f"settle at these inputs (e.g. a level that keeps rising because inflow exceeds outflow). "
            f"Check the MV and DV values, or use solve_targets() to find consistent MVs.")
    lo, hi = model.bounds("state")
    sc = _scale(lo, hi, model.nominal("state"))
    if any(op.eigenvalues.size and np.min(np.abs(op.eigenvalues)) < 1e-9 for op in ops):
        # steady states not isolated (an integrating state): its value is free at steady state
        # and is taken from the guess
        xp = _pin_free_states(model, ops[0].x, xg, uu, dd, model.p)
        if xp is not None:
            ops = [OperatingPoint.at(model, xp, uu, dd)] + list(ops)
    # nearest in scaled units (Euclidean: no ties between candidates that differ in a state
    # other than the one farthest from the guess)
    return min(ops, key=lambda op: float(np.sqrt(np.sum(((op.x - xg) / sc) ** 2))))
