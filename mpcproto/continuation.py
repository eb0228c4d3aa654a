r"""Steady states of a model as one MV, DV or parameter moves: the locus, its folds and stability.

:func:`steady_state_locus` follows the branch of steady states through a starting point by
pseudo-arclength continuation (Keller 1977; the textbook predictor-corrector method, e.g. Seydel,
*Practical Bifurcation and Stability Analysis*, from memory): the unknowns are the states and the
moving variable ``lam`` together, each step predicts along the tangent of the branch and corrects
by Newton's method on

.. math:: f(x, \lambda) = 0, \qquad t^T (v - v_{pred}) = 0,

so the branch is followed through the folds (turning points) where steady states appear and
disappear -- the exothermic reactor's window of three steady states, for instance.  A fold is where
``d lam / ds`` changes sign; it is located by bisection on the step length to a tolerance.  Every
point carries the eigenvalues of the state Jacobian, so the stable and unstable parts of the branch
are known.  Variables are scaled by their physical ranges (or nominal values) so that states and
``lam`` count alike.

The derivatives are CasADi's exact ones (the model's ``jac_`` for the states, MVs and DVs; a
Jacobian with respect to the parameters built once here).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .exceptions import OperatingPointError
from .validation import fail, shown
from .model import suggest

__all__ = ["SteadyStateLocus", "steady_state_locus", "plot_locus"]


@dataclass
class SteadyStateLocus:
    """A branch of steady states: ``values[k]`` of the moving variable with states ``x[k]``."""

    variable: str
    role: str
    unit: str
    values: np.ndarray
    x: np.ndarray
    y: np.ndarray
    stable: np.ndarray
    folds: list[dict[str, Any]] = field(default_factory=list)
    state_names: tuple[str, ...] = ()
    cv_names: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        return {"variable": self.variable, "role": self.role, "unit": self.unit,
                "values": self.values.tolist(), "states": {n: self.x[:, i].tolist()
                                                           for i, n in enumerate(self.state_names)},
                "cvs": {n: self.y[:, i].tolist() for i, n in enumerate(self.cv_names)},
                "stable": [bool(s) for s in self.stable], "folds": self.folds}


def _role_of(model, name: str) -> str:
    for role in ("mv", "dv", "parameter"):
        if name in model.names(role):
            return role
    known = list(model.names("mv")) + list(model.names("dv")) + list(model.names("parameter"))
    raise fail("steady_state_locus()", "variable",
               f"an MV, DV or parameter of model '{model.name}' (one of {known})",
               f"{name!r}{suggest(name, known)}")


def steady_state_locus(model, variable: str, low: float, high: float, *, op=None,
                       step: float = 0.01, max_points: int = 5000, tol: float = 1e-10,
                       fold_tol: float = 1e-9) -> SteadyStateLocus:
    """Follow the steady states of *model* while *variable* moves between *low* and *high*.

    Parameters
    ----------
    model : Model
        A built model.
    variable : str
        Name of an MV, DV or parameter.
    low, high : float
        The range of the variable; the branch is followed in both directions from the start until
        it leaves this range (or the states leave their physical bounds).
    op : OperatingPoint, optional
        The starting steady state (default: :func:`mpcproto.steady_state` at the nominal values).
        The other MVs, DVs and parameters stay at their values there.
    step : float
        Arclength step in scaled units (ranges of the variables = 1).
    max_points : int
        Most points per direction.
    tol : float
        Newton tolerance on the scaled residual.
    fold_tol : float
        Tolerance (scaled arclength) to which a fold is located.

    Returns
    -------
    SteadyStateLocus
        Points ordered along the branch; ``folds`` lists each turning point with its value, states
        and CVs.
    """
    import casadi as ca

    from .operating import OperatingPoint, steady_state

    role = _role_of(model, variable)
    if not (math.isfinite(low) and math.isfinite(high) and low < high):
        raise fail("steady_state_locus()", "high", "finite low < high",
                   f"low = {low!r}, high = {high!r}")
    if not (0 < step < 1):
        raise fail("steady_state_locus()", "step", "a number in (0, 1)", shown(step))
    op = steady_state(model) if op is None else op
    j = list(model.names(role)).index(variable)
    u0, d0, p0 = np.array(op.u, float), np.array(op.d, float), np.array(model.p, float)
    nx = model.nx
    var = model.variable(variable)
    lam0 = {"mv": u0, "dv": d0, "parameter": p0}[role][j]
    # scales: states by their bounds (or nominal), lam by its range
    slo, shi = model.bounds("state")
    nomx = model.nominal("state")
    sx = np.where(np.isfinite(shi - slo), shi - slo, np.maximum(np.abs(nomx), 1.0))
    sl = float(high - low)
    # f(x, lam) and its Jacobians, built once
    xs = ca.SX.sym("x", nx)
    ls = ca.SX.sym("lam")
    vals = {"mv": list(u0), "dv": list(d0), "parameter": list(p0)}
    vals[role][j] = ls
    u, d, p = (ca.vertcat(*[ca.SX(v) if not isinstance(v, ca.SX) else v for v in vals[r]])
               if vals[r] else ca.SX(0, 1) for r in ("mv", "dv", "parameter"))
    z = model.z_of(u, d)
    f = model.ode_(x=xs, u=u, d=d, z=z, p=p)["xdot"]
    yexpr = model.out_(x=xs, u=u, d=d, z=z, p=p)["y"]
    F = ca.Function("locus_f", [xs, ls], [f, ca.jacobian(f, xs), ca.jacobian(f, ls), yexpr],
                    ["x", "lam"], ["f", "fx", "fl", "y"])

    def ev(v):
        x, lam = v[:nx] * sx, v[nx] * sl
        r = F(x=x, lam=lam)
        fx = np.asarray(r["fx"], float) * sx[None, :]
        fl = np.asarray(r["fl"], float).reshape(-1) * sl
        return np.asarray(r["f"], float).reshape(-1), np.hstack([fx, fl[:, None]]), np.asarray(r["y"], float).reshape(-1)

    def tangent(v, prev=None):
        _, J, _ = ev(v)
        # null vector of the nx x (nx+1) Jacobian
        _, _, Vt = np.linalg.svd(J)
        t = Vt[-1]
        if prev is not None and t @ prev < 0:
            t = -t
        return t / np.linalg.norm(t)

    def correct(vp, t):
        v = vp.copy()
        fscale = 1.0
        for it in range(30):
            fv, J, _y = ev(v)
            res = np.concatenate([fv, [t @ (v - vp)]])
            if np.max(np.abs(res)) <= tol * fscale and it > 0:
                return v
            Jt = np.vstack([J, t[None, :]])
            try:
                dv = np.linalg.solve(Jt, -res)
            except np.linalg.LinAlgError:
                return None
            v = v + dv
            if np.max(np.abs(dv)) < 1e-14:
                return v
        fv, _, _ = ev(v)
        return v if np.max(np.abs(fv)) <= 1e3 * tol else None

    v0 = np.concatenate([np.asarray(op.x, float) / sx, [lam0 / sl]])
    if np.max(np.abs(ev(v0)[0])) > 1e-6:
        raise OperatingPointError(f"steady_state_locus(): the starting point is not a steady state "
                                  f"of '{model.name}' (largest derivative "
                                  f"{np.max(np.abs(ev(v0)[0])):.3g}); pass a steady state as op.")

    def inside(v):
        x, lam = v[:nx] * sx, v[nx] * sl
        return low <= lam <= high and np.all(x >= slo - 1e-9 * sx) and np.all(x <= shi + 1e-9 * sx)

    def walk(direction):
        pts, folds = [], []
        t = tangent(v0)
        t = t * direction
        v = v0
        for _ in range(int(max_points)):
            h = step
            while True:
                vn = correct(v + h * t, t)
                if vn is not None:
                    break
                h /= 2
                if h < 1e-8:
                    return pts, folds
            tn = tangent(vn, t)
            if tn[nx] * t[nx] < 0 and abs(t[nx]) > 0:          # d lam/ds changed sign: a fold
                a, b = 0.0, h
                while b - a > fold_tol:
                    m = 0.5 * (a + b)
                    vm = correct(v + m * t, t)
                    if vm is None:
                        break
                    if tangent(vm, t)[nx] * t[nx] < 0:
                        b = m
                    else:
                        a = m
                vf = correct(v + 0.5 * (a + b) * t, t)
                if vf is not None and inside(vf):
                    folds.append(vf)
            if not inside(vn):
                return pts, folds
            pts.append(vn)
            v, t = vn, tn
        return pts, folds

    fwd, f1 = walk(+1.0)
    bwd, f2 = walk(-1.0)
    path = bwd[::-1] + [v0] + fwd
    V = np.array(path)
    X = V[:, :nx] * sx
    lam = V[:, nx] * sl
    Y, stab = [], []
    for k in range(len(V)):
        uu, dd = u0.copy(), d0.copy()
        mdl = model
        if role == "mv":
            uu[j] = lam[k]
        elif role == "dv":
            dd[j] = lam[k]
        else:
            mdl = model.with_parameters({variable: float(lam[k])})
        pt = OperatingPoint.at(mdl, X[k], uu, dd)
        Y.append(pt.y)
        stab.append(bool(pt.stable))
    folds = []
    for vf in f2[::-1] + f1:
        _, _, yv = ev(vf)
        folds.append({"value": float(vf[nx] * sl),
                      "states": dict(zip(model.state_names, map(float, vf[:nx] * sx))),
                      "cvs": dict(zip(model.cv_names, map(float, yv)))})
    return SteadyStateLocus(variable, role, var.unit, lam, X, np.array(Y), np.array(stab, bool),
                            folds, tuple(model.state_names), tuple(model.cv_names))


def plot_locus(locus: SteadyStateLocus, path, *, cv: str | None = None) -> None:
    """Plot a CV (default: the first) against the moving variable, stable parts solid, unstable
    dashed, folds marked; writes a PNG to *path*."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    name = cv or locus.cv_names[0]
    if name not in locus.cv_names:
        raise fail("plot_locus()", "cv", f"a CV of the locus (one of {list(locus.cv_names)})",
                   repr(name))
    i = locus.cv_names.index(name)
    fig, ax = plt.subplots(figsize=(7, 4.5))
    st = locus.stable
    for flag, style, lab in ((True, "-", "stable"), (False, "--", "unstable")):
        mask = st == flag
        # each part is drawn up to the neighbouring points so that the branch has no gaps
        near = mask | np.concatenate([mask[1:], [False]]) | np.concatenate([[False], mask[:-1]])
        yv = np.where(near, locus.y[:, i], np.nan)
        if mask.any():
            ax.plot(locus.values, yv, style, color="tab:blue" if flag else "tab:red", label=lab)
    for fpt in locus.folds:
        ax.plot(fpt["value"], fpt["cvs"][name], "ko")
        ax.annotate(f"fold {fpt['value']:.4g}", (fpt["value"], fpt["cvs"][name]),
                    textcoords="offset points", xytext=(6, 6), fontsize=8)
    ax.set_xlabel(f"{locus.variable} [{locus.unit}]".replace("$", r"\$"))
    ax.set_ylabel(name.replace("$", r"\$"))
    ax.set_title("Steady states (simulation model only)")
    ax.grid(True, alpha=0.3)
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
