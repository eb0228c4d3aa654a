"""Steady-state target calculation: where should the MVs and CVs settle?

A small QP on the steady-state form of the model, solved every sample before the dynamic problem
(the usual two-layer arrangement of industrial predictive control; Muske & Rawlings 1993, Rao &
Rawlings 1999)::

    minimize    sum_i  c_i * e_i^2                    (CV outside its setpoint band; c_i by priority)
              + sum_i  l_i * s_i + h_i * s_i^2         (soft CV limits, exact penalty)
              + sum_j  r_j * (us_j - pref_j)^2         (MV preferred values; small: picks among ties)
    subject to  (I - A) xs = B us + Bd d + Bw w        (steady state of the model)
                ys = C xs + D us + Dd d + Cw w
                band_lo <= ys - e <= band_hi
                lim_lo <= ys + s,  ys - s <= lim_hi,  s >= 0
                mv_lo <= us <= mv_hi                   (hard)

All in deviation variables; ``d`` are the measured DVs, ``w`` the disturbance estimates.  Written
with the state (not a gain matrix) so that integrating units work: a level's steady state asks for
balanced flows and leaves the level itself to its setpoint.  Priorities enter through the weights:
a CV of a higher priority class gets weights larger by a factor per class, so a lower-priority CV
gives way first when the MVs cannot satisfy every CV.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.sparse as sp

from ..exceptions import NotBuiltError, SettingsError
from ._qp import CompiledQP, QPResult

__all__ = ["SteadyTarget"]


class SteadyTarget:
    """The steady-state target QP, compiled once (cvxpy, DPP) and re-solved each sample.

    Parameters
    ----------
    A, B, C, D : ndarray
        Discrete model matrices (deviation variables).
    Bd, Dd : ndarray (nx, nd), (ny, nd)
        DV input matrices.
    Bw, Cw : ndarray (nx, nw), (ny, nw)
        How the disturbance states enter the states and the CVs.
    band_weight, limit_linear, limit_quadratic : ndarray (ny,)
        Weights per CV (already scaled by priority and engineering scale).
    preferred_weight : ndarray (nu,)
        Weight of the MV preferred values (strictly positive keeps the target unique).
    solver_options : dict
        OSQP settings for the fast path.
    scales : tuple of ndarray (x, u, y) or None
        Engineering size of one unit of each state, MV and CV: the QP is written in these scaled
        units (a well-balanced problem for OSQP); inputs and results stay in engineering units.

    Notes
    -----
    The input vector of :meth:`solve` is the concatenation, in ``layout_`` order, of ``d`` (nd),
    ``w`` (nw), ``band_lo``, ``band_hi``, ``lim_lo``, ``lim_hi`` (ny each), ``mv_lo``, ``mv_hi``
    and ``pref`` (nu each).
    """

    def __init__(self, A, B, C, D, Bd, Dd, Bw, Cw, band_weight, limit_linear, limit_quadratic,
                 preferred_weight, solver_options=None, scales=None):
        self.A, self.B, self.C, self.D = (np.asarray(M, float) for M in (A, B, C, D))
        self.Bd, self.Dd, self.Bw, self.Cw = (np.asarray(M, float) for M in (Bd, Dd, Bw, Cw))
        self.band_weight = np.asarray(band_weight, float)
        self.limit_linear = np.asarray(limit_linear, float)
        self.limit_quadratic = np.asarray(limit_quadratic, float)
        self.preferred_weight = np.asarray(preferred_weight, float)
        self.solver_options = dict(solver_options or {})
        self.scales = scales
        self.is_built = False

    def build(self) -> "SteadyTarget":
        """Write the QP in cvxpy and compile it once."""
        import cvxpy as cp

        A, B, C, D = self.A, self.B, self.C, self.D
        nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
        nd, nw = self.Bd.shape[1], self.Bw.shape[1]
        if self.scales is None:
            sx, su, sy = np.ones(nx), np.ones(nu), np.ones(ny)
        else:
            sx, su, sy = (np.asarray(v, float) for v in self.scales)
            if sx.shape != (nx,) or su.shape != (nu,) or sy.shape != (ny,):
                raise SettingsError(f"SteadyTarget: scales must have shapes ({nx},), ({nu},), "
                                    f"({ny},); got {sx.shape}, {su.shape}, {sy.shape}.")
        self._sx, self._su, self._sy = sx, su, sy
        for name, M, shape in (("B", B, (nx, nu)), ("C", C, (ny, nx)), ("D", D, (ny, nu)),
                               ("Bd", self.Bd, (nx, nd)), ("Dd", self.Dd, (ny, nd)),
                               ("Cw", self.Cw, (ny, nw))):
            if M.shape != shape:
                raise SettingsError(f"SteadyTarget: {name} must have shape {shape}; got {M.shape}.")
        xs = cp.Variable(nx, name="xs")
        us = cp.Variable(nu, name="us")
        ys = cp.Variable(ny, name="ys")
        e = cp.Variable(ny, name="e")
        s = cp.Variable(ny, name="s")
        par = {
            "dx": cp.Parameter(nx, name="dx"), "dy": cp.Parameter(ny, name="dy"),
            "band_lo": cp.Parameter(ny, name="band_lo"), "band_hi": cp.Parameter(ny, name="band_hi"),
            "lim_lo": cp.Parameter(ny, name="lim_lo"), "lim_hi": cp.Parameter(ny, name="lim_hi"),
            "mv_lo": cp.Parameter(nu, name="mv_lo"), "mv_hi": cp.Parameter(nu, name="mv_hi"),
            "pref": cp.Parameter(nu, name="pref"),
        }
        rw = self.preferred_weight * su ** 2
        obj = (cp.sum(cp.multiply(self.band_weight * sy ** 2, cp.square(e)))
               + (self.limit_linear * sy) @ s
               + cp.sum(cp.multiply(self.limit_quadratic * sy ** 2, cp.square(s)))
               + cp.sum(cp.multiply(rw, cp.square(us)))
               - 2 * (cp.multiply(rw, par["pref"]) @ us))
        # scaled model: x = sx * xs', u = su * us', y = sy * ys'
        IA = (np.eye(nx) - A) * (1 / sx)[:, None] * sx[None, :]
        Bs = B * (1 / sx)[:, None] * su[None, :]
        Cs = C * (1 / sy)[:, None] * sx[None, :]
        Ds = D * (1 / sy)[:, None] * su[None, :]
        cons = [IA @ xs - Bs @ us == par["dx"],
                ys == Cs @ xs + Ds @ us + par["dy"],
                par["band_lo"] <= ys - e, ys - e <= par["band_hi"],
                ys + s >= par["lim_lo"], ys - s <= par["lim_hi"], s >= 0,
                us >= par["mv_lo"], us <= par["mv_hi"]]
        prob = cp.Problem(cp.Minimize(obj), cons)
        self.qp_ = CompiledQP(prob, par, {"xs": xs, "us": us, "ys": ys, "e": e, "s": s},
                              inf_parameters=("band_lo", "band_hi", "lim_lo", "lim_hi", "mv_lo",
                                              "mv_hi"),
                              owner="SteadyTarget").compile()
        eye_y, eye_u = sp.diags(1 / sy), sp.diags(1 / su)
        self.layout_ = {"d": nd, "w": nw, "band_lo": ny, "band_hi": ny, "lim_lo": ny, "lim_hi": ny,
                        "mv_lo": nu, "mv_hi": nu, "pref": nu}
        self.qp_.set_inputs(
            self.layout_,
            {"dx": {"d": self.Bd / sx[:, None], "w": self.Bw / sx[:, None]},
             "dy": {"d": self.Dd / sy[:, None], "w": self.Cw / sy[:, None]},
             "band_lo": {"band_lo": eye_y}, "band_hi": {"band_hi": eye_y},
             "lim_lo": {"lim_lo": eye_y}, "lim_hi": {"lim_hi": eye_y},
             "mv_lo": {"mv_lo": eye_u}, "mv_hi": {"mv_hi": eye_u}, "pref": {"pref": eye_u}},
            inf_inputs=("band_lo", "band_hi", "lim_lo", "lim_hi", "mv_lo", "mv_hi"))
        self.qp_.setup(self.solver_options)
        self.qp_.keep_duals = True
        Pu = np.triu(self.qp_.P_.toarray())          # OSQP reads the upper triangle
        self._P = Pu + np.triu(Pu, 1).T
        self._A = self.qp_.A_.toarray()
        self._active: dict[bytes, Any] = {}
        self._last_key = None
        self.explicit_solves = 0
        self.is_built = True
        return self

    def restart(self) -> None:
        """Forget the solver's warm start and the learned active sets (a rerun repeats a run)."""
        if not self.is_built:
            raise NotBuiltError("SteadyTarget is not built; call .build() first.")
        self.qp_.restart()
        self._active.clear()
        self._last_key = None
        self.explicit_solves = 0

    # -- re-using the active set: for a fixed set of active constraints the QP's solution is an
    # affine function of its data (the KKT system), so while the same constraints stay active the
    # target is one matrix-vector product; it is accepted only when it satisfies every KKT
    # condition (primal bounds, signs of the multipliers), else OSQP solves and teaches the new set.
    def _learn_active_set(self, q, l, u):
        y = self.qp_.last_duals
        if y is None:
            return
        eq = l == u
        up = (y > 1e-9) & ~eq
        lo = (y < -1e-9) & ~eq
        key = np.concatenate([eq, up, lo]).tobytes()
        if key not in self._active:
            S = np.flatnonzero(eq | up | lo)
            AS = self._A[S]
            K = np.block([[self._P, AS.T], [AS, np.zeros((len(S), len(S)))]])
            entry = None
            if np.linalg.cond(K) < 1e10:
                # sign each multiplier must have: + on an active upper bound, - on a lower one,
                # free on an equality
                sign = np.where(up[S], 1.0, np.where(lo[S], -1.0, 0.0))
                entry = (np.linalg.inv(K), S, lo[S], eq, self._P.shape[0], sign)
            if len(self._active) > 256:
                self._active.clear()
            self._active[key] = entry
        self._last_key = key

    def _reuse_active_set(self, q, l, u):
        if self._last_key is None:
            return None
        entry = self._active.get(self._last_key)
        if entry is None:
            return None
        Kinv, S, loS, eq, n, sign = entry
        if ((l == u) != eq).any():
            return None
        t0 = time.perf_counter()
        sol = Kinv @ np.concatenate([-q, np.where(loS, l[S], u[S])])
        x = sol[:n]
        Ax = self._A @ x
        # the scaled problem has O(1) values: absolute tolerances are meaningful
        if (Ax - u > 1e-8).any() or (l - Ax > 1e-8).any() or (sign * sol[n:] < -1e-9).any():
            return None
        self.explicit_solves += 1
        vals = {name: x[sl] for name, (sl, _shape) in self.qp_._vslices.items()}
        return QPResult(status="optimal", accepted=True, values=vals, iterations=0,
                        solve_ms=(time.perf_counter() - t0) * 1e3)

    def solve(self, z: np.ndarray, fast: bool = True, solver: str = "OSQP", options=None):
        """Solve for the input vector *z* (blocks in ``layout_`` order, deviation variables).

        Returns a :class:`~mpcproto.control._qp.QPResult` with ``xs``, ``us``, ``ys`` and ``s``
        in engineering deviation units (``e`` stays scaled).
        """
        if not self.is_built:
            raise NotBuiltError("SteadyTarget is not built; call .build() first.")
        if fast:
            q, l, u = self.qp_.data_inputs(z)
            res = self._reuse_active_set(q, l, u)
            if res is None:
                res = self.qp_.solve_data(q, l, u)
                if res.accepted:
                    self._learn_active_set(q, l, u)
        else:
            res = self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=solver,
                                       options=options)
        v = res.values
        if v:       # back to engineering units
            v["xs"] = v["xs"] * self._sx
            v["us"] = v["us"] * self._su
            v["ys"] = v["ys"] * self._sy
            v["s"] = v["s"] * self._sy
        return res
