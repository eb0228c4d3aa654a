"""Exact linear models at an operating point, their discretization and their analysis.

:func:`linearize` evaluates the Jacobians that CasADi built symbolically once (automatic
differentiation, no finite differences) and returns a continuous-time :class:`LinearModel` in
deviation variables::

    dx/dt = A x + B u + Bd d + Bz z          y = C x + D u + Dd d + Dz z

where ``z`` are the model's delayed inputs (each the value of one MV or DV a dead time ago).

:meth:`LinearModel.discretize` applies a zero-order hold (inputs held over each sample, the exact
discretization for a sampled controller) and turns every dead time into a chain of delay states.
A dead time ``(n + f) Ts`` that is not a whole number of samples is represented **exactly**
(``dead_time="exact"``, the default): over a sample the delayed input switches from ``u[k-n-1]`` to
``u[k-n]`` at the fraction ``f`` of the sample, so it enters through two taps of the delay chain
with split input matrices (the modified-z-transform / split-sample ZOH; for a first-order element
the numerator ``b1 z^-(n+1) + b2 z^-(n+2)``).  The simulated plant switches at the same instants
(:mod:`mpcproto.sim.plant`), so controller model and plant agree.  ``dead_time="round"`` rounds to
the nearest whole number of samples with a warning (half a sample rounds up) and
``dead_time="refuse"`` refuses a fractional dead time.

Analysis (:class:`LinearModel`): steady-state gains, poles, transmission zeros, the relative gain
array and a per-pair view.  Channels and zeros are computed on *minimal* realizations (controllable
and observable parts, by orthogonal projections after a diagonal balancing; see
:func:`minimal_realization`), so the states of one MV or DV that another channel does not see do
not show up as its poles or zeros, and an integrating level does not make every other gain infinite.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg as sla

from .validation import Interval, Options, check, fail
from .operating import OperatingPoint
from .realization import (INTEGRATOR_TOL, _channel, _controllability_reach, _gain_matrix,
                          minimal_realization, transmission_zeros)

__all__ = ["LinearModel", "DiscreteLinearModel", "linearize", "rga", "delay_samples", "delay_split",
           "minimal_realization", "transmission_zeros", "INTEGRATOR_TOL", "open_loop_class"]


def open_loop_class(eigenvalues) -> str:
    """``"static"`` (no states), ``"unstable"`` (an eigenvalue with a positive real part),
    ``"integrating"`` (one at the origin or on the imaginary axis) or ``"stable"``, with the
    tolerance :data:`INTEGRATOR_TOL` relative to the largest eigenvalue magnitude (at least 1)."""
    ev = np.asarray(eigenvalues)
    if ev.size == 0:
        return "static"
    tol = INTEGRATOR_TOL * max(1.0, float(np.max(np.abs(ev))))
    if np.any(ev.real > tol):
        return "unstable"
    if np.any(ev.real > -tol):
        return "integrating"
    return "stable"


DEAD_TIME_POLICIES = ("exact", "round", "refuse")


def delay_samples(dead_time: float, Ts: float, *, policy: str = "round", what: str = "dead time",
                  stacklevel: int = 3) -> int:
    """Whole number of samples for *dead_time* at sample time *Ts*.

    A dead time that is not a whole number of samples is rounded to the nearest one (half a sample
    rounds up) with a ``UserWarning`` (``policy="round"``), or refused with :class:`SettingsError`
    (``policy="refuse"``).  :func:`delay_split` gives the exact split instead.
    """
    check(policy, Options(("round", "refuse"), noun="a dead_time policy"), owner="delay_samples()",
          key="policy")
    n_exact = dead_time / Ts
    n = int(math.floor(n_exact + 0.5))  # half a sample rounds up (2.5 -> 3), not to even
    if abs(n - n_exact) > 1e-9 * max(1.0, n_exact):
        msg = (f"the {what} = {dead_time:g} is not a multiple of the sample time {Ts:g} "
               f"({n_exact:.4g} samples)")
        if policy == "refuse":
            raise fail("delay_samples()", "dead_time", "a dead time of whole samples",
                       f"{what} = {dead_time:g}, not a multiple of the sample time {Ts:g} "
                       f"({n_exact:.4g} samples)",
                       "choose a sample time that divides it, or pass dead_time='exact' (or "
                       "'round')")
        warnings.warn(f"{msg}; rounded to {n} samples.", stacklevel=stacklevel)
    return n


def delay_split(dead_time: float, Ts: float) -> tuple[int, float]:
    """``(n, f)`` with ``dead_time = (n + f) Ts``, ``n`` whole and ``0 <= f < 1``.

    Over the sample ``[k Ts, (k+1) Ts)`` an input delayed by this dead time equals the held input
    of sample ``k-n-1`` until ``f`` of the sample has passed, then that of sample ``k-n``.  A
    fraction within 1e-9 (relative) of a whole number of samples counts as whole (``f = 0``), the
    same tolerance :func:`delay_samples` uses.
    """
    r = float(dead_time) / float(Ts)
    tol = 1e-9 * max(1.0, r)
    n = int(math.floor(r + tol))
    f = r - n
    return n, (0.0 if f <= tol else float(f))


def delay_splits(delays: Any, Ts: float, names: Any, *, policy: str = "exact",
                 what: str = "dead time") -> list[tuple[int, float]]:
    """``(n, f)`` per ``(role, index, dead_time)`` delay under a dead-time *policy*.

    ``"exact"`` keeps the fraction (:func:`delay_split`); ``"round"`` and ``"refuse"`` go through
    :func:`delay_samples` (``f = 0``).  *names* maps a role to its variable names (for messages).
    """
    check(policy, Options(DEAD_TIME_POLICIES, noun="a dead_time policy"), owner="delay_splits()",
          key="policy")
    out = []
    for r, i, dt in delays:
        if policy == "exact":
            out.append(delay_split(dt, Ts))
        else:
            out.append((delay_samples(dt, Ts, policy=policy, what=f"{what} on '{names[r][i]}'",
                                      stacklevel=5), 0.0))
    return out


def rga(K: np.ndarray) -> np.ndarray:
    """Relative gain array of a square gain matrix: ``K * inv(K).T`` (element-wise product).

    Bristol (1966): each element is the open-loop gain of a pair divided by its gain with every
    other loop closed.  Raises :class:`SettingsError` for a non-square or singular matrix.
    """
    K = np.asarray(K, float)
    if K.ndim != 2 or K.shape[0] != K.shape[1]:
        raise fail("rga()", "K", "a square gain matrix", f"shape {K.shape}")
    if not np.all(np.isfinite(K)):
        raise fail("rga()", "K", "finite steady-state gains (the RGA is not defined otherwise)",
                   "non-finite entries (a CV that integrates has no steady-state gain)")
    if np.linalg.cond(K) > 1e12:
        raise fail("rga()", "K", "an invertible gain matrix",
                   "a singular one (no relative gain array exists)")
    return K * np.linalg.inv(K).T


@dataclass
class LinearModel:
    """Continuous-time linear model in deviation variables around ``op``.

    ``delays`` lists, per column of ``Bz``/``Dz``, the source role (``"mv"``/``"dv"``), the index of
    the source in that role and the dead time.
    """

    A: np.ndarray
    B: np.ndarray
    Bd: np.ndarray
    Bz: np.ndarray
    C: np.ndarray
    D: np.ndarray
    Dd: np.ndarray
    Dz: np.ndarray
    op: OperatingPoint
    delays: list[tuple[str, int, float]] = field(default_factory=list)
    time_unit: str = "s"
    #: physical bounds per role (``"state"``, ``"mv"``, ``"dv"``, ``"cv"``): ``(low, high)`` vectors
    #: in declaration order, set by :func:`linearize`; ``None`` when the model is not known (a
    #: model read from matrices).  The MPC's default scales come from them.
    bounds: dict[str, tuple[np.ndarray, np.ndarray]] | None = None

    state_names = property(lambda self: self.op.state_names)
    mv_names = property(lambda self: self.op.mv_names)
    dv_names = property(lambda self: self.op.dv_names)
    cv_names = property(lambda self: self.op.cv_names)

    # -- delay-free views (each delayed input folded back onto its source) -----------------
    def folded_inputs(self, role: str = "mv") -> tuple[np.ndarray, np.ndarray]:
        """Input matrices with every dead time set to zero: ``(B + Bz S, D + Dz S)``.

        Each delayed copy of an MV (``role="mv"``) or DV (``role="dv"``) is folded back onto its
        source (``S`` selects, per delay, its source column), so ``C (sI - A)^-1 Bf + Df`` is the
        transfer matrix without its dead times, and at ``s = 0`` the steady-state gain (a dead
        time does not change a gain).

        Parameters
        ----------
        role : {"mv", "dv"}

        Returns
        -------
        Bf : ndarray (nx, nu) or (nx, nd)
        Df : ndarray (ny, nu) or (ny, nd)
        """
        if role not in ("mv", "dv"):
            raise fail("LinearModel.folded_inputs()", "role", "'mv' or 'dv'", repr(role))
        n = self.B.shape[1] if role == "mv" else self.Bd.shape[1]
        S = np.zeros((len(self.delays), n))
        for k, (r, i, _) in enumerate(self.delays):
            if r == role:
                S[k, i] = 1.0
        B0, D0 = (self.B, self.D) if role == "mv" else (self.Bd, self.Dd)
        return B0 + self.Bz @ S, D0 + self.Dz @ S

    _fold = folded_inputs  # former private name, kept for old callers

    def gain(self, role: str = "mv") -> np.ndarray:
        """Steady-state gain matrix dy/du (``role="mv"``) or dy/dd (``role="dv"``).

        Each channel is reduced to its minimal (controllable and observable) part first, so a
        channel that does settle keeps its finite gain even when another part of the unit
        integrates (a level); an integrating channel gives ``inf`` (with the sign of its ramp).
        """
        Bf, Df = self.folded_inputs(role)
        return _gain_matrix(self.A, Bf, self.C, Df, discrete=False)

    def poles(self) -> np.ndarray:
        """Eigenvalues of A (delay-free part)."""
        return np.linalg.eigvals(self.A)

    def zeros(self) -> np.ndarray:
        """Finite transmission zeros from MVs to CVs of the delay-free system.

        Method: (1) fold each delayed input onto its source (the zeros of the rational part; the
        dead times are extra, pure delays); (2) reduce (A, B, C) to its minimal part -- the
        controllable subspace of (A, B), then the observable part of that (orthogonal staircase,
        rank decisions by SVD) -- so input/output decoupling zeros (e.g. the poles of DV-only states)
        are not reported; (3) the finite generalized eigenvalues of the Rosenbrock pencil
        ``[[A, B], [C, D]] - s [[I, 0], [0, 0]]``.  A non-square system is squared down by two
        independent random combinations of its inputs or outputs; only the zeros common to both are
        kept (a squared-down system has extra zeros that move with the combination; the transmission
        zeros do not).  A system whose transfer matrix does not have full normal rank has no
        isolated zeros: an empty array is returned.
        """
        Bf, Df = self.folded_inputs("mv")
        return transmission_zeros(self.A, Bf, self.C, Df)

    def rga(self) -> np.ndarray:
        """Relative gain array of the MV->CV steady-state gains (square systems only)."""
        return rga(self.gain("mv"))

    def transfer_element(self, cv: int, mv: int) -> tuple[np.ndarray, np.ndarray, float]:
        """(num, den, dead time) of one MV->CV channel: the minimal rational part and its delay.

        The rational part is that of the channel's minimal realization (common poles and zeros of
        the full model cancelled exactly, by construction); ``den`` is monic.  The dead time is the
        smallest dead time among the paths from this MV to this CV; the rational part folds every
        delayed path onto the same input (exact when one delay applies).
        """
        Bf, Df = self.folded_inputs("mv")
        ch = _channel(self.A, Bf[:, mv], self.C[cv], Df[cv, mv])
        reach = []
        for k, (r, i, dt) in enumerate(self.delays):
            if r != "mv" or i != mv:
                continue
            g = self.Dz[cv, k] + self.C[cv] @ _controllability_reach(self.A, self.Bz[:, k])
            if np.any(np.abs(g) > 1e-12 * max(1.0, np.max(np.abs(self.Bz[:, k])))):
                reach.append(dt)
        dead = min(reach) if reach else 0.0
        return ch["num"], ch["den"], float(dead) if ch["connected"] else 0.0

    def pairs(self) -> list[dict[str, Any]]:
        """Per MV->CV pair: gain, time constants, poles, zeros, dead time, connection.

        Each pair is the channel's minimal realization (see :meth:`zeros` for the reduction):
        ``connected`` is False when the MV does not move the CV at all (then gain 0, no poles);
        ``integrating`` is True when the channel has a pole at the origin (gain ``inf``), and
        ``ramp_rate`` is then the CV's slope per unit MV step (per time unit).  Time constants are
        ``-1/p`` for the real stable poles, largest first; complex poles are listed under ``poles``.
        """
        out = []
        Bf, Df = self.folded_inputs("mv")
        for i, c in enumerate(self.cv_names):
            for j, m in enumerate(self.mv_names):
                ch = _channel(self.A, Bf[:, j], self.C[i], Df[i, j])
                _, _, dead = self.transfer_element(i, j)
                poles = ch["poles"]
                taus = sorted((-1.0 / p_.real for p_ in poles
                               if abs(p_.imag) <= 1e-9 * max(1.0, abs(p_)) and p_.real < 0), reverse=True)
                out.append({
                    "cv": c, "mv": m, "gain": float(ch["gain"]),
                    "time_constants": [float(t) for t in taus],
                    "poles": [complex(p_) for p_ in poles],
                    "zeros": [complex(z_) for z_ in ch["zeros"]],
                    "dead_time": float(dead),
                    "connected": ch["connected"],
                    "integrating": ch["integrating"],
                    "ramp_rate": (ch["ramp_rate"] if ch["ramp_rate"] is not None
                                  and math.isfinite(ch["ramp_rate"]) else None),
                })
        return out

    def discretize(self, Ts: float, *, dead_time: str = "exact") -> "DiscreteLinearModel":
        """Zero-order-hold discretization with delay states (see module docstring).

        Parameters
        ----------
        Ts : float
            Sample time (model time unit).
        dead_time : {"exact", "round", "refuse"}
            How a dead time that is not a whole number of samples is represented: exactly (split
            sample, two delay taps), rounded to whole samples with a warning, or refused.
        """
        check(Ts, Interval(float, 0, None, closed="neither", noun="a sample time"),
              owner="discretize()", key="Ts")
        nx, nu, nd = self.A.shape[0], self.B.shape[1], self.Bd.shape[1]
        # exact ZOH of the delay-free part, all inputs at once: expm of the augmented matrix
        Phi, Gam = zoh(self.A, np.hstack([self.B, self.Bd, self.Bz]), Ts)
        Gu, Gd, Gz = Gam[:, :nu], Gam[:, nu:nu + nd], Gam[:, nu + nd:]
        split = delay_splits(self.delays, Ts, {"mv": self.mv_names, "dv": self.dv_names},
                             policy=dead_time)
        # a delay (n + f) Ts acts over a sample through u[k-n] ("after" the switch at f Ts) and,
        # if f > 0, u[k-n-1] ("before" it); tap i is u[k-i] (tap 0: the input itself)
        after, before = split_sample_inputs(self.A, self.Bz, Ts, [f for _, f in split], Gz)
        chains: dict[tuple[str, int], int] = {}
        for (r, i, _), (n, f) in zip(self.delays, split):
            chains[(r, i)] = max(chains.get((r, i), 0), n + (1 if f > 0 else 0))
        offset: dict[tuple[str, int], int] = {}
        nxi = 0
        for key, n in chains.items():
            offset[key] = nxi
            nxi += n
        N = nx + nxi
        A = np.zeros((N, N))
        A[:nx, :nx] = Phi
        B = np.zeros((N, nu))
        B[:nx] = Gu
        Bd = np.zeros((N, nd))
        Bd[:nx] = Gd
        C = np.zeros((self.C.shape[0], N))
        C[:, :nx] = self.C
        D = self.D.copy()
        Dd = self.Dd.copy()
        names = list(self.state_names)
        for (r, i), n in chains.items():
            src = (self.mv_names if r == "mv" else self.dv_names)[i]
            o = nx + offset[(r, i)]
            for k in range(n):
                names.append(f"{src}[k-{k + 1}]")
                if k == 0:
                    (B if r == "mv" else Bd)[o, i] = 1.0
                else:
                    A[o + k, o + k - 1] = 1.0

        def tap(r: str, i: int, t: int, g: np.ndarray | None, c: np.ndarray | None) -> None:
            if t == 0:  # the input itself
                if g is not None:
                    (B if r == "mv" else Bd)[:nx, i] += g
                if c is not None:
                    (D if r == "mv" else Dd)[:, i] += c
                return
            col = nx + offset[(r, i)] + t - 1
            if g is not None:
                A[:nx, col] += g
            if c is not None:
                C[:, col] += c

        for col, ((r, i, _), (n, f)) in enumerate(zip(self.delays, split)):
            tap(r, i, n, after[:, col], None)
            if f > 0:
                tap(r, i, n + 1, before[:, col], None)
            # at a sampling instant the delayed input still has its value from before the switch
            tap(r, i, n + 1 if f > 0 else n, None, self.Dz[:, col])
        return DiscreteLinearModel(A=A, B=B, Bd=Bd, C=C, D=D, Dd=Dd, Ts=float(Ts), op=self.op,
                                   state_names=tuple(names), n_plant_states=nx,
                                   time_unit=self.time_unit, bounds=self.bounds)

    def as_dict(self) -> dict[str, Any]:
        return {
            "A": self.A.tolist(), "B": self.B.tolist(), "Bd": self.Bd.tolist(), "Bz": self.Bz.tolist(),
            "C": self.C.tolist(), "D": self.D.tolist(), "Dd": self.Dd.tolist(), "Dz": self.Dz.tolist(),
            "delays": [{"source_role": r, "source": (self.mv_names if r == "mv" else self.dv_names)[i],
                        "dead_time": dt} for r, i, dt in self.delays],
        }


def zoh(A: np.ndarray, B: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact zero-order hold over a time *h*: ``(e^{A h}, int_0^h e^{A s} ds B)``.

    One matrix exponential of the augmented matrix ``[[A, B], [0, 0]] h`` (Van Loan's method,
    common practice).
    """
    nx, nb = A.shape[0], B.shape[1]
    M = np.zeros((nx + nb, nx + nb))
    M[:nx, :nx] = A * h
    M[:nx, nx:] = B * h
    E = sla.expm(M)
    return E[:nx, :nx], E[:nx, nx:]


def split_sample_inputs(A: np.ndarray, Bz: np.ndarray, Ts: float, fractions: Any,
                        whole: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Input matrices of delayed inputs whose value switches at a fraction of the sample.

    Column ``j`` of *Bz* is an input held at ``v_before`` over ``[0, f_j Ts)`` and at ``v_after``
    over ``[f_j Ts, Ts)``; over one sample ``x+ = e^{A Ts} x + G_after v_after + G_before v_before``
    with ``G_after = int_0^{(1-f) Ts} e^{A s} ds Bz`` and
    ``G_before = e^{A (1-f) Ts} int_0^{f Ts} e^{A s} ds Bz`` (split-sample zero-order hold, the
    state-space form of the modified z-transform).  ``f = 0`` gives ``(whole, 0)``, *whole* being
    the one-sample ZOH input matrix of *Bz* (computed if not given).
    """
    nx, nz = Bz.shape
    after = np.zeros((nx, nz))
    before = np.zeros((nx, nz))
    fr = [float(f) for f in fractions]
    if whole is None and any(f == 0 for f in fr):
        whole = zoh(A, Bz, Ts)[1]
    for f in sorted(set(fr)):
        cols = [j for j, fj in enumerate(fr) if fj == f]
        if f == 0:
            after[:, cols] = whole[:, cols]
            continue
        Phi_a, G_a = zoh(A, Bz[:, cols], (1.0 - f) * Ts)
        G_b = zoh(A, Bz[:, cols], f * Ts)[1]
        after[:, cols] = G_a
        before[:, cols] = Phi_a @ G_b
    return after, before


@dataclass
class DiscreteLinearModel:
    """Discrete-time linear model in deviation variables (sample time ``Ts``, model time unit).

    ``x[k+1] = A x[k] + B u[k] + Bd d[k]``, ``y[k] = C x[k] + D u[k] + Dd d[k]``.  The first
    ``n_plant_states`` states are the model's own; the rest are delay states named
    ``"<source>[k-i]"``.
    """

    A: np.ndarray
    B: np.ndarray
    Bd: np.ndarray
    C: np.ndarray
    D: np.ndarray
    Dd: np.ndarray
    Ts: float
    op: OperatingPoint
    state_names: tuple[str, ...]
    n_plant_states: int
    time_unit: str = "s"
    #: physical bounds per role, as :attr:`LinearModel.bounds` (``None`` when not known)
    bounds: dict[str, tuple[np.ndarray, np.ndarray]] | None = None

    mv_names = property(lambda self: self.op.mv_names)
    dv_names = property(lambda self: self.op.dv_names)
    cv_names = property(lambda self: self.op.cv_names)
    nx = property(lambda self: self.A.shape[0])
    nu = property(lambda self: self.B.shape[1])
    nd = property(lambda self: self.Bd.shape[1])
    ny = property(lambda self: self.C.shape[0])

    def gain(self, role: str = "mv") -> np.ndarray:
        """Steady-state gain ``C (I - A)^-1 B + D`` (or for DVs), channel by channel.

        Each channel is reduced to its minimal realization first, so only channels that really
        integrate give ``inf`` (signed by the direction of their ramp); a self-regulating channel
        keeps its finite gain even when a level elsewhere in the unit integrates.  The delay
        states do not change a gain: the result equals :meth:`LinearModel.gain` of the model this
        one was discretized from (ZOH step invariance).
        """
        if role not in ("mv", "dv"):
            raise fail("DiscreteLinearModel.gain()", "role", "'mv' or 'dv'", repr(role))
        B, D = (self.B, self.D) if role == "mv" else (self.Bd, self.Dd)
        return _gain_matrix(self.A, B, self.C, D, discrete=True)

    def poles(self) -> np.ndarray:
        return np.linalg.eigvals(self.A)

    def simulate(self, u: np.ndarray, d: np.ndarray | None = None, x0: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """Deviation response to input sequences ``u`` (N x nu) and ``d`` (N x nd): returns (x, y)."""
        u = np.atleast_2d(np.asarray(u, float))
        N = u.shape[0]
        d = np.zeros((N, self.nd)) if d is None else np.atleast_2d(np.asarray(d, float))
        x = np.zeros(self.nx) if x0 is None else np.asarray(x0, float).copy()
        X = np.zeros((N + 1, self.nx))
        Y = np.zeros((N, self.ny))
        X[0] = x
        for k in range(N):
            Y[k] = self.C @ x + self.D @ u[k] + self.Dd @ d[k]
            x = self.A @ x + self.B @ u[k] + self.Bd @ d[k]
            X[k + 1] = x
        return X, Y

    def as_dict(self) -> dict[str, Any]:
        return {"Ts": self.Ts, "state_names": list(self.state_names),
                "A": self.A.tolist(), "B": self.B.tolist(), "Bd": self.Bd.tolist(),
                "C": self.C.tolist(), "D": self.D.tolist(), "Dd": self.Dd.tolist()}


def linearize(model, op: OperatingPoint) -> LinearModel:
    """Exact Jacobians of a built *model* at *op* (CasADi automatic differentiation)."""
    if not getattr(model, "is_built", False):
        from .exceptions import NotBuiltError

        raise NotBuiltError(f"linearize(): model '{model.name}' is not built; call model.build() first.")
    z = model.z_of(op.u, op.d)
    J = model.jac_(x=op.x, u=op.u, d=op.d, z=z, p=op.p)
    A, B, Bd, Bz, C, D, Dd, Dz = (np.asarray(J[k], float) for k in ("A", "B", "Bd", "Bz", "C", "D", "Dd", "Dz"))
    nx, nu, nd, ny, nz = model.nx, model.nu, model.nd, model.ny, model.nz
    shape = lambda M, r, c: M.reshape(r, c)  # noqa: E731 - CasADi drops empty dimensions
    delays = [(dl.source_role, model.names(dl.source_role).index(dl.source), dl.dead_time)
              for dl in model.delays]
    return LinearModel(
        A=shape(A, nx, nx), B=shape(B, nx, nu), Bd=shape(Bd, nx, nd), Bz=shape(Bz, nx, nz),
        C=shape(C, ny, nx), D=shape(D, ny, nu), Dd=shape(Dd, ny, nd), Dz=shape(Dz, ny, nz),
        op=op, delays=delays, time_unit=model.time_unit,
        bounds={r: model.bounds(r) for r in ("state", "mv", "dv", "cv")})
