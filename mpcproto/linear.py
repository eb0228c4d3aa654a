"""Exact linear models at an operating point, their discretization and their analysis.

:func:`linearize` evaluates the Jacobians that CasADi built symbolically once (automatic
differentiation, no finite differences) and returns a continuous-time :class:`LinearModel` in
deviation variables::

    dx/dt = A x + B u + Bd d + Bz z          y = C x + D u + Dd d + Dz z

where ``z`` are the model's delayed inputs (each the value of one MV or DV a dead time ago).

:meth:`LinearModel.discretize` applies a zero-order hold (inputs held over each sample, the exact
discretization for a sampled controller) and turns every dead time into a chain of integer-sample
delay states.  A dead time that is not a multiple of the sample time is **rounded to the nearest
whole number of samples with a warning** (``dead_time="round"``, the default) or **refused**
(``dead_time="refuse"``).  The nonlinear simulator rounds the same way, so controller model and plant
agree.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg as sla

from .exceptions import SettingsError
from .operating import OperatingPoint

__all__ = ["LinearModel", "DiscreteLinearModel", "linearize", "rga", "delay_samples"]


def delay_samples(dead_time: float, Ts: float, *, policy: str = "round", what: str = "dead time") -> int:
    """Whole number of samples for *dead_time* at sample time *Ts* (rounded with a warning, or refused)."""
    n_exact = dead_time / Ts
    n = int(round(n_exact))
    if abs(n - n_exact) > 1e-9 * max(1.0, n_exact):
        msg = (f"the {what} {dead_time:g} is not a multiple of the sample time {Ts:g} "
               f"({n_exact:.4g} samples)")
        if policy == "refuse":
            raise SettingsError(
                f"{msg}; choose a sample time that divides it, or pass dead_time='round'.")
        if policy != "round":
            raise SettingsError(f"dead_time policy must be 'round' or 'refuse'; got {policy!r}.")
        warnings.warn(f"{msg}; rounded to {n} samples.", stacklevel=3)
    return n


def rga(K: np.ndarray) -> np.ndarray:
    """Relative gain array of a square gain matrix: ``K * inv(K).T`` (element-wise product).

    Bristol (1966): each element is the open-loop gain of a pair divided by its gain with every
    other loop closed.  Raises :class:`SettingsError` for a non-square or singular matrix.
    """
    K = np.asarray(K, float)
    if K.ndim != 2 or K.shape[0] != K.shape[1]:
        raise SettingsError(f"rga(): the gain matrix must be square; got shape {K.shape}.")
    if not np.all(np.isfinite(K)):
        raise SettingsError("rga(): the gain matrix has non-finite entries (an integrating channel?).")
    if np.linalg.cond(K) > 1e12:
        raise SettingsError("rga(): the gain matrix is singular; no relative gain array exists.")
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

    state_names = property(lambda self: self.op.state_names)
    mv_names = property(lambda self: self.op.mv_names)
    dv_names = property(lambda self: self.op.dv_names)
    cv_names = property(lambda self: self.op.cv_names)

    # -- delay-free views (each delayed input folded back onto its source) -----------------
    def _fold(self, role: str) -> tuple[np.ndarray, np.ndarray]:
        n = self.B.shape[1] if role == "mv" else self.Bd.shape[1]
        S = np.zeros((len(self.delays), n))
        for k, (r, i, _) in enumerate(self.delays):
            if r == role:
                S[k, i] = 1.0
        B0, D0 = (self.B, self.D) if role == "mv" else (self.Bd, self.Dd)
        return B0 + self.Bz @ S, D0 + self.Dz @ S

    def gain(self, role: str = "mv") -> np.ndarray:
        """Steady-state gain matrix dy/du (``role="mv"``) or dy/dd (``role="dv"``).

        An integrating channel (singular A) gives ``inf`` entries where the response has no steady
        state.
        """
        Bf, Df = self._fold(role)
        try:
            lu = sla.lu_factor(self.A, check_finite=True)
            if np.min(np.abs(np.diag(lu[0]))) < 1e-12 * max(1.0, np.max(np.abs(self.A))):
                raise np.linalg.LinAlgError
            return Df - self.C @ sla.lu_solve(lu, Bf)
        except (np.linalg.LinAlgError, ValueError):
            K = np.full((self.C.shape[0], Bf.shape[1]), np.inf)
            # channels that do reach a steady state: solve in the least-squares sense and keep
            # entries whose response is consistent
            sol, *_ = np.linalg.lstsq(self.A, Bf, rcond=None)
            ok = np.allclose(self.A @ sol, Bf, atol=1e-9)
            if ok:
                K = Df - self.C @ sol
            return K

    def poles(self) -> np.ndarray:
        """Eigenvalues of A (delay-free part)."""
        return np.linalg.eigvals(self.A)

    def zeros(self) -> np.ndarray:
        """Finite transmission zeros of the delay-free system (A, B+Bz S, C, D+Dz S) from MVs to CVs.

        Computed as the finite generalized eigenvalues of the Rosenbrock system matrix pencil
        ``[[A, B], [C, D]] - s [[I, 0], [0, 0]]`` (square systems); for non-square systems the
        normal rank is reduced by projecting onto the smaller dimension.
        """
        Bf, Df = self._fold("mv")
        nx, nu, ny = self.A.shape[0], Bf.shape[1], self.C.shape[0]
        if nu != ny:
            # Zeros of a non-square system: those common to every square sub-system.  We use the
            # square system obtained with a random combination (zeros of the generic combination are
            # the transmission zeros with probability one).
            rng = np.random.default_rng(0)
            if ny > nu:
                W = rng.standard_normal((nu, ny))
                C, D, B = W @ self.C, W @ Df, Bf
            else:
                V = rng.standard_normal((nu, ny))
                C, D, B = self.C, Df @ V, Bf @ V
        else:
            C, D, B = self.C, Df, Bf
        m = B.shape[1]
        M = np.block([[self.A, B], [C, D]])
        N = np.block([[np.eye(nx), np.zeros((nx, m))], [np.zeros((C.shape[0], nx)), np.zeros((C.shape[0], m))]])
        ev = sla.eigvals(M, N)
        ev = ev[np.isfinite(ev)]
        return ev[np.abs(ev) < 1e8]

    def rga(self) -> np.ndarray:
        """Relative gain array of the MV->CV steady-state gains (square systems only)."""
        return rga(self.gain("mv"))

    def transfer_element(self, cv: int, mv: int) -> tuple[np.ndarray, np.ndarray, float]:
        """(num, den, dead time) of one MV->CV channel: the delay-free rational part and its delay.

        The dead time is the smallest dead time among the paths from this MV to this CV; the
        rational part folds every delayed path onto the same input (exact when one delay applies).
        """
        Bf, Df = self._fold("mv")
        from scipy.signal import ss2tf

        num, den = ss2tf(self.A, Bf[:, [mv]], self.C[[cv], :], Df[[cv]][:, [mv]])
        # the smallest delay on this MV whose column reaches the CV (directly or through the states)
        reach = []
        for k, (r, i, dt) in enumerate(self.delays):
            if r != "mv" or i != mv:
                continue
            g = self.Dz[cv, k] + self.C[cv] @ _controllability_reach(self.A, self.Bz[:, k])
            if np.any(np.abs(g) > 1e-12):
                reach.append(dt)
        dead = min(reach) if reach else 0.0
        return np.atleast_1d(np.squeeze(num)), np.atleast_1d(den), float(dead)

    def pairs(self) -> list[dict[str, Any]]:
        """Per MV->CV pair: gain, time constants (from the channel's real poles), dead time."""
        K = self.gain("mv")
        out = []
        for i, c in enumerate(self.cv_names):
            for j, m in enumerate(self.mv_names):
                num, den, dead = self.transfer_element(i, j)
                num = np.trim_zeros(np.where(np.abs(num) < 1e-12 * max(1.0, np.max(np.abs(num))), 0, num), "f")
                poles = np.roots(den) if len(den) > 1 else np.zeros(0)
                zeros_ = np.roots(num) if len(num) > 1 else np.zeros(0)
                # cancel pole-zero pairs (uncontrollable/unobservable modes of this channel)
                keep = []
                zl = list(zeros_)
                for p_ in poles:
                    hit = [k for k, z_ in enumerate(zl) if abs(z_ - p_) < 1e-6 * max(1.0, abs(p_))]
                    if hit:
                        zl.pop(hit[0])
                    else:
                        keep.append(p_)
                taus = sorted((-1.0 / p_.real for p_ in keep if abs(p_.imag) < 1e-9 and p_.real < 0),
                              reverse=True)
                connected = bool(np.any(np.abs(num) > 0))
                if not connected:
                    taus, keep, zl, dead = [], [], [], 0.0
                out.append({
                    "cv": c, "mv": m, "gain": float(K[i, j]),
                    "time_constants": [float(t) for t in taus],
                    "poles": [complex(p_) for p_ in keep],
                    "zeros": [complex(z_) for z_ in zl],
                    "dead_time": dead,
                    "connected": connected,
                })
        return out

    def discretize(self, Ts: float, *, dead_time: str = "round") -> "DiscreteLinearModel":
        """Zero-order-hold discretization with integer-sample delay states (see module docstring)."""
        if not (isinstance(Ts, (int, float)) and math.isfinite(Ts) and Ts > 0):
            raise SettingsError(f"discretize(): the sample time Ts must be a finite number > 0; got {Ts!r}.")
        nx, nu, nd = self.A.shape[0], self.B.shape[1], self.Bd.shape[1]
        nz = len(self.delays)
        # exact ZOH of the delay-free part, all inputs at once: expm of the augmented matrix
        Ball = np.hstack([self.B, self.Bd, self.Bz])
        M = np.zeros((nx + Ball.shape[1],) * 2)
        M[:nx, :nx] = self.A * Ts
        M[:nx, nx:] = Ball * Ts
        E = sla.expm(M)
        Phi, Gam = E[:nx, :nx], E[:nx, nx:]
        Gu, Gd, Gz = Gam[:, :nu], Gam[:, nu:nu + nd], Gam[:, nu + nd:]
        # delay chains: one chain per source (mv j or dv j), as long as its longest delay
        nsamp = [delay_samples(dt, Ts, policy=dead_time,
                               what=f"dead time on {(self.mv_names if r == 'mv' else self.dv_names)[i]}")
                 for (r, i, dt) in self.delays]
        chains: dict[tuple[str, int], int] = {}
        for (r, i, _), n in zip(self.delays, nsamp):
            chains[(r, i)] = max(chains.get((r, i), 0), n)
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
        for col, ((r, i, _), n) in enumerate(zip(self.delays, nsamp)):
            if n == 0:  # rounded to no delay: acts like the source itself
                (B if r == "mv" else Bd)[:nx, i] += Gz[:, col]
                (D if r == "mv" else Dd)[:, i] += self.Dz[:, col]
            else:
                tap = nx + offset[(r, i)] + n - 1
                A[:nx, tap] += Gz[:, col]
                C[:, tap] += self.Dz[:, col]
        return DiscreteLinearModel(A=A, B=B, Bd=Bd, C=C, D=D, Dd=Dd, Ts=float(Ts), op=self.op,
                                   state_names=tuple(names), n_plant_states=nx,
                                   time_unit=self.time_unit)

    def as_dict(self) -> dict[str, Any]:
        return {
            "A": self.A.tolist(), "B": self.B.tolist(), "Bd": self.Bd.tolist(), "Bz": self.Bz.tolist(),
            "C": self.C.tolist(), "D": self.D.tolist(), "Dd": self.Dd.tolist(), "Dz": self.Dz.tolist(),
            "delays": [{"source_role": r, "source": (self.mv_names if r == "mv" else self.dv_names)[i],
                        "dead_time": dt} for r, i, dt in self.delays],
        }


def _controllability_reach(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Columns b, Ab, A^2 b, ... stacked: a CV row times this is non-zero iff the path is connected."""
    n = A.shape[0]
    cols = [b]
    for _ in range(max(n - 1, 0)):
        cols.append(A @ cols[-1])
    return np.column_stack(cols) if cols else np.zeros((0, 0))


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

    mv_names = property(lambda self: self.op.mv_names)
    dv_names = property(lambda self: self.op.dv_names)
    cv_names = property(lambda self: self.op.cv_names)
    nx = property(lambda self: self.A.shape[0])
    nu = property(lambda self: self.B.shape[1])
    nd = property(lambda self: self.Bd.shape[1])
    ny = property(lambda self: self.C.shape[0])

    def gain(self, role: str = "mv") -> np.ndarray:
        """Steady-state gain ``C (I - A)^-1 B + D`` (or for DVs); ``inf`` where integrating."""
        B, D = (self.B, self.D) if role == "mv" else (self.Bd, self.Dd)
        M = np.eye(self.nx) - self.A
        try:
            if np.linalg.cond(M) > 1e12:
                raise np.linalg.LinAlgError
            return D + self.C @ np.linalg.solve(M, B)
        except np.linalg.LinAlgError:
            return np.full((self.ny, B.shape[1]), np.inf)

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
    mats = [np.asarray(m, float) for m in model.jac_(op.x, op.u, op.d, z, op.p)]
    A, B, Bd, Bz, C, D, Dd, Dz = mats
    nx, nu, nd, ny, nz = model.nx, model.nu, model.nd, model.ny, model.nz
    shape = lambda M, r, c: M.reshape(r, c)  # noqa: E731 - CasADi drops empty dimensions
    delays = [(dl.source_role, model.names(dl.source_role).index(dl.source), dl.dead_time)
              for dl in model.delays]
    return LinearModel(
        A=shape(A, nx, nx), B=shape(B, nx, nu), Bd=shape(Bd, nx, nd), Bz=shape(Bz, nx, nz),
        C=shape(C, ny, nx), D=shape(D, ny, nu), Dd=shape(Dd, ny, nd), Dz=shape(Dz, ny, nz),
        op=op, delays=delays, time_unit=model.time_unit)
