"""The predictive controller's dynamic QP stated in cvxpy: the sparse form and the reference.

:func:`state_dynamic_qp` writes the whole-horizon problem with state variables ``x``, MV values
``u``, moves ``du``, band errors ``e`` and limit slacks ``slack`` (see the module docstring of
:mod:`mpcproto.control.mpc`), compiles it once (DPP) into a :class:`~mpcproto.control._qp.CompiledQP`
and composes cvxpy's parameter map with the expansion from the controller's small input vector.
This statement is the library's definition of the dynamic QP: OSQP drives it directly (the sparse
path), Clarabel/OSQP/DAQP solve it through ``cvxpy.Problem.solve`` (the reference path), and the
condensed form (:mod:`mpcproto.control.condensed`) is checked against it.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ._qp import CompiledQP

__all__ = ["state_dynamic_qp", "input_layout", "state_scales", "noise_scales",
           "target_preferred_weight"]


def input_layout(nx: int, nu: int, nd: int, ny: int, N: int, M: int, terminal: bool, *,
                 preview: bool = False) -> dict[str, int]:
    """Blocks of the controller's per-sample input vector ``z`` (engineering deviation units).

    With *preview* a last block ``ref`` (N*ny, stage after stage): the per-stage departures of
    the CV band from its one value (:mod:`mpcproto.control.preview`), added to both band ends.
    """
    layout = {"x0": nx, "u_prev": nu, "d_now": nd, "dtraj": nd * (N + 1), "w": ny,
              "band_lo": ny, "band_hi": ny, "lim_lo": ny, "lim_hi": ny, "u_lo": nu * M,
              "u_hi": nu * M, "rate": nu, "pref": nu}
    if terminal:
        layout["x_term"] = nx
    if preview:
        layout["ref"] = ny * N
    return layout


def state_dynamic_qp(scaled, scales, N: int, M: int, Pt=None, preview: bool = False) -> CompiledQP:
    """Write, compile and map the sparse dynamic QP.

    Parameters
    ----------
    scaled : dict
        The controller's ``scaled_`` matrices and weights.
    scales : (sx, su, sy)
    N, M : int
        Prediction and control horizons.
    Pt : ndarray or None
        Terminal weight on the scaled last state.
    preview : bool
        The input vector carries per-stage band departures (``ref``, setpoint preview).
    """
    import cvxpy as cp

    A, B, C, D = scaled["A"], scaled["B"], scaled["C"], scaled["D"]
    Bds, Dds, Bws, Cws = scaled["Bd"], scaled["Dd"], scaled["Bw"], scaled["Cw"]
    wq_s, wr_s, wpref_s = scaled["cv_weight"], scaled["move_weight"], scaled["preferred_weight"]
    wl_s, wh_s = scaled["limit_linear"], scaled["limit_quadratic"]
    sx, su, sy = scales
    nx, nu, ny, nd = A.shape[0], B.shape[1], C.shape[0], Bds.shape[1]
    X = cp.Variable((nx, N), name="x")
    U = cp.Variable((nu, M), name="u")
    dU = cp.Variable((nu, M), name="du")
    E = cp.Variable((ny, N), name="e")
    S = cp.Variable((ny, N), name="slack")
    par = {
        "x0": cp.Parameter(nx, name="x0"), "u_prev": cp.Parameter(nu, name="u_prev"),
        "W": cp.Parameter((nx, N), name="W"), "V": cp.Parameter((ny, N), name="V"),
        "band_lo": cp.Parameter((ny, N), name="band_lo"),
        "band_hi": cp.Parameter((ny, N), name="band_hi"),
        "lim_lo": cp.Parameter((ny, N), name="lim_lo"),
        "lim_hi": cp.Parameter((ny, N), name="lim_hi"),
        "u_lo": cp.Parameter((nu, M), name="u_lo"), "u_hi": cp.Parameter((nu, M), name="u_hi"),
        "du_lo": cp.Parameter((nu, M), name="du_lo"), "du_hi": cp.Parameter((nu, M), name="du_hi"),
        "pref": cp.Parameter((nu, M), name="pref"),
    }
    e1N = np.zeros((1, N))
    e1N[0, 0] = 1.0
    e1M = np.zeros((1, M))
    e1M[0, 0] = 1.0
    shiftN = np.eye(N, k=1)                  # X @ shiftN: column k holds X[:, k-1]
    shiftM = np.eye(M, k=1)
    sel_now = np.zeros((M, N))               # u applied over sample k (k = 0..N-1)
    sel_out = np.zeros((M, N))               # u seen by the output at k = 1..N
    for k in range(N):
        sel_now[min(k, M - 1), k] = 1.0
        sel_out[min(k + 1, M - 1), k] = 1.0
    count = sel_now.sum(axis=1)              # samples each planned move is held
    x0c = cp.reshape(par["x0"], (nx, 1), order="F")
    upc = cp.reshape(par["u_prev"], (nu, 1), order="F")
    Y = C @ X + par["V"]
    if np.any(D != 0):
        Y = Y + D @ (U @ sel_out)
    wq = np.repeat(wq_s[:, None], N, axis=1)
    wr = np.repeat(wr_s[:, None], M, axis=1)
    ws = wpref_s[:, None] * count[None, :]
    wl = np.repeat(wl_s[:, None], N, axis=1)
    wh = np.repeat(wh_s[:, None], N, axis=1)
    obj = (cp.sum(cp.multiply(wq, cp.square(E)))
           + cp.sum(cp.multiply(wr, cp.square(dU)))
           + cp.sum(cp.multiply(ws, cp.square(U)))
           - 2 * cp.sum(cp.multiply(cp.multiply(ws, par["pref"]), U))
           + cp.sum(cp.multiply(wl, S)) + cp.sum(cp.multiply(wh, cp.square(S))))
    if Pt is not None:
        par["x_term"] = cp.Parameter(nx, name="x_term")
        xN = X[:, N - 1]
        obj = obj + cp.quad_form(xN, cp.psd_wrap(Pt)) - 2 * (par["x_term"] @ (Pt @ xN))
    cons = [
        X == A @ (X @ shiftN) + (A @ x0c) @ e1N + B @ (U @ sel_now) + par["W"],
        dU == U - U @ shiftM - upc @ e1M,
        par["band_lo"] <= Y - E, Y - E <= par["band_hi"],
        Y + S >= par["lim_lo"], Y - S <= par["lim_hi"], S >= 0,
        U >= par["u_lo"], U <= par["u_hi"],
        dU >= par["du_lo"], dU <= par["du_hi"],
    ]
    prob = cp.Problem(cp.Minimize(obj), cons)
    qp = CompiledQP(prob, par, {"x": X, "u": U, "du": dU, "e": E, "slack": S},
                    inf_parameters=("band_lo", "band_hi", "lim_lo", "lim_hi", "u_lo",
                                    "u_hi", "du_lo", "du_hi"),
                    owner="PredictiveController").compile()
    layout = input_layout(nx, nu, nd, ny, N, M, Pt is not None, preview=preview)
    # the inputs stay in engineering deviation units: the scaling is folded into the maps
    oneN, oneM = np.ones((N, 1)), np.ones((M, 1))
    iy, iu, ix = sp.diags(1 / sy), sp.diags(1 / su), sp.diags(1 / sx)
    rep_y = sp.kron(oneN, iy)
    rep_u = sp.kron(oneM, iu)
    maps = {
        "x0": {"x0": ix}, "u_prev": {"u_prev": iu},
        # DVs: their value now, plus a forecast's departure from it (zero without forecast)
        "W": {"d_now": sp.kron(oneN, Bds),
              "dtraj": sp.hstack([sp.kron(sp.identity(N), Bds), sp.csc_matrix((nx * N, nd))]),
              "w": sp.kron(oneN, Bws)},
        "V": {"d_now": sp.kron(oneN, Dds),
              "dtraj": sp.hstack([sp.csc_matrix((ny * N, nd)), sp.kron(sp.identity(N), Dds)]),
              "w": sp.kron(oneN, Cws)},
        "band_lo": {"band_lo": rep_y}, "band_hi": {"band_hi": rep_y},
        "lim_lo": {"lim_lo": rep_y}, "lim_hi": {"lim_hi": rep_y},
        "u_lo": {"u_lo": sp.kron(sp.identity(M), iu)},
        "u_hi": {"u_hi": sp.kron(sp.identity(M), iu)},
        "du_lo": {"rate": -rep_u}, "du_hi": {"rate": rep_u}, "pref": {"pref": rep_u},
    }
    if Pt is not None:
        maps["x_term"] = {"x_term": ix}
    if preview:             # per-stage departures (same order as the band's Fortran flattening)
        ref = sp.diags(np.tile(1 / sy, N))
        maps["band_lo"]["ref"] = ref
        maps["band_hi"]["ref"] = ref
    qp.set_inputs(layout, maps, inf_inputs=("band_lo", "band_hi", "lim_lo", "lim_hi",
                                            "u_lo", "u_hi", "rate"))
    return qp


def noise_scales(C, sy, sx):
    """Per state, the size of one CV scale in that state's units, for a state that a CV reads
    directly (the CV's row of ``C`` is mostly that state): ``sy_j / |C_ji|``; other states 1.

    The estimator's ``state_noise`` is per squared such unit: a mass fraction read as wt%
    (C = 100) gets a noise 1e4 times smaller than a level read in m, so that both mean the
    same in the CVs.  States mixed into the CVs (a realization's internal states) keep the
    engineering unit.  (Not the QP's reach-based scales ``sx``: on an open-loop unstable
    unit those grow with the unstable mode and would drown the disturbance estimates.)
    """
    out = np.full(C.shape[1], np.inf)
    absC = np.abs(C)
    for j in range(absC.shape[0]):
        row = absC[j]
        tot = row.sum()
        if tot <= 0:
            continue
        i = int(np.argmax(row))
        if row[i] >= 0.9 * tot:                 # CV j reads state i (nearly) alone
            out[i] = min(out[i], sy[j] / row[i])
    return np.where(np.isfinite(out), out, 1.0)


def target_preferred_weight(preferred_weight, wq_s, su):  # noqa: ARG001 - one signature
    """MV preferred weights for the steady target (engineering units).

    The target is lexicographic (:mod:`~mpcproto.control.steady_target`): the CVs first, then the
    preferred values among the MV combinations that do as well for the CVs, so the weights go
    through as given; only their ratios matter there.  (A single QP with the preferred weights
    scaled down to 1e-6 of the CV weights traded a reachable setpoint for them when an MV moved a
    CV only slightly, and made weights 1 and 100 act alike.)
    """
    return np.asarray(preferred_weight, float).copy()


def state_scales(A, B, C, su, sy, T):
    """Per state: the largest change one scaled MV step causes within T samples.

    States no MV reaches take the CV scale through ``C`` (or 1).
    """
    nx = A.shape[0]
    reach = np.zeros(nx)
    S, AkB = np.zeros_like(B), B.copy()
    for _ in range(max(T, 1)):          # A^k B by products with B only: nx^2 nu per sample
        S = S + AkB
        reach = np.maximum(reach, np.max(np.abs(S) * su[None, :], axis=1) if B.size else 0.0)
        AkB = A @ AkB
    sx = reach
    bad = ~(sx > 1e-12)
    if bad.any():
        with np.errstate(divide="ignore"):
            via_c = np.min(np.where(np.abs(C) > 0, sy[:, None] / np.abs(C), np.inf), axis=0)
        sx = np.where(bad, np.where(np.isfinite(via_c), via_c, 1.0), sx)
    return np.clip(sx, 1e-9, 1e9)
