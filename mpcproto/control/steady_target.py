"""Steady-state target calculation: where should the MVs and CVs settle?

Two small QPs on the steady-state form of the model, solved every sample before the dynamic
problem (the usual two-layer arrangement of industrial predictive control; Muske & Rawlings 1993,
Rao & Rawlings 1999).  The target is *lexicographic*: first the CVs, then the MVs' preferred values
among the MV combinations that do as well for the CVs.

Stage 1, the CVs::

    minimize    sum_i  c_i * e_i^2                    (CV outside its setpoint band; c_i by priority)
              + sum_i  l_i * s_i + h_i * s_i^2         (soft CV limits, exact penalty)
    subject to  (I - A) xs = B us + Bd d + Bw w        (steady state of the model)
                ys = C xs + D us + Dd d + Cw w
                band_lo <= ys - e <= band_hi
                lim_lo <= ys + s,  ys - s <= lim_hi,  s >= 0
                mv_lo <= us <= mv_hi                   (hard)

Stage 2, the MVs: with every CV kept at least as close to its band and inside its limits as stage 1
left it (``band_lo + min(e1, 0) <= ys <= band_hi + max(e1, 0)``, the same for the limits with
``s1``; a tolerance of 1e-10 of the value in scaled units), minimize
``sum_j r_j (us_j - pref_j)^2`` (an MV without a preferred weight gets 1e-6 of the largest) plus,
where the MVs leave a state free (an integrating state no CV pins), a 1e-9 pull of that state
towards the operating point (a unique target).  A reachable setpoint has ``e1 = 0`` and is therefore met exactly (to the
solver's precision); an unreachable one keeps stage 1's compromise (closest in the weighted sense,
priority classes through the weights).  The MV preferred weights act only through their ratios.

Both stages are solved by DAQP (a dual active-set method: exact, no iteration tolerance on the
answer) in reduced coordinates: the steady-state equations are eliminated once at build time
(``[xs; us] = v0(d, w) + N theta`` with ``N`` an orthonormal basis of the null space of
``[I - A, -B]``), and ``theta`` is rescaled along the singular directions of its map to the CVs so
that a CV that an MV moves only slightly (gain 1e-3 per MV scale) is as well conditioned as any
other.  Stage 1 is only semidefinite in ``theta`` (the CVs do not pin every MV): proximal
iterations of strictly convex DAQP solves solve it.  All in deviation variables and scaled units (one MV/CV scale = 1); ``d`` are
the measured DVs, ``w`` the disturbance estimates.  Written with the state (not a gain matrix) so
that integrating units work: a level's steady state asks for balanced flows and leaves the level
itself to its setpoint.

The common case in closed form: when every CV whose band is a single value (a setpoint) can be
met exactly with every other band, every CV limit and every MV bound satisfied, stage 1's optimum
is 0 and stage 2 is the minimum of its objective over those setpoint equalities alone, provided
that minimum satisfies the other rows.  Per *setpoint pattern* (which CVs have a setpoint; a few
cached) one matrix maps the sample's inputs (``d``, ``w``, the setpoints, ``pref``) straight to
``[xs; ys; us]`` (the equality-constrained stage 2 by the null-space method); a solve is one
product and a vectorised check of the other rows.  Where the check fails (an unreachable setpoint,
an active MV bound, zone edge or limit), or where the shortcut would not be exact (a CV bound with
no weight, dependent setpoints that do not agree, disturbances outside the model's steady-state
range), the two DAQP stages decide.  Their deciding rows are then re-used by the next sample:
the same lexicographic solve with those rows as equalities (stage 1 as weighted least squares,
stage 2 with the CVs pinned at stage 1's values), accepted only where both stages' KKT conditions
hold (primal feasibility, the multipliers' signs, a limit's stage-1 multiplier within its linear
weight).  ``iterations`` is 0 for both closed forms; ``last_path`` says which way the last solve
went; ``closed_form = False`` turns both shortcuts off.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from ..exceptions import NotBuiltError
from ..validation import fail, shown
from ._qp import QPResult

__all__ = ["SteadyTarget"]

_INF = 1e30           # DAQP's infinity
_CV_TOL = 1e-12       # stage 2 keeps each CV within this (relative, scaled units) of stage 1
_MIN_NORM = 1e-9      # stage 2's pull of the scaled states/MVs to the operating point
_PREF_FLOOR = 1e-6    # relative preferred weight of an MV without one (ties between MVs)
_DAQP_SETTINGS = {"primal_tol": 1e-11, "iter_limit": 2000}
_PROX_RHO = 1e-6      # stage 1's proximal weight (scaled units)
_PROX_MAX = 40        # at most this many proximal iterations
_TOL_SIGN = np.array([[-_CV_TOL], [_CV_TOL]])     # stage 2's widening of [lo; hi]
_EQ_RANK_TOL = 1e-9   # setpoint rows of Yphi (singular values <= 1): below this, dependent
_EQ_RESID_TOL = 1e-11  # dependent setpoints must agree to this (relative, scaled units)
_STRUCT_CACHE = 8     # setpoint patterns kept (and as many active-set patterns)
_MISSING = object()


def _finite(v):
    """+-inf -> DAQP's infinity (NaN bounds were replaced by +-inf in ``_unpack``)."""
    return np.minimum(np.maximum(v, -_INF), _INF)


class SteadyTarget:
    """The lexicographic steady-state target (CVs first, then MV preferences), solved each sample.

    Parameters
    ----------
    A, B, C, D : ndarray
        Discrete model matrices (deviation variables).
    Bd, Dd : ndarray (nx, nd), (ny, nd)
        DV input matrices.
    Bw, Cw : ndarray (nx, nw), (ny, nw)
        How the disturbance states enter the states and the CVs.
    band_weight, limit_linear, limit_quadratic : ndarray (ny,)
        Weights per CV (already scaled by priority and engineering scale), stage 1.
    preferred_weight : ndarray (nu,)
        Weights of the MV preferred values (engineering units), stage 2; only their ratios matter.
    solver_options : dict
        Accepted for compatibility; DAQP's settings are fixed (see the module).
    scales : tuple of ndarray (x, u, y) or None
        Engineering size of one unit of each state, MV and CV: the QPs are written in these scaled
        units; inputs and results stay in engineering units.

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
        self.closed_form = True       # the exact shortcut of the common case (see the module)
        self.last_path = None         # "closed_form", "active_set", "daqp", "cvxpy", "out_of_range"
        self.is_built = False

    def build(self) -> "SteadyTarget":
        """Eliminate the steady-state equations, set up both stages (and the cvxpy reference)."""
        A, B, C, D = self.A, self.B, self.C, self.D
        nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
        nd, nw = self.Bd.shape[1], self.Bw.shape[1]
        if self.scales is None:
            sx, su, sy = np.ones(nx), np.ones(nu), np.ones(ny)
        else:
            sx, su, sy = (np.asarray(v, float) for v in self.scales)
            if sx.shape != (nx,) or su.shape != (nu,) or sy.shape != (ny,):
                raise fail("SteadyTarget", "scales", f"shapes ({nx},), ({nu},), ({ny},)",
                           f"{sx.shape}, {su.shape}, {sy.shape}")
        self._sx, self._su, self._sy = sx, su, sy
        for name, M, shape in (("B", B, (nx, nu)), ("C", C, (ny, nx)), ("D", D, (ny, nu)),
                               ("Bd", self.Bd, (nx, nd)), ("Dd", self.Dd, (ny, nd)),
                               ("Cw", self.Cw, (ny, nw))):
            if M.shape != shape:
                raise fail("SteadyTarget", name, f"shape {shape}", f"{M.shape}")
        for name, v, n in (("band_weight", self.band_weight, ny),
                           ("limit_linear", self.limit_linear, ny),
                           ("limit_quadratic", self.limit_quadratic, ny),
                           ("preferred_weight", self.preferred_weight, nu)):
            if v.shape != (n,) or not np.all(np.isfinite(v)) or np.any(v < 0):
                raise fail("SteadyTarget", name, f"{n} finite values >= 0", shown(v, 200))
        self.nx, self.nu, self.ny = nx, nu, ny
        # -- scaled model: x = sx * x', u = su * u', y = sy * y'
        IA = (np.eye(nx) - A) * (1 / sx)[:, None] * sx[None, :]
        Bs = B * (1 / sx)[:, None] * su[None, :]
        Cs = C * (1 / sy)[:, None] * sx[None, :]
        Ds = D * (1 / sy)[:, None] * su[None, :]
        self._scaled = (IA, Bs, Cs, Ds)
        # -- steady states v = [x; u] = v0 + N theta with E v = dx, E = [I - A, -B]
        E = np.hstack([IA, -Bs])
        Ue, se, Vte = np.linalg.svd(E)
        tol = max(E.shape) * np.finfo(float).eps * (se[0] if se.size else 1.0) * 10
        r = int(np.sum(se > tol))
        self._Epinv = Vte[:r].T @ (Ue[:, :r].T / se[:r, None])
        self._Erange = Ue[:, :r]                      # dx must lie in range(E)
        self._full_range = r == nx
        N = Vte[r:].T                                 # (nx + nu, k), orthonormal
        Cy = np.hstack([Cs, Ds])
        Y = Cy @ N
        # -- theta = T phi: unit gain to the CVs along the singular directions of Y
        k = N.shape[1]
        if k and ny:
            P, sv, Qt = np.linalg.svd(Y)
            ry = int(np.sum(sv > 1e-12 * max(sv[0], 1e-300))) if sv.size else 0
            T = np.hstack([Qt[:ry].T / sv[:ry], Qt[ry:].T])
        else:
            T = np.eye(k)
        self._N, self._T, self._k = N, T, k
        self._Vphi = N @ T                            # v = v0 + Vphi @ phi
        self._Yphi = Cy @ self._Vphi
        self._Uphi = self._Vphi[nx:]
        self._Cy = Cy
        # -- the inputs: dx = Bd d + Bw w, dy = Dd d + Cw w (scaled)
        self._dxd, self._dxw = self.Bd / sx[:, None], self.Bw / sx[:, None]
        self._dyd, self._dyw = self.Dd / sy[:, None], self.Cw / sy[:, None]
        # -- stage 1: w1 = [s (ny), e (ny), phi (k)]; s >= 0 as DAQP's simple bounds
        c = self.band_weight * sy ** 2
        h = self.limit_quadratic * sy ** 2
        lin = self.limit_linear * sy
        n1 = 2 * ny + k
        self._H1 = np.diag(np.concatenate([2 * h, 2 * c, np.zeros(k)]))
        self._f1 = np.concatenate([lin, np.zeros(ny + k)])
        Z, I = np.zeros((ny, ny)), np.eye(ny)
        self._A1 = np.vstack([
            np.hstack([Z, -I, self._Yphi]),            # band:  ys - e
            np.hstack([I, Z, self._Yphi]),             # low limit:  ys + s
            np.hstack([-I, Z, self._Yphi]),            # high limit: ys - s
            np.hstack([np.zeros((nu, 2 * ny)), self._Uphi]),   # MVs
        ]) if n1 else np.zeros((0, 0))
        self._sense1 = np.zeros(2 * ny + 3 * ny + nu, dtype=np.intc)   # bounds + rows
        self._x1_start = np.zeros(n1)
        self._x1_last = self._x1_start
        self._H1p = self._H1 + _PROX_RHO * np.eye(n1)
        # -- stage 2: phi only; preferred values through their ratios (scaled), a tiny min-norm
        rs = self.preferred_weight * su ** 2
        top = float(rs.max()) if rs.size else 0.0
        wrel = np.where(rs > 0, rs / top, _PREF_FLOOR) if top > 0 else np.full(nu, _PREF_FLOOR)
        self._wrel = wrel
        # the min-norm pull acts only where the MVs do not move (a free integrating state), so the
        # preferred values decide exactly wherever the MVs decide
        Un = N[nx:]
        _, su_, vt_ = np.linalg.svd(Un) if k else (None, np.zeros(0), np.zeros((0, 0)))
        ru = int(np.sum(su_ > 1e-12 * max(su_[0], 1e-300))) if su_.size else 0
        Zf = vt_[ru:].T                               # theta directions that leave the MVs alone
        self._H2 = 2 * (self._Uphi.T @ (wrel[:, None] * self._Uphi)
                        + _MIN_NORM * (T.T @ Zf) @ (Zf.T @ T))
        self._H2 = 0.5 * (self._H2 + self._H2.T)
        self._Zf = Zf
        self._P2 = (T.T @ Zf) @ (Zf.T @ T)          # the pull's part of H2, over _MIN_NORM
        self._unorm = max(float(np.linalg.norm(self._Uphi, 2)) if k else 0.0, 1e-300)
        self._A2 = np.vstack([self._Yphi, self._Uphi])
        self._sense2 = np.zeros(ny + nu, dtype=np.intc)
        self.layout_ = {"d": nd, "w": nw, "band_lo": ny, "band_hi": ny, "lim_lo": ny, "lim_hi": ny,
                        "mv_lo": nu, "mv_hi": nu, "pref": nu}
        off, o = {}, 0
        for key, size in self.layout_.items():
            off[key] = slice(o, o + size)
            o += size
        self._zsl, self._nz = off, o
        # -- per-sample data in a few array operations: [v0; y0; resid; dx] = Kin @ [d; w]
        nin = nd + nw
        Dx = np.hstack([self._dxd, self._dxw])
        Dy = np.hstack([self._dyd, self._dyw])
        Kv = self._Epinv @ Dx
        self._Kin = np.vstack([Kv, Cy @ Kv + Dy, Dx - self._Erange @ (self._Erange.T @ Dx), Dx])
        self._nin = nin
        nb = 4 * ny + 2 * nu                          # band_lo, band_hi, lim_lo, lim_hi, mv_lo, mv_hi
        self._bscale = np.concatenate([np.tile(sy, 4), su, su])
        self._bfill = np.concatenate([np.full(ny, -np.inf), np.full(ny, np.inf),
                                      np.full(ny, -np.inf), np.full(ny, np.inf),
                                      np.full(nu, -np.inf), np.full(nu, np.inf)])
        # the bounds' offsets y0/u0: index into [y0; u0]
        self._boff = np.concatenate([np.tile(np.arange(ny), 4), ny + np.arange(nu),
                                     ny + np.arange(nu)])
        # stage 1's bounds from [bounds - offsets; 0; -inf; inf] (indices of the constants last)
        c0, cm, cp_ = nb, nb + 1, nb + 2
        a = np.arange
        self._g1lo = np.concatenate([np.full(ny, c0), np.full(ny, cm), a(ny), 2 * ny + a(ny),
                                     np.full(ny, cm), 4 * ny + a(nu)])
        self._g1hi = np.concatenate([np.full(2 * ny, cp_), ny + a(ny), np.full(ny, cp_),
                                     3 * ny + a(ny), 4 * ny + nu + a(nu)])
        self._bconst = np.array([0.0, -np.inf, np.inf])
        self._build_closed_form(c, h, lin)
        self._daqp1 = self._daqp2 = None              # DAQP workspaces, made on first use
        self._ref = None                              # cvxpy reference problems, made on first use
        self.stage2_failures = 0
        self.is_built = True
        return self

    def _build_closed_form(self, c, h, lin):
        """What every closed-form solve shares (the per-pattern maps are made on first use)."""
        ny, nu = self.ny, self.nu
        sl = self._zsl
        zi = np.arange(self._nz)
        # the rows [ys; us] must satisfy, gathered from z by one index (per pattern, see
        # _structure): lower bounds enter with +, upper ones with - (lo - y <= 0, y - hi <= 0)
        self._chk_rows = np.vstack([np.concatenate([zi[sl[a]], zi[sl[b]]]) for a, b in (
            ("band_lo", "mv_lo"), ("lim_lo", "mv_lo"), ("band_hi", "mv_hi"),
            ("lim_hi", "mv_hi"))])
        self._chk_sign = np.array([[1.0], [1.0], [-1.0], [-1.0]])
        # a finite band of a CV without band weight, or finite limits without limit weights,
        # leave stage 1's optimum non-unique: such inputs go the general way
        self._unweighted = np.concatenate([zi[sl["band_lo"]][c <= 0], zi[sl["band_hi"]][c <= 0],
                                           zi[sl["lim_lo"]][(h <= 0) & (lin <= 0)],
                                           zi[sl["lim_hi"]][(h <= 0) & (lin <= 0)]])
        self._blo_sl, self._bhi_sl = sl["band_lo"], sl["band_hi"]
        self._bands_sl = slice(sl["band_lo"].start, sl["band_hi"].stop)   # (adjacent in z)
        self._masks = {}                              # setpoint pattern by the bands' bytes
        self._any_unweighted = bool(self._unweighted.size)
        self._c_s, self._lin_s = c, lin              # stage 1's weights (scaled)
        self._structs = {}
        self._pstructs = {}                           # re-used active sets (_pattern_map)
        self._pat = None                              # the last DAQP solve's deciding rows
        self._noting = False
        self._yu = slice(self.nx, self.nx + ny + nu)  # [ys; us] in the map's output

    def _eq_min(self, Ae, dbe, df2):
        """Stage 2 over the equalities ``Ae phi = be``: ``(dphi, Rres)`` with ``phi = dphi @ q``
        and ``Rres @ q`` the disagreement of dependent rows (must be ~0), for ``be = dbe @ q``
        and ``f2 = df2 @ q``; None where there is no well-conditioned answer."""
        k = self._k
        p = Ae.shape[0]
        Ua, sa, Vta = np.linalg.svd(Ae) if p else (np.zeros((0, 0)), np.zeros(0), np.eye(k))
        r = int(np.sum(sa > _EQ_RANK_TOL))
        # min 1/2 phi' H2 phi + f2' phi  s.t.  Ae phi = be, by the null-space method:
        # phi = Fp be + Zn t.  The free directions Zn are split into those that move the
        # MVs (Z1) and those that leave them alone (Z2: only the 1e-9 pull decides there,
        # and f2 has no part in them); the pull's rows are divided by its weight, so the
        # system is as well conditioned as each part (solved as one, the 1e-9 would cost
        # nine digits of the free states)
        Fp = Vta[:r].T @ (Ua[:, :r].T / sa[:r, None])
        Zn = Vta[r:].T
        dphi = Fp @ dbe
        if Zn.shape[1]:
            H2, P = self._H2, self._P2
            _, sm, Vmt = np.linalg.svd(self._Uphi @ Zn)
            rm = int(np.sum(sm > 1e-10 * self._unorm))
            Z1, Z2 = Zn @ Vmt[:rm].T, Zn @ Vmt[rm:].T
            Kb = np.block([[Z1.T @ H2 @ Z1, 2 * _MIN_NORM * (Z1.T @ P @ Z2)],
                           [Z2.T @ P @ Z1, Z2.T @ P @ Z2]])
            rhs = -np.vstack([Z1.T @ (H2 @ dphi + df2), Z2.T @ (P @ dphi)])
            if not np.linalg.cond(Kb) < 1e12:
                return None
            dphi = dphi + np.hstack([Z1, Z2]) @ np.linalg.solve(Kb, rhs)
        return dphi, Ua[:, r:].T @ dbe

    def _inputs(self, m, ncol):
        """Maps from q = [d; w; ncol values; pref] (engineering) to ``y0`` and ``u0`` (scaled)
        and to stage 2's ``f2``."""
        nx, nu, ny = self.nx, self.nu, self.ny
        nv, nin = nx + nu, self._nin
        Kv, Ky = self._Kin[:nv], self._Kin[nv:nv + ny]
        dy0 = np.hstack([Ky, np.zeros((ny, ncol + nu))])
        du0 = np.hstack([Kv[nx:], np.zeros((nu, ncol + nu))])
        dpref = np.hstack([np.zeros((nu, nin + ncol)), np.diag(1 / self._su)])
        df2 = -2 * (self._Uphi.T * self._wrel) @ (dpref - du0)
        return np.hstack([Kv, np.zeros((nv, ncol + nu))]), dy0, du0, df2

    def _finish_map(self, dv0, dy0, dphi, extra):
        """[xs; ys; us; phi; extra rows] in engineering units from the maps of v0, y0, phi."""
        nx = self.nx
        dv = dv0 + self._Vphi @ dphi
        dy = dy0 + self._Yphi @ dphi
        G = np.vstack([dv[:nx] * self._sx[:, None], dy * self._sy[:, None],
                       dv[nx:] * self._su[:, None], dphi] + extra)
        return G if np.all(np.isfinite(G)) else None

    def _structure(self, mask):
        """The affine map of one setpoint pattern *mask* (bool, ny): ``[xs; ys; us; phi; r] =
        G @ z[cols]`` (engineering units; ``r`` the disagreement of dependent setpoints, scaled),
        or None where the pattern has no exact closed form."""
        nin, sy = self._nin, self._sy
        m = np.flatnonzero(mask)
        p = m.size
        dv0, dy0, _, df2 = self._inputs(m, p)
        # be = setpoints - y0 (scaled), the equality rows' right side
        dbe = np.hstack([np.zeros((p, nin)), np.diag(1 / sy[m]), np.zeros((p, self.nu))]) - dy0[m]
        if self._k:
            sol = self._eq_min(self._Yphi[m], dbe, df2)
            if sol is None:
                return None
            dphi, Rres = sol
        else:
            dphi, Rres = np.zeros((0, dbe.shape[1])), dbe   # nothing moves: setpoints must hold
        G = self._finish_map(dv0, dy0, dphi, [Rres])
        if G is None:
            return None
        zi = np.arange(self._nz)
        cols = np.concatenate([zi[:nin], zi[self._zsl["band_lo"]][m], zi[self._zsl["pref"]]])
        # a setpoint CV is checked against its limits only (its band is the equality itself)
        chk = self._chk_rows.copy()
        chk[0, m] = chk[1, m]
        chk[2, m] = chk[3, m]
        return G, cols, Rres.shape[0], chk

    def _solve_closed_form(self, z):
        """The exact answer by a closed form (the common case, or the last DAQP solve's active
        rows re-used), or None where the two DAQP stages must decide."""
        bands = z[self._bands_sl].tobytes()      # [band_lo; band_hi]: setpoints change rarely
        try:
            mask, key = self._masks[bands]
        except KeyError:
            blo = z[self._blo_sl]
            mask = blo == z[self._bhi_sl]
            mask &= np.isfinite(blo)           # (an infinite "setpoint" is no setpoint)
            key = mask.tobytes()
            if len(self._masks) >= 4 * _STRUCT_CACHE:
                self._masks.clear()
            self._masks[bands] = mask, key
        if self._any_unweighted and (np.abs(z[self._unweighted]) < np.inf).any():
            return None
        out = None
        pat = self._pat
        if pat is not None and pat[0] == key:
            pst = self._pstructs.get(pat, _MISSING)
            if pst is _MISSING:
                if len(self._pstructs) >= _STRUCT_CACHE:
                    self._pstructs.pop(next(iter(self._pstructs)))
                pst = self._pstructs[pat] = self._pattern_map(pat)
            if pst is not None:
                out = self._solve_pattern(z, pst)
                self.last_path = "active_set"
        if out is None:
            out = self._solve_common(z, mask, key)
            if out is None:
                return None
            self._pat = None
            self.last_path = "closed_form"
        nx, ny = self.nx, self.ny
        nu = self.nu
        self._x1_last = None    # stage 1's next start: [s = 0; e = 0; phi], made when needed
        self._x1_from = out
        vals = _TargetValues(xs=out[:nx], ys=out[nx:nx + ny], us=out[nx + ny:nx + ny + nu])
        vals._data, vals._sy, vals._source = None, self._sy, (self, z.copy())
        return vals

    def _solve_common(self, z, mask, key):
        """The common case (setpoints met, nothing else active): the map's output, or None."""
        try:
            st = self._structs[key]
        except KeyError:
            if len(self._structs) >= _STRUCT_CACHE:
                self._structs.pop(next(iter(self._structs)))
            st = self._structs[key] = self._structure(mask)
        if st is None:
            return None
        G, cols, nres, chk = st
        q = z[cols]
        out = G @ q
        if nres:
            be_scale = 1.0 + float(np.maximum.reduce(np.abs(q[self._nin:self._nin + mask.sum()]
                                                               / self._sy[mask]), initial=0.0))
            if float(np.maximum.reduce(np.abs(out[-nres:]))) > _EQ_RESID_TOL * be_scale:
                return None
        # every other row, strictly: lo - y <= 0 and y - hi <= 0 (a candidate on an edge by
        # round-off only goes the general way).  NaN -- an absent bound given as NaN, or a NaN
        # among the inputs -- fails too (np.maximum propagates it); an infinite bound never binds
        g = z[chk] - out[self._yu]
        g *= self._chk_sign
        if not np.maximum.reduce(g, axis=None) <= 0.0:
            return None
        return out

    # ------------------------------------------------------------------ a re-used active set
    def _note_pattern(self, data, y0, ys1, yf, uf):
        """After a DAQP solve: the rows that decided it (scaled units), kept for the next
        sample's closed form (:meth:`_pattern_map`); None where a soft limit is violated."""
        blo, bhi, llo, lhi = data["band_lo"], data["band_hi"], data["lim_lo"], data["lim_hi"]
        bounds = {"lim_lo": llo, "lim_hi": lhi, "band_lo": blo, "band_hi": bhi,
                  "mv_lo": data["mv_lo"], "mv_hi": data["mv_hi"]}
        with np.errstate(invalid="ignore"):
            if np.any(np.maximum(llo - ys1, ys1 - lhi) > 1e-9 * (1 + np.abs(ys1))):
                return None
            sp = (blo == bhi) & np.isfinite(blo)
            e1 = ys1 - np.minimum(np.maximum(ys1, blo), np.maximum(blo, bhi))
            o_lo = ~sp & (e1 < -1e-9 * (1 + np.abs(blo)))
            o_hi = ~sp & (e1 > 1e-9 * (1 + np.abs(bhi)))
            inside = ~(sp | o_lo | o_hi)
            rows = []
            for name, sign in (("lim_lo", -1), ("lim_hi", 1), ("mv_lo", -1), ("mv_hi", 1),
                               ("band_lo", -1), ("band_hi", 1)):
                b = bounds[name]
                val = uf if name.startswith("mv") else yf
                hit = (np.abs(val - b) <= 1e-9 * (1 + np.abs(b))) & np.isfinite(b)
                if name.startswith("band"):
                    hit &= inside
                rows += [(name, int(i), sign) for i in np.flatnonzero(hit)]
        return (sp.tobytes(), tuple(np.flatnonzero(o_lo)), tuple(np.flatnonzero(o_hi)),
                tuple(rows))

    def _pattern_map(self, pat):
        """The closed form of a lexicographic solve whose deciding rows are *pat* (see
        :meth:`_note_pattern`): stage 1 as weighted least squares of the CVs off their targets
        (setpoints; zone edges of the CVs outside their zones) over the active limit and MV rows,
        stage 2 over those CVs pinned at stage 1's values and its own active rows.  Besides
        ``[xs; ys; us; phi]`` the map gives the disagreement of dependent rows (must be ~0) and
        the multipliers of the active rows (each stage's, signed: must be >= 0, and a limit's
        stage-1 multiplier at most its linear weight: the KKT conditions of both stages)."""
        mask = np.frombuffer(pat[0], dtype=bool)
        o_lo, o_hi, rows = list(pat[1]), list(pat[2]), pat[3]
        nu, ny, k, nin = self.nu, self.ny, self._k, self._nin
        if not k:
            return None
        sy, su, sl = self._sy, self._su, self._zsl
        zi = np.arange(self._nz)
        S = list(np.flatnonzero(mask))
        T = S + o_lo + o_hi
        tcols = [zi[sl["band_lo"]][i] for i in S + o_lo] + [zi[sl["band_hi"]][i] for i in o_hi]
        a1 = [r for r in rows if not r[0].startswith("band")]
        a2 = [r for r in a1 if r[0].startswith("mv") or r[1] not in T] + [
            r for r in rows if r[0].startswith("band")]
        if any(self._c_s[i] <= 0 for i in T):
            return None
        rcols = {r: zi[sl[r[0]]][r[1]] for r in rows}
        vals = list(tcols) + [rcols[r] for r in rows]      # q = [d; w; vals; pref]
        ncol = len(vals)
        dv0, dy0, du0, df2 = self._inputs(None, ncol)
        nq = dv0.shape[1]

        def value_row(pos, kind_y, i):                     # bound - offset (scaled), a row of q
            e = np.zeros(nq)
            e[nin + pos] = 1 / (sy[i] if kind_y else su[i])
            return e - (dy0[i] if kind_y else du0[i])

        def row_of(r):
            return self._Uphi[r[1]] if r[0].startswith("mv") else self._Yphi[r[1]]

        pos = {r: len(tcols) + j for j, r in enumerate(rows)}
        Y = self._Yphi[T]

        def independent(base, cand):
            """Rows of *cand* that add to the rank of *base* (greedy); the others are implied
            where consistent (checked: their residuals), and carry no multiplier."""
            keep, drop, M = [], [], base
            rk = np.linalg.matrix_rank(M, tol=_EQ_RANK_TOL) if M.shape[0] else 0
            for r in cand:
                M2 = np.vstack([M, row_of(r)])
                rk2 = np.linalg.matrix_rank(M2, tol=_EQ_RANK_TOL)
                if rk2 > rk:
                    keep.append(r)
                    M, rk = M2, rk2
                else:
                    drop.append(r)
            return keep, drop

        a1, drop1 = independent(np.zeros((0, k)), a1)
        a2, drop2 = independent(Y, a2)
        dropped = list(dict.fromkeys(drop1 + drop2))
        db = np.array([value_row(j, True, i) for j, i in enumerate(T)]).reshape(len(T), nq)
        A1 = np.array([row_of(r) for r in a1]).reshape(len(a1), k)
        da1 = np.array([value_row(pos[r], not r[0].startswith("mv"), r[1])
                        for r in a1]).reshape(len(a1), nq)
        A2 = np.array([row_of(r) for r in a2]).reshape(len(a2), k)
        da2 = np.array([value_row(pos[r], not r[0].startswith("mv"), r[1])
                        for r in a2]).reshape(len(a2), nq)
        Ad = np.array([row_of(r) for r in dropped]).reshape(len(dropped), k)
        dad = np.array([value_row(pos[r], not r[0].startswith("mv"), r[1])
                        for r in dropped]).reshape(len(dropped), nq)
        # stage 1: min sum c (Y phi - b)^2 over A1 phi = a1 (null-space method; the fitted
        # values are unique even where phi is not)
        c = self._c_s[T]
        U1, s1, V1t = np.linalg.svd(A1) if len(a1) else (np.zeros((0, 0)), np.zeros(0),
                                                          np.eye(k))
        r1 = int(np.sum(s1 > _EQ_RANK_TOL))
        F1 = V1t[:r1].T @ (U1[:, :r1].T / s1[:r1, None])
        N1 = V1t[r1:].T
        phi_p = F1 @ da1
        wh = np.sqrt(c)[:, None]
        t = np.linalg.pinv(wh * (Y @ N1), rcond=1e-12) @ (wh * (db - Y @ phi_p))
        fT = Y @ (phi_p + N1 @ t)
        g1 = 2 * Y.T @ (c[:, None] * (fT - db))
        sign1 = np.array([r[2] for r in a1], float)
        mu1 = -sign1[:, None] * (np.linalg.pinv(A1.T, rcond=1e-12) @ g1) if len(a1) else \
            np.zeros((0, nq))
        # stage 2 over [Y; A2] phi = [fT; a2]
        sol = self._eq_min(np.vstack([Y, A2]), np.vstack([fT, da2]), df2)
        if sol is None:
            return None
        dphi, R2 = sol
        E2 = np.vstack([Y, A2])
        nu2 = -np.linalg.pinv(E2.T, rcond=1e-12) @ (self._H2 @ dphi + df2)
        sign2 = np.array([r[2] for r in a2], float)
        mu2 = sign2[:, None] * nu2[len(T):]
        resid = np.vstack([U1[:, r1:].T @ da1, R2, Ad @ dphi - dad])
        G = self._finish_map(dv0, dy0, dphi, [resid, mu1, mu2])
        if G is None:
            return None
        cap = np.array([self._lin_s[r[1]] if r[0].startswith("lim") else np.inf for r in a1])
        # round-off of the multipliers: each stage's curvature times the size of phi
        scales = (2 * float(np.max(c, initial=0.0)), float(np.max(np.abs(self._H2))))
        cols = np.concatenate([zi[:nin], np.array(vals, dtype=int), zi[sl["pref"]]])
        # the check of every row: targets' CVs against their limits (a CV outside its zone
        # also against that side's edge, from outside), the active rows not at all
        chk = self._chk_rows.copy()
        sg = np.repeat(self._chk_sign, ny + nu, axis=1)
        for i in S:
            chk[0, i], chk[2, i] = chk[1, i], chk[3, i]
        for i in o_lo:
            chk[0, i], chk[2, i] = chk[1, i], zi[sl["band_lo"]][i]
        for i in o_hi:
            chk[2, i], chk[0, i] = chk[3, i], zi[sl["band_hi"]][i]
        for r in rows:
            col = (ny + r[1]) if r[0].startswith("mv") else r[1]
            sg[chk[:, col] == rcols[r], col] = 0.0
        return G, cols, resid.shape[0], chk, sg, cap, scales

    def _solve_pattern(self, z, st):
        """Closed form by a re-used active set (see :meth:`_pattern_map`), or None."""
        G, cols, nres, chk, sg, cap, (c1, h2) = st
        out = G @ z[cols]
        nx, ny, nu, k = self.nx, self.ny, self.nu, self._k
        n0 = nx + ny + nu + k
        amax = np.maximum.reduce
        size = 1.0 + float(amax(np.abs(out[nx + ny + nu:n0])))          # of phi
        if nres and float(amax(np.abs(out[n0:n0 + nres]))) > _EQ_RESID_TOL * size:
            return None
        # the multipliers' signs (and a limit's stage-1 multiplier at most its linear weight),
        # to their round-off: a multiplier that is 0 in exact arithmetic may come out -1e-17
        n1 = cap.size
        for mu, scale, top in ((out[n0 + nres:n0 + nres + n1], c1, cap),
                               (out[n0 + nres + n1:], h2, None)):
            if mu.size:
                tol = 1e-11 * (float(amax(np.abs(mu))) + scale * size)
                if not float(np.minimum.reduce(mu)) >= -tol:
                    return None
                if top is not None and not float(amax(mu - top)) <= tol:
                    return None
        g = z[chk] - out[self._yu]
        g *= sg
        if not np.maximum.reduce(g, axis=None) <= 0.0:
            return None
        return out

    def __getstate__(self) -> dict[str, Any]:
        # DAQP workspaces do not pickle: a copy sets its stages up again on first use (as
        # after restart())
        state = dict(self.__dict__)
        for k in ("_daqp1", "_daqp2"):
            if k in state:
                state[k] = None
        return state

    def restart(self) -> None:
        """Forget any state kept between solves (a rerun repeats a run)."""
        if not self.is_built:
            raise NotBuiltError("SteadyTarget is not built; call .build() first.")
        self.stage2_failures = 0
        self._x1_last = self._x1_start
        self._daqp1 = self._daqp2 = None
        self._pat = None

    # ------------------------------------------------------------------ the data of one sample
    def _unpack(self, z):
        z = np.asarray(z, float)
        if z.shape != (self._nz,):
            raise fail("SteadyTarget.solve", "z", f"{self._nz} values (layout {self.layout_})",
                       f"shape {z.shape}")
        nx, nu, ny, nin = self.nx, self.nu, self.ny, self._nin
        nv = nx + nu
        out = self._Kin @ z[:nin]
        v0, y0 = out[:nv], out[nv:nv + ny]
        resid, dx = out[nv + ny:nv + ny + nx], out[nv + ny + nx:]
        amax = np.maximum.reduce          # (np.max's dispatch costs more than the reduction here)
        # where E has full row rank every dx is in its range (resid is round-off): no check
        ok = self._full_range or float(amax(np.abs(resid), initial=0.0)) <= 1e-9 * (1 + float(
            amax(np.abs(dx), initial=0.0)))
        u0 = v0[nx:]
        nb = 4 * ny + 2 * nu
        b = z[nin:nin + nb] / self._bscale
        b = np.where(b != b, self._bfill, b)         # NaN (an absent bound) -> +-inf
        data = {"band_lo": b[:ny], "band_hi": b[ny:2 * ny], "lim_lo": b[2 * ny:3 * ny],
                "lim_hi": b[3 * ny:4 * ny], "mv_lo": b[4 * ny:4 * ny + nu],
                "mv_hi": b[4 * ny + nu:], "pref": z[nin + nb:] / self._su, "all": b}
        return data, v0, y0, u0, ok

    def _stage2_bounds(self, data, ys1):
        """Stage 2's CV bounds: each CV at least as close to its band/limits as stage 1 left it."""
        blo, bhi, llo, lhi = data["band_lo"], data["band_hi"], data["lim_lo"], data["lim_hi"]
        e1 = ys1 - np.minimum(np.maximum(ys1, blo), np.maximum(blo, bhi))     # (np.clip)
        s1 = np.maximum(np.maximum(llo - ys1, ys1 - lhi), 0.0)
        lohi = np.empty((2, len(ys1)))              # [lo; hi]: one call for both rows below
        np.fmax(blo + np.minimum(e1, 0.0), llo - s1, out=lohi[0])
        np.fmin(bhi + np.maximum(e1, 0.0), lhi + s1, out=lohi[1])
        # widened by the tolerance; an infinite end first becomes DAQP's infinity (no inf - inf,
        # and no np.errstate, whose context costs more than the arithmetic); lo + (-tol) t is
        # lo - tol t to the bit
        lohi = _finite(lohi)
        lohi += _TOL_SIGN * (1 + np.abs(lohi))
        return lohi

    def _values(self, v, dy_s):
        """Engineering-unit values from the scaled steady state v = [x; u]."""
        nx = self.nx
        ys = self._Cy @ v + dy_s
        return {"xs": v[:nx] * self._sx, "us": v[nx:] * self._su, "ys": ys * self._sy}

    # ------------------------------------------------------------------ solve
    def solve(self, z: np.ndarray, fast: bool = True, solver: str = "OSQP", options=None,
              closed_form: bool | None = None):
        """Solve for the input vector *z* (blocks in ``layout_`` order, deviation variables).

        ``fast=True`` takes the exact closed form where it applies (see the module; not when
        *closed_form* -- default: the attribute ``closed_form`` -- is False) and otherwise solves
        both stages with DAQP; ``fast=False`` solves the same two stages with cvxpy and *solver*
        (a reference and a second opinion).  Returns a :class:`~mpcproto.control._qp.QPResult`
        with ``xs``, ``us``, ``ys`` and ``s`` in engineering deviation units and ``e`` (scaled);
        ``last_path`` records the way taken.
        """
        if not self.is_built:
            raise NotBuiltError("SteadyTarget is not built; call .build() first.")
        t0 = time.perf_counter()
        if fast and self._full_range and (self.closed_form if closed_form is None
                                          else closed_form):
            z = np.asarray(z, float)
            if z.shape == (self._nz,):
                vals = self._solve_closed_form(z)
                if vals is not None:        # (last_path: "closed_form" or "active_set")
                    return QPResult("optimal", True, vals, 0, (time.perf_counter() - t0) * 1e3)
        data, v0, y0, u0, in_range = self._unpack(z)
        if not in_range:
            self.last_path = "out_of_range"
            return QPResult(status="infeasible", accepted=False,
                            solve_ms=(time.perf_counter() - t0) * 1e3)
        if fast:
            self.last_path = "daqp"
            self._noting = self._full_range and (self.closed_form if closed_form is None
                                                 else closed_form)
            res = self._solve_daqp(data, v0, y0, u0)
        else:
            self.last_path = "cvxpy"
            res = self._solve_cvxpy(data, v0, y0, u0, solver, options)
        if res.accepted:       # e and s computed when read (the controller reads neither)
            vals = res.values = _TargetValues(res.values)
            vals._data, vals._sy, vals._source = data, self._sy, None
        res.solve_ms = (time.perf_counter() - t0) * 1e3
        return res

    def _solve_daqp(self, data, v0, y0, u0):
        import daqp

        ny, nu, k = self.ny, self.nu, self._k
        # bounds minus their offsets (y0 for CVs, u0 for MVs), then stage 1's rows by one gather
        r = np.concatenate([data["all"] - np.concatenate([y0, u0])[self._boff], self._bconst])
        b1lo = _finite(r[self._g1lo])
        b1hi = _finite(r[self._g1hi])
        x1, flag1, iters = self._stage1_prox(daqp, b1lo, b1hi)
        if flag1 != 1:
            return QPResult(status=_daqp_status(flag1), accepted=False)
        phi1 = x1[2 * ny:]
        ys1 = y0 + self._Yphi @ phi1
        # [b2lo; b2hi] = [lo - y0, mv_lo; hi - y0, mv_hi] (less the offsets), finite
        b2 = np.empty((2, ny + nu))
        np.subtract(self._stage2_bounds(data, ys1), y0, out=b2[:, :ny])
        b2[:, ny:] = r[4 * ny:4 * ny + 2 * nu].reshape(2, nu)
        np.maximum(b2, -_INF, out=b2)
        np.minimum(b2, _INF, out=b2)
        b2lo, b2hi = b2[0], b2[1]
        f2 = -2 * self._Uphi.T @ (self._wrel * (data["pref"] - u0)) if k else np.zeros(0)
        phi = phi1
        if k:
            x2, flag2, it2 = self._solve_stage2(daqp, f2, b2hi, b2lo)
            iters += it2
            if flag2 == 1:
                phi = x2
            else:                 # rounding made stage 2 infeasible: stage 1's answer stands
                self.stage2_failures += 1
        v = v0 + self._Vphi @ phi
        vals = self._values(v, y0 - self._Cy @ v0)
        if self._noting:               # the deciding rows, for the next sample's closed form
            self._pat = self._note_pattern(data, y0, ys1, y0 + self._Yphi @ phi, v[self.nx:])
        return QPResult(status="optimal", accepted=True, values=vals, iterations=iters)

    def _solve_stage2(self, daqp, f2, b2hi, b2lo):
        """Stage 2 in its own DAQP workspace, warm-started from the last active set; a workspace
        that does not end optimal is not trusted: the same QP solved afresh decides."""
        mdl = self._daqp2
        if mdl is None:
            mdl = self._daqp2 = _workspace(daqp, self._H2, f2, self._A2, b2hi, b2lo, self._sense2)
        else:
            mdl.update(f=f2, bupper=b2hi, blower=b2lo)
        flag2, iters = 0, 0
        if mdl is not None:
            x2, _f2, flag2, info2 = mdl.solve()
            iters = int(info2["iterations"])
        if flag2 != 1:
            self._daqp2 = None
            x2, _f2, flag2, info2 = daqp.solve(self._H2, f2, self._A2, b2hi, b2lo,
                                               self._sense2.copy(), **_DAQP_SETTINGS)
            iters += int(info2["iterations"])
        return np.array(x2), flag2, iters    # copy: DAQP's result may point into its workspace

    def _stage1_prox(self, daqp, b1lo, b1hi):
        """Stage 1 by proximal iterations: each a strictly convex QP (the objective plus
        ``rho/2 |x - x_k|^2``) solved exactly by DAQP, until the iterate stops moving.

        Stage 1 is only semidefinite (the CVs need not pin every MV); in a direction where the
        objective is flat the iterate stays where it is, elsewhere the error shrinks by
        ``rho / (rho + curvature)`` per iteration (Rockafellar 1976, proximal point algorithm;
        from memory).  Done here rather than with DAQP's ``eps_prox`` option so that the stopping
        rule is ours (a step below 1e-10 relative: with rho = 1e-6 the error left is about 1e-6 of
        that last step).  Every iteration has the same matrices, so one DAQP workspace serves
        them all and the next sample's (warm-started from the last active set; a workspace solve
        that does not end optimal is repeated afresh before it counts as a failure).
        """
        x = self._x1_last
        if x is None:           # after a closed form: its phi with s = 0, e = 0
            nv = self.nx + self.ny + self.nu
            x = np.concatenate([np.zeros(2 * self.ny), self._x1_from[nv:nv + self._k]])
        else:
            x = x.copy()
        H = self._H1p
        iters = 0
        mdl = self._daqp1
        for _ in range(_PROX_MAX):
            f = self._f1 - _PROX_RHO * x
            if mdl is None:
                mdl = self._daqp1 = _workspace(daqp, H, f, self._A1, b1hi, b1lo, self._sense1)
            else:
                mdl.update(f=f, bupper=b1hi, blower=b1lo)
            flag = 0
            if mdl is not None:
                xp, _f, flag, info = mdl.solve()
                iters += int(info["iterations"])
            if flag != 1:
                mdl = self._daqp1 = None
                xp, _f, flag, info = daqp.solve(H, f, self._A1, b1hi, b1lo,
                                                self._sense1.copy(), **_DAQP_SETTINGS)
                iters += int(info["iterations"])
                if flag != 1:
                    return x, flag, iters
            xp = np.array(xp)       # copy: DAQP's result may point into its workspace
            step = np.maximum.reduce(np.abs(xp - x))
            x = xp
            if step <= 1e-10 * (1.0 + np.maximum.reduce(np.abs(x))):
                break
        self._x1_last = x
        return x, 1, iters

    # ------------------------------------------------------------------ the cvxpy reference
    def _reference(self):
        """Both stages written in cvxpy on the full (not reduced) variables, made once."""
        import cvxpy as cp

        IA, Bs, Cs, Ds = self._scaled
        nx, nu, ny = self.nx, self.nu, self.ny
        sy = self._sy
        xs, us, ys = cp.Variable(nx), cp.Variable(nu), cp.Variable(ny)
        e, s = cp.Variable(ny), cp.Variable(ny)
        p = {key: cp.Parameter(n) for key, n in (("dx", nx), ("dy", ny), ("band_lo", ny),
                                                 ("band_hi", ny), ("lim_lo", ny), ("lim_hi", ny),
                                                 ("mv_lo", nu), ("mv_hi", nu), ("pref", nu),
                                                 ("y_lo", ny), ("y_hi", ny))}
        model = [IA @ xs - Bs @ us == p["dx"], ys == Cs @ xs + Ds @ us + p["dy"],
                 us >= p["mv_lo"], us <= p["mv_hi"]]
        obj1 = (cp.sum(cp.multiply(self.band_weight * sy ** 2, cp.square(e)))
                + (self.limit_linear * sy) @ s
                + cp.sum(cp.multiply(self.limit_quadratic * sy ** 2, cp.square(s))))
        stage1 = cp.Problem(cp.Minimize(obj1), model + [
            p["band_lo"] <= ys - e, ys - e <= p["band_hi"],
            ys + s >= p["lim_lo"], ys - s <= p["lim_hi"], s >= 0])
        # (the states' pull as the reduced form's, through the projection onto the free states)
        Zx = self._N[:nx] @ self._Zf
        obj2 = (cp.sum(cp.multiply(self._wrel, cp.square(us - p["pref"])))
                + _MIN_NORM * cp.sum_squares(Zx.T @ xs))
        stage2 = cp.Problem(cp.Minimize(obj2), model + [ys >= p["y_lo"], ys <= p["y_hi"]])
        self._ref = (stage1, stage2, p, xs, us, ys)
        return self._ref

    def _solve_cvxpy(self, data, v0, y0, u0, solver, options):
        import cvxpy as cp

        stage1, stage2, p, xs, us, ys = self._ref or self._reference()
        big = 1e20            # cvxpy parameters must be finite
        p["dx"].value = np.hstack([self._scaled[0], -self._scaled[1]]) @ v0
        p["dy"].value = y0 - self._Cy @ v0
        for key in ("band_lo", "lim_lo", "mv_lo"):
            p[key].value = np.clip(data[key], -big, big)
        for key in ("band_hi", "lim_hi", "mv_hi"):
            p[key].value = np.clip(data[key], -big, big)
        p["pref"].value = data["pref"]
        opts = dict(options or {})
        iters = 0
        for stage in (stage1, stage2):
            try:
                stage.solve(solver=solver, **opts)
                status = str(stage.status)
            except cp.error.SolverError as exc:
                status = f"solver_error: {exc}"
            if status != cp.OPTIMAL:
                return QPResult(status=status, accepted=False)
            st = stage.solver_stats
            iters += int(getattr(st, "num_iters", 0) or 0) if st is not None else 0
            if stage is stage1:
                lo, hi = self._stage2_bounds(data, np.asarray(ys.value, float))   # rows
                # an interior-point solve is good to its tolerance only: widen by that much
                slack = 1e-8 * (1 + np.abs(np.asarray(ys.value, float)))
                p["y_lo"].value = np.clip(lo - slack, -big, big)
                p["y_hi"].value = np.clip(hi + slack, -big, big)
        v = np.concatenate([np.asarray(xs.value, float), np.asarray(us.value, float)])
        vals = self._values(v, y0 - self._Cy @ v0)
        return QPResult(status="optimal", accepted=True, values=vals, iterations=iters)


class _TargetValues(dict):
    """The target's values; ``e`` (band error, scaled) and ``s`` (limit violation, engineering
    units) are computed on first read from the stored bounds."""

    # set by the maker: _data (the unpacked bounds) or None and _source = (target, z), _sy
    __slots__ = ("_data", "_sy", "_source")

    def __missing__(self, key):
        if key not in ("e", "s"):
            raise KeyError(key)
        data = self._data
        if data is None:
            target, z = self._source
            data = self._data = target._unpack(z)[0]
        ys_s = self["ys"] / self._sy
        blo, bhi, llo, lhi = data["band_lo"], data["band_hi"], data["lim_lo"], data["lim_hi"]
        self["e"] = ys_s - np.minimum(np.maximum(ys_s, blo), np.maximum(blo, bhi))
        self["s"] = np.maximum(np.maximum(llo - ys_s, ys_s - lhi), 0.0) * self._sy
        return self[key]


def _workspace(daqp, H, f, A, bu, bl, sense):
    """A DAQP workspace set up with the target's settings (its arrays are kept by the caller)."""
    mdl = daqp.Model()
    ef = mdl.setup(H, f, A, bu, bl, sense.copy())
    if int(ef[0] if isinstance(ef, tuple) else ef) < 0:
        return None               # (e.g. a Hessian it cannot factorize) the caller solves afresh
    mdl.settings = dict(_DAQP_SETTINGS)
    return mdl


def _daqp_status(flag: int) -> str:
    """DAQP's exit flag -> our solver status word."""
    return {1: "optimal", 2: "optimal", -1: "infeasible", -2: "cycling", -3: "unbounded",
            -4: "max_iterations", -5: "not_convex", -6: "overdetermined"}.get(int(flag),
                                                                          f"daqp_exit_{flag}")
