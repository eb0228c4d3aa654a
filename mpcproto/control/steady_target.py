"""Steady-state target calculation: where should the MVs and CVs settle?

A small QP on the gain model, solved every sample before the dynamic problem (the usual two-layer
arrangement of industrial predictive control, e.g. Muske & Rawlings 1993; Rao & Rawlings 1999)::

    minimize    sum_i  c_i * e_i^2                    (CV outside its setpoint band; c_i by priority)
              + sum_i  l_i * s_i + h_i * s_i^2         (soft CV limits, exact penalty)
              + sum_j  r_j * (us_j - rest_j)^2         (MV resting values; small: picks among ties)
    subject to  ys = G us + c                          (c: measured DVs and disturbance estimates)
                band_lo - e <= ys ... (e >= 0 either side, written as band_lo <= ys - e <= band_hi)
                lim_lo <= ys + s,  ys - s <= lim_hi,  s >= 0
                mv_lo <= us <= mv_hi                   (hard)

All in deviation variables.  Priorities enter through the weights: a CV of a higher priority class
gets weights larger by a factor ``priority_ratio`` per class, so a lower-priority CV gives way first
when the MVs cannot satisfy every CV.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..exceptions import NotBuiltError, SettingsError
from ._qp import CompiledQP

__all__ = ["SteadyTarget"]


class SteadyTarget:
    """The steady-state target QP, compiled once (cvxpy, DPP) and re-solved each sample.

    Parameters
    ----------
    G : ndarray (ny, nu)
        Steady-state gains from MVs to CVs (deviation variables).
    Gd, Gw : ndarray (ny, nd), (ny, nw)
        Steady-state gains from the DVs and from the disturbance states to the CVs.
    band_weight, limit_linear, limit_quadratic : ndarray (ny,)
        Weights per CV (already scaled by priority and engineering scale).
    rest_weight : ndarray (nu,)
        Weight of the MV resting values (strictly positive keeps the target unique).
    solver_options : dict
        OSQP settings for the fast path.
    """

    def __init__(self, G, band_weight, limit_linear, limit_quadratic, rest_weight,
                 solver_options=None, Gd=None, Gw=None):
        self.G = np.asarray(G, float)
        self.Gd = np.zeros((self.G.shape[0], 0)) if Gd is None else np.asarray(Gd, float)
        self.Gw = np.zeros((self.G.shape[0], 0)) if Gw is None else np.asarray(Gw, float)
        self.band_weight = np.asarray(band_weight, float)
        self.limit_linear = np.asarray(limit_linear, float)
        self.limit_quadratic = np.asarray(limit_quadratic, float)
        self.rest_weight = np.asarray(rest_weight, float)
        self.solver_options = dict(solver_options or {})
        self.is_built = False

    def build(self) -> "SteadyTarget":
        """Write the QP in cvxpy and compile it once."""
        import cvxpy as cp

        G = self.G
        if G.ndim != 2 or not np.all(np.isfinite(G)):
            raise SettingsError(f"SteadyTarget: the gain matrix must be a finite 2-D array; got shape "
                                f"{G.shape} (an integrating model has no steady-state gain: turn the "
                                f"steady target off).")
        ny, nu = G.shape
        us = cp.Variable(nu, name="us")
        ys = cp.Variable(ny, name="ys")
        e = cp.Variable(ny, name="e")
        s = cp.Variable(ny, name="s")
        par = {
            "offset": cp.Parameter(ny, name="offset"),
            "band_lo": cp.Parameter(ny, name="band_lo"),
            "band_hi": cp.Parameter(ny, name="band_hi"),
            "lim_lo": cp.Parameter(ny, name="lim_lo"),
            "lim_hi": cp.Parameter(ny, name="lim_hi"),
            "mv_lo": cp.Parameter(nu, name="mv_lo"),
            "mv_hi": cp.Parameter(nu, name="mv_hi"),
            "rest": cp.Parameter(nu, name="rest"),
        }
        rw = self.rest_weight
        obj = (cp.sum(cp.multiply(self.band_weight, cp.square(e)))
               + self.limit_linear @ s + cp.sum(cp.multiply(self.limit_quadratic, cp.square(s)))
               + cp.sum(cp.multiply(rw, cp.square(us)))
               - 2 * (cp.multiply(rw, par["rest"]) @ us))
        cons = [ys == G @ us + par["offset"],
                par["band_lo"] <= ys - e, ys - e <= par["band_hi"],
                ys + s >= par["lim_lo"], ys - s <= par["lim_hi"], s >= 0,
                us >= par["mv_lo"], us <= par["mv_hi"]]
        prob = cp.Problem(cp.Minimize(obj), cons)
        self.qp_ = CompiledQP(prob, par, {"us": us, "ys": ys, "e": e, "s": s},
                              inf_parameters=("band_lo", "band_hi", "lim_lo", "lim_hi", "mv_lo", "mv_hi"),
                              owner="SteadyTarget").compile()
        nd, nw = self.Gd.shape[1], self.Gw.shape[1]
        eye_y, eye_u = sp.identity(ny), sp.identity(nu)
        self.layout_ = {"d": nd, "w": nw, "band_lo": ny, "band_hi": ny, "lim_lo": ny, "lim_hi": ny,
                        "mv_lo": nu, "mv_hi": nu, "rest": nu}
        self.qp_.set_inputs(
            self.layout_,
            {"offset": {"d": self.Gd, "w": self.Gw}, "band_lo": {"band_lo": eye_y},
             "band_hi": {"band_hi": eye_y}, "lim_lo": {"lim_lo": eye_y}, "lim_hi": {"lim_hi": eye_y},
             "mv_lo": {"mv_lo": eye_u}, "mv_hi": {"mv_hi": eye_u}, "rest": {"rest": eye_u}},
            inf_inputs=("band_lo", "band_hi", "lim_lo", "lim_hi", "mv_lo", "mv_hi"))
        self.qp_.setup(self.solver_options)
        self.is_built = True
        return self

    def solve(self, z: np.ndarray, fast: bool = True, solver: str = "OSQP", options=None):
        """Solve for the input vector *z* (blocks in ``layout_`` order, deviation variables).

        Returns a :class:`~mpcproto.control._qp.QPResult` with ``us``, ``ys``, ``e``, ``s``.
        """
        if not self.is_built:
            raise NotBuiltError("SteadyTarget is not built; call .build() first.")
        if fast:
            return self.qp_.solve_inputs(z)
        return self.qp_.solve_cvxpy(self.qp_.values_from_inputs(z), solver=solver, options=options)
