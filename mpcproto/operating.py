"""Operating points: steady states of a model and the target problem.

This module holds the :class:`OperatingPoint` data type used by every later layer and the three
ways to find one:

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

from .exceptions import NotBuiltError, OperatingPointError
from .model import suggest

__all__ = ["OperatingPoint", "TargetResult", "steady_states", "steady_state", "solve_targets"]

#: weight of the MV term of the target problem: small enough not to pull reachable targets off
#: (the bias it causes is of this order relative to the CV scales), large enough to pick one answer
REGULARIZATION = 1e-10
#: a reached target whose residual is above this fraction of its value (or of its CV's scale) is
#: reported as not reached to solver precision
EXACT = 1e-10


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
        A = np.asarray(model.jac_(x, u, d, z, p)[0], float)
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
    nx, nu, nd, nz, npar = model.nx, model.nu, model.nd, model.nz, len(model.p)
    x = ca.MX.sym("x", nx)
    par = ca.MX.sym("par", nu + nd + nz + npar)
    u, d = par[:nu], par[nu:nu + nd]
    z, p = par[nu + nd:nu + nd + nz], par[nu + nd + nz:]
    g = ca.Function("steady_residual", [x, par], [model.ode_(x, u, d, z, p)])
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
        return np.asarray(model.jac_(x, u, d, z, p)[0], float).reshape(model.nx, model.nx)

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
    A, B, _Bd, Bz, C, D, _Dd, Dz = (np.asarray(M, float) for M in model.jac_(x, u, d, z, p))
    A, C = A.reshape(model.nx, model.nx), C.reshape(model.ny, model.nx)
    B, D = B.reshape(model.nx, model.nu), D.reshape(model.ny, model.nu)
    if model.nz:
        Bz, Dz = Bz.reshape(model.nx, model.nz), Dz.reshape(model.ny, model.nz)
        S = np.zeros((model.nz, model.nu))
        for r, (role, i) in enumerate(model._z_src):
            if role == "mv":
                S[r, i] = 1.0
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
    par = np.concatenate([u, d, z, p])
    found: list[np.ndarray] = []
    if rf is not False:
        for x0 in cand:
            xs = np.asarray(rf(x0, par), float).reshape(-1)
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


def _target_solver(model):
    """IPOPT NLP for the target problem, built once per model (cached on the model)."""
    sol = getattr(model, "target_solver_", None)
    if sol is not None:
        return sol
    nx, nu, nd, ny, npar = model.nx, model.nu, model.nd, model.ny, len(model.p)
    x = ca.MX.sym("x", nx)
    u = ca.MX.sym("u", nu)
    P = ca.MX.sym("P", nd + npar + 3 * ny + 2 * nu + 2 * nx)
    o = 0
    d = P[o:o + nd]; o += nd  # noqa: E702
    p = P[o:o + npar]; o += npar  # noqa: E702
    t = P[o:o + ny]; o += ny  # noqa: E702
    w = P[o:o + ny]; o += ny  # noqa: E702
    sy = P[o:o + ny]; o += ny  # noqa: E702
    uref = P[o:o + nu]; o += nu  # noqa: E702
    su = P[o:o + nu]; o += nu  # noqa: E702
    sx = P[o:o + nx]; o += nx  # noqa: E702
    xref = P[o:o + nx]; o += nx  # noqa: E702
    zs = []
    for dl in model.delays:
        i = model.names(dl.source_role).index(dl.source)
        zs.append(u[i] if dl.source_role == "mv" else d[i])
    z = ca.vertcat(*zs) if zs else ca.MX(0, 1)
    y = model.out_(x, u, d, z, p)
    f = model.ode_(x, u, d, z, p)
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
        raise OperatingPointError(f"{where}: targets must be a non-empty mapping CV name -> value; "
                                  f"got {targets!r}.")
    cvs = model.cv_names
    tvec = np.zeros(model.ny)
    wvec = np.zeros(model.ny)
    tdict: dict[str, float] = {}
    for k, v in targets.items():
        if k not in cvs:
            raise OperatingPointError(f"{where}: target '{k}' is not a CV of the model{suggest(str(k), cvs)}; "
                                      f"its CVs are: {', '.join(cvs)}.")
        try:
            fv = float(v)
        except (TypeError, ValueError):
            fv = math.nan
        if not math.isfinite(fv):
            raise OperatingPointError(f"{where}: the target for '{k}' must be a finite number; got {v!r}.")
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
            raise OperatingPointError(f"{where}: fixed_mvs names '{k}', which is not an MV"
                                      f"{suggest(str(k), model.mv_names)}; MVs: {', '.join(model.mv_names)}.")
        i = model.mv_names.index(k)
        fv = float(v)
        if not (ulo[i] <= fv <= uhi[i]):
            raise OperatingPointError(f"{where}: fixed MV '{k}' = {fv:g} is outside its bounds "
                                      f"[{ulo[i]:g}, {uhi[i]:g}].")
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
    P = np.concatenate([dd, model.p, tvec, wvec, sy, u0, su, sxdot, x0])
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
