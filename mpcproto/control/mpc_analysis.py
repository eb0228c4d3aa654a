"""Linear analysis of the unconstrained predictive controller: its control law, closed-loop
eigenvalues (nominal and against a mismatched plant), sensitivity peak and optimal cost.

With no constraint active a :class:`~mpcproto.control.mpc.PredictiveController` is a linear
time-invariant controller.  The pieces, all in deviation variables around the model's operating
point and engineering units:

* the **dynamic QP** (:class:`~mpcproto.control.condensed.CondensedQP`): ``0.5 U'HU + f(z)'U``
  with ``f`` linear in the input vector ``z`` (state estimate, disturbance estimates, previous MVs,
  measured DVs, setpoint band, preferred MVs, terminal state); unconstrained ``U = -H^-1 f(z)`` and
  the applied move is the first block of ``U``.  ``f``'s columns are read from the controller's own
  QP data (:meth:`CondensedQP.data`), so the law is the QP's, not a re-derivation of it;
* the **steady target** (with ``steady_target``): with no limit active its lexicographic QP has a
  solution linear in (disturbance estimates, DVs, setpoints, preferred MVs); that map is measured by
  solving the controller's own target at unit inputs (exact: DAQP, no limits);
* the **estimator**: the steady-state Kalman filter of
  :class:`~mpcproto.control.estimator.DisturbanceEstimator` with every CV measured each sample
  (filter form: ``a+ = a + L (y - Ca a - D u_prev)``, prediction ``a' = Aa a+ + Ba u``).

The analysis assumes every CV with a weight is on a setpoint (a CV inside its zone has no weight
in the unconstrained loop; one at its zone edge behaves as on a setpoint), no MV or rate limit
active, every CV measured every sample and no late measurement.

Closed loop: plant state ``xp``, estimator prior ``a`` and the previous MV ``u_prev`` (the move
suppression and the estimator's ``D`` term remember it).  The plant follows the estimator's
convention ``y[k] = C x[k] + D u[k-1]``.  A mismatched plant scales every column of ``B`` (and
``D``) by a gain factor, or delays every MV by extra samples (one delay state per MV and sample).

The sensitivity is the **output sensitivity** ``S(z) = (I + P(z) K(z))^-1`` with the loop broken at
the plant output (``y = S d`` for an additive disturbance ``d`` on the measured CVs;
``u = -K y`` is the controller from measurement to MV with setpoints at zero), on the
controller's own model, over ``w`` from ``pi 1e-5`` to ``pi`` rad/sample.

Caution: linear figures of a simulation model.  A real controller needs plant tests, independent
safety systems, management of change and the judgement of licensed engineers.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from ..exceptions import NotBuiltError
from ..validation import fail, shown
from .condensed import CondensedQP

__all__ = ["UnconstrainedLaw", "MismatchCase", "UnconstrainedAnalysis", "unconstrained_law",
           "closed_loop_matrix", "unconstrained_analysis", "optimal_cost"]

#: spectral radius above which a loop counts as unstable (round-off margin on a radius of 1)
STABLE_BELOW = 1.0 - 1e-9


@dataclass
class UnconstrainedLaw:
    """``u = Kx x + Kw w + Ku u_prev + Ksp sp + Kd d + Kpref pref`` (deviations, engineering
    units; ``x``, ``w`` the filtered estimates).  ``L``: the estimator's steady-state Kalman gain
    (rows: states then disturbances), ``Aa, Ba, Ca, D``: the estimator's augmented model."""

    Kx: np.ndarray
    Kw: np.ndarray
    Ku: np.ndarray
    Ksp: np.ndarray
    Kd: np.ndarray
    Kpref: np.ndarray
    L: np.ndarray
    Aa: np.ndarray
    Ba: np.ndarray
    Ca: np.ndarray
    D: np.ndarray


@dataclass
class MismatchCase:
    """One plant of the robustness table: ``kind`` ("nominal", "gain", "dead_time"), ``value``
    (gain factor or extra samples), spectral radius of the closed loop and stable yes/no."""

    kind: str
    value: float
    spectral_radius: float
    stable: bool


@dataclass
class UnconstrainedAnalysis:
    """Result of :func:`unconstrained_analysis` (see the module text for the conventions)."""

    law: UnconstrainedLaw
    eigenvalues: np.ndarray
    spectral_radius: float
    stable: bool
    cases: list[MismatchCase]
    sensitivity_peak: float
    sensitivity_peak_w: float       # rad per model time unit
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {"spectral_radius": self.spectral_radius, "stable": self.stable,
                "cases": [asdict(c) for c in self.cases],
                "sensitivity_peak": self.sensitivity_peak,
                "sensitivity_peak_w": self.sensitivity_peak_w,
                "loop_broken_at": "plant output", "warnings": list(self.warnings)}


# ---------------------------------------------------------------------------------------- law
def _check(ctrl) -> None:
    if not getattr(ctrl, "is_built", False):
        raise NotBuiltError("unconstrained_analysis(): the PredictiveController is not built; "
                            "call .build() first.")


def _condensed(ctrl) -> CondensedQP:
    """The controller's condensed QP (built here from its own data when it solves another way)."""
    if ctrl.condensed_ is not None:
        return ctrl.condensed_
    m, s = ctrl.dmodel, ctrl.scaled_
    return CondensedQP(m.A, m.B, m.C, m.D, ctrl._Bd, ctrl._Dd, ctrl._Bw, ctrl._Cw, N=ctrl._N,
                       M=ctrl._M, scales=(ctrl._sx, ctrl._su, ctrl._sy), weights=s,
                       terminal=ctrl.terminal_weight_, inputs=ctrl._zsl).build()


def _free_z(ctrl) -> np.ndarray:
    """Input vector with no limit, no rate, every CV on a setpoint at the operating point."""
    zs = ctrl._zsl
    z = np.zeros(ctrl._z.size)
    for k, v in (("lim_lo", -np.inf), ("lim_hi", np.inf), ("u_lo", -np.inf), ("u_hi", np.inf),
                 ("rate", np.inf)):
        z[zs[k]] = v
    return z


def _first_move_map(ctrl, cond: CondensedQP) -> dict[str, np.ndarray]:
    """d(first move)/d(block) of the unconstrained QP for each input block (engineering units)."""
    zs = ctrl._zsl
    z0 = _free_z(ctrl)
    H, f0 = cond.data(z0)[:2]
    H, f0 = H.copy(), f0.copy()
    nu = ctrl.dmodel.nu
    su = ctrl._su
    blocks = ["x0", "w", "u_prev", "pref"] + (["d_now"] if ctrl.dmodel.nd else []) \
        + (["x_term"] if ctrl.terminal_weight_ is not None else [])
    out = {}
    Hinv_first = np.linalg.solve(H, np.eye(H.shape[0]))[:nu] * su[:, None]

    def column(z):
        return -Hinv_first @ (cond.data(z)[1] - f0)

    for b in blocks:
        sl = zs[b]
        cols = []
        for i in range(sl.stop - sl.start):
            z = z0.copy()
            z[sl.start + i] = 1.0
            cols.append(column(z))
        out[b] = np.array(cols).T.reshape(nu, -1)
    cols = []
    for i in range(ctrl.dmodel.ny):      # a setpoint moves both ends of the band
        z = z0.copy()
        z[zs["band_lo"].start + i] = 1.0
        z[zs["band_hi"].start + i] = 1.0
        cols.append(column(z))
    out["band"] = np.array(cols).T.reshape(nu, -1)
    out["_H"] = H
    return out


def _target_map(ctrl) -> dict[str, np.ndarray]:
    """Linear map of the steady target (no limit active): d(us, ys, xs)/d(w, d, sp, pref)."""
    m = ctrl.dmodel
    ts = ctrl._tsl
    tz0 = np.zeros(ctrl._tz.size)
    for k, v in (("lim_lo", -np.inf), ("lim_hi", np.inf), ("mv_lo", -np.inf),
                 ("mv_hi", np.inf)):
        tz0[ts[k]] = v

    def solve(tz):
        res = ctrl.target_.solve(tz, fast=True, solver=ctrl._cvxpy_solver,
                                 options=ctrl._cvxpy_opts)
        if not res.accepted:
            raise fail("unconstrained_analysis()", "controller",
                       "a steady target that solves with no limits (else the unconstrained law is "
                       "not defined)", f"status {res.status}")
        v = res.values
        return np.concatenate([v["us"], v["ys"], v["xs"]])

    base = solve(tz0)
    out = {}
    groups = {"w": [ts["w"]], "sp": [ts["band_lo"], ts["band_hi"]], "pref": [ts["pref"]]}
    if m.nd:
        groups["d"] = [ts["d"]]
    for g, sls in groups.items():
        n = sls[0].stop - sls[0].start
        cols = []
        for i in range(n):
            tz = tz0.copy()
            for sl in sls:
                tz[sl.start + i] = 1.0
            cols.append(solve(tz) - base)
        J = np.array(cols).T.reshape(-1, n)
        out[g] = (J[:m.nu], J[m.nu:m.nu + m.ny], J[m.nu + m.ny:])
    return out


def unconstrained_law(controller) -> UnconstrainedLaw:
    """The equivalent linear control law of a built controller with no constraint active."""
    _check(controller)
    m = controller.dmodel
    nu, ny, nd, nx = m.nu, m.ny, m.nd, m.nx
    cond = _condensed(controller)
    g = _first_move_map(controller, cond)
    Kx, Kw, Ku = g["x0"], g["w"], g["u_prev"]
    Kd = g.get("d_now", np.zeros((nu, nd)))
    if controller.target_ is not None:
        T = _target_map(controller)
        Kxt = g.get("x_term", np.zeros((nu, nx)))

        def through(key):
            us, ys, xs = T[key]
            return g["band"] @ ys + g["pref"] @ us + Kxt @ xs

        Kw = Kw + through("w")
        Ksp = through("sp")
        Kpref = through("pref")
        if nd:
            Kd = Kd + through("d")
    else:
        Ksp, Kpref = g["band"], g["pref"]
    est = controller.estimator_
    return UnconstrainedLaw(Kx=Kx, Kw=Kw, Ku=Ku, Ksp=Ksp, Kd=Kd, Kpref=Kpref, L=est.gain_.copy(),
                            Aa=est.A_, Ba=est.Ba_, Ca=est.C_, D=est.D_)


# ---------------------------------------------------------------------------------------- loop
def _plant(plant, controller):
    if plant is None:
        m = controller.dmodel
        return tuple(np.asarray(a, float) for a in (m.A, m.B, m.C, m.D))
    try:
        if hasattr(plant, "A"):
            mats = (plant.A, plant.B, plant.C, plant.D)
        else:
            mats = tuple(plant)
        A, B, C, D = (np.atleast_2d(np.asarray(a, float)) for a in mats)
    except (TypeError, ValueError):
        raise fail("unconstrained_analysis()", "plant", "a discrete model or a tuple (A, B, C, D)",
                   type(plant).__name__) from None
    m = controller.dmodel
    if B.shape[1] != m.nu or C.shape[0] != m.ny or A.shape[0] != A.shape[1] != B.shape[0] \
            or D.shape != (m.ny, m.nu):
        raise fail("unconstrained_analysis()", "plant",
                   f"a square A and {m.nu} MVs and {m.ny} CVs (the controller's)",
                   f"A {A.shape}, B {B.shape}, C {C.shape}, D {D.shape}")
    return A, B, C, D


def _shift(A, B, C):
    """(A, B, C) followed by one shift register per MV: the new states hold u[k-1]."""
    nx, nu = A.shape[0], B.shape[1]
    A2 = np.zeros((nx + nu, nx + nu))
    A2[:nx, :nx] = A
    A2[:nx, nx:] = B
    B2 = np.vstack([np.zeros((nx, nu)), np.eye(nu)])
    return A2, B2, np.hstack([C, np.zeros((C.shape[0], nu))])


def _delayed(A, B, C, D, n: int):
    """The plant with every MV delayed by *n* more samples (shift register per MV and sample)."""
    nu = B.shape[1]
    if np.any(D != 0):        # y = C x + D u[k-1]: hold u[k-1] in states first (strictly proper)
        nx = A.shape[0]
        A = np.block([[A, np.zeros((nx, nu))], [np.zeros((nu, nx + nu))]])
        B = np.vstack([B, np.eye(nu)])
        C = np.hstack([C, D])
    for _ in range(n):
        A, B, C = _shift(A, B, C)
    return A, B, C, np.zeros_like(D)


def closed_loop_matrix(law: UnconstrainedLaw, plant) -> tuple[np.ndarray, np.ndarray]:
    """``(Acl, Bsp)``: loop state ``s = (xp, a, u_prev)`` (plant, estimator prior, previous MV)
    with ``s[k+1] = Acl s[k] + Bsp sp`` for a plant ``(A, B, C, D)`` (``y = C x + D u_prev``)."""
    Ap, Bp, Cp, Dp = plant
    npx, na, nu = Ap.shape[0], law.Aa.shape[0], Bp.shape[1]
    Kxa = np.hstack([law.Kx, law.Kw])
    L = law.L
    # a+ = (I - L Ca) a + L Cp xp + L (Dp - D) up ;  u = Kxa a+ + Ku up + Ksp sp
    Ux = Kxa @ L @ Cp
    Ua = Kxa @ (np.eye(na) - L @ law.Ca)
    Uu = Kxa @ L @ (Dp - law.D) + law.Ku
    n = npx + na + nu
    U = np.hstack([Ux, Ua, Uu])                                 # u = U s + Ksp sp
    Apost = np.hstack([L @ Cp, np.eye(na) - L @ law.Ca, L @ (Dp - law.D)])     # a+ = Apost s
    Acl = np.zeros((n, n))
    Acl[:npx] = np.hstack([Ap, np.zeros((npx, na + nu))]) + Bp @ U
    Acl[npx:npx + na] = law.Aa @ Apost + law.Ba @ U
    Acl[npx + na:] = U
    Bsp = np.vstack([Bp @ law.Ksp, law.Ba @ law.Ksp, law.Ksp])
    return Acl, Bsp


def _controller_ss(law: UnconstrainedLaw):
    """The controller from measurement y to MV u (setpoints zero) as (Ac, Bc, Cc, Dc)."""
    na, nu = law.Aa.shape[0], law.Ku.shape[0]
    Kxa = np.hstack([law.Kx, law.Kw])
    L = law.L
    Ua = Kxa @ (np.eye(na) - L @ law.Ca)
    Uu = law.Ku - Kxa @ L @ law.D
    Dc = Kxa @ L
    Cc = np.hstack([Ua, Uu])
    Ac = np.vstack([np.hstack([law.Aa @ (np.eye(na) - L @ law.Ca), -law.Aa @ L @ law.D])
                    + law.Ba @ Cc, Cc])
    Bc = np.vstack([law.Aa @ L + law.Ba @ Dc, Dc])
    return Ac, Bc, Cc, Dc


def _freq(A, B, C, D, z):
    n = A.shape[0]
    return C @ np.linalg.solve(z * np.eye(n) - A, B) + D


def sensitivity_peak(law: UnconstrainedLaw, plant, n_points: int = 800) -> tuple[float, float]:
    """``(peak, w)``: max over w (rad/sample) of the largest singular value of the output
    sensitivity ``(I + P K)^-1`` (loop broken at the plant output; ``u = -K y``)."""
    Ap, Bp, Cp, Dp = plant
    Ac, Bc, Cc, Dc = _controller_ss(law)
    ny = Cp.shape[0]
    ws = np.pi * np.logspace(-5, 0, n_points)

    def smax(w):
        z = np.exp(1j * w)
        P = _freq(Ap, Bp, Cp, Dp / z, z)       # y = C x + D u[k-1]
        Kc = _freq(Ac, Bc, Cc, Dc, z)          # u = Kc y  (K = -Kc)
        S = np.linalg.inv(np.eye(ny) - P @ Kc)
        return float(np.linalg.svd(S, compute_uv=False)[0])

    vals = np.array([smax(w) for w in ws])
    i = int(np.argmax(vals))
    # refine around the grid's best point (golden-section on a bracket of two grid steps)
    lo, hi = ws[max(i - 1, 0)], ws[min(i + 1, len(ws) - 1)]
    g = (np.sqrt(5) - 1) / 2
    a, b = hi - g * (hi - lo), lo + g * (hi - lo)
    fa, fb = smax(a), smax(b)
    for _ in range(40):
        if fa > fb:
            hi, b, fb = b, a, fa
            a = hi - g * (hi - lo)
            fa = smax(a)
        else:
            lo, a, fa = a, b, fb
            b = lo + g * (hi - lo)
            fb = smax(b)
    best = max((vals[i], ws[i]), (fa, a), (fb, b))
    return float(best[0]), float(best[1])


def _radius(Acl) -> tuple[np.ndarray, float]:
    ev = np.linalg.eigvals(Acl)
    return ev, float(np.max(np.abs(ev), initial=0.0))


def unconstrained_analysis(controller, *, plant=None, gain_errors=(0.7, 1.3),
                           extra_delay: int = 1) -> UnconstrainedAnalysis:
    """Linear analysis of the built *controller* with no constraint active.

    Parameters
    ----------
    controller : PredictiveController
        Built.
    plant : discrete model or (A, B, C, D) or None
        The nominal plant (deviation variables, the controller's MVs and CVs, ``y = C x + D
        u[k-1]``); None: the controller's own model.
    gain_errors : sequence of float
        Gain factors of the mismatch table (every column of ``B`` and ``D`` scaled).
    extra_delay : int
        Extra dead time of the mismatch table, samples on every MV (0: no such case).

    Returns
    -------
    UnconstrainedAnalysis
        The law, the nominal eigenvalues and spectral radius, the mismatch table (``cases``:
        nominal first) and the output sensitivity peak with its frequency (rad per model time
        unit), with ``warnings`` for unstable cases.
    """
    _check(controller)
    P = _plant(plant, controller)
    try:
        factors = [float(g) for g in gain_errors]
    except (TypeError, ValueError):
        raise fail("unconstrained_analysis()", "gain_errors", "a sequence of numbers",
                   shown(gain_errors)) from None
    if any(not np.isfinite(g) or g <= 0 for g in factors):
        raise fail("unconstrained_analysis()", "gain_errors", "finite factors > 0", f"{factors}")
    try:
        whole = int(extra_delay) == extra_delay and extra_delay >= 0
    except (TypeError, ValueError):
        whole = False
    if not whole:
        raise fail("unconstrained_analysis()", "extra_delay", "a whole number of samples >= 0",
                   shown(extra_delay))
    law = unconstrained_law(controller)
    ev, rho = _radius(closed_loop_matrix(law, P)[0])
    cases = [MismatchCase("nominal", 1.0, rho, rho < STABLE_BELOW)]
    A, B, C, D = P
    for f in factors:
        r = _radius(closed_loop_matrix(law, (A, B * f, C, D * f))[0])[1]
        cases.append(MismatchCase("gain", f, r, r < STABLE_BELOW))
    if extra_delay:
        r = _radius(closed_loop_matrix(law, _delayed(A, B, C, D, int(extra_delay)))[0])[1]
        cases.append(MismatchCase("dead_time", float(extra_delay), r, r < STABLE_BELOW))
    warns = []
    for c in cases:
        if not c.stable:
            what = {"nominal": "on the nominal plant",
                    "gain": f"with the MV gains x{c.value:g}",
                    "dead_time": f"with {c.value:g} sample(s) more dead time"}[c.kind]
            warns.append(f"the unconstrained MPC loop is UNSTABLE {what} (spectral radius "
                         f"{c.spectral_radius:.4f} >= 1)")
    if cases[0].stable:
        peak, w = sensitivity_peak(law, P)
    else:
        peak, w = float("inf"), float("nan")
    return UnconstrainedAnalysis(law=law, eigenvalues=ev, spectral_radius=rho,
                                 stable=cases[0].stable, cases=cases, sensitivity_peak=peak,
                                 sensitivity_peak_w=w / controller.dmodel.Ts, warnings=warns)


# ---------------------------------------------------------------------------------------- cost
def optimal_cost(controller, x0, *, u_prev=None, setpoint=None) -> dict[str, Any]:
    """Unconstrained optimum of the dynamic QP from state *x0* (deviation, engineering units;
    disturbance estimates zero) with the constant terms included.

    ``cost`` is the controller's objective at the optimum plus the terms the MVs cannot change:
    the stage cost of the CVs at sample 0 (``q (y0 - sp)^2``) and the terminal constant, i.e. the
    standard convention in which the infinite-horizon LQR optimum is ``x0' P x0``.  Returns
    ``cost``, ``u`` (first move, deviation) and ``plan`` (nu, M; deviation).
    """
    _check(controller)
    m = controller.dmodel
    x0 = np.asarray(x0, float).reshape(-1)
    if x0.shape != (m.nx,):
        raise fail("optimal_cost()", "x0", f"{m.nx} entries (the model's states)",
                   f"shape {x0.shape}")
    up = np.zeros(m.nu) if u_prev is None else np.asarray(u_prev, float).reshape(m.nu)
    sp = np.zeros(m.ny) if setpoint is None else np.asarray(setpoint, float).reshape(m.ny)
    cond = _condensed(controller)
    zs = controller._zsl
    z = _free_z(controller)
    z[zs["x0"]] = x0
    z[zs["u_prev"]] = up
    pref = controller._resolved["preferred_value"] - np.asarray(m.op.u, float)
    band = sp
    xs = np.zeros(m.nx)
    if controller.target_ is not None:
        T = _target_map(controller)
        us = T["sp"][0] @ sp + T["pref"][0] @ pref
        band = T["sp"][1] @ sp + T["pref"][1] @ pref
        xs = T["sp"][2] @ sp + T["pref"][2] @ pref
        pref = us
    z[zs["band_lo"]] = band
    z[zs["band_hi"]] = band
    z[zs["pref"]] = pref
    if controller.terminal_weight_ is not None:
        z[zs["x_term"]] = xs
    H, f = cond.data(z)[:2]
    U = -np.linalg.solve(H, f)
    Us = U.reshape(m.nu, controller._M, order="F")
    cost = cond.objective(z, Us)
    sy = controller._sy
    e0 = (m.C @ x0 + m.D @ up - band) / sy
    cost += float(np.sum(controller.scaled_["cv_weight"] * e0 ** 2))
    if controller.terminal_weight_ is not None:
        xt = xs / controller._sx
        cost += float(xt @ controller.terminal_weight_ @ xt)
    su = controller._su[:, None]
    return {"cost": float(cost), "u": Us[:, 0] * controller._su, "plan": Us * su}
