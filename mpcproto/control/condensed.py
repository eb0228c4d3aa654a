"""The predictive controller's dynamic QP in condensed form, solved by DAQP's dual active set.

The states are eliminated once, in :meth:`CondensedQP.build`: over the prediction horizon the
outputs are affine in the blocked MV values (scaled, ``U`` = the M planned values of every MV,
held after the control horizon M)::

    y = y_free(x0, w, d_now, d forecast) + G U

``y_free`` is one matrix-vector product per sample (the columns of that matrix cover the state
estimate, the disturbance estimates and the DVs); dead times are delay states of the discrete
model, so they cost neither variables nor rows.  The decision vector is ``U`` alone (nu*M
values); nothing else is a variable:

* **setpoints** (a band collapsed to one value: a setpoint, or a zone with equal ends) are exact
  least squares in the Hessian, ``q (y - b)^2``;
* **zones** (a band with distinct ends, one of them finite) are DAQP soft rows with the quadratic
  weight ``q`` and no linear weight: DAQP charges ``w s + s^2 / (2 rho)`` for a violation ``s`` of a
  soft row, which is exactly the slack form's "squared error outside the band"; rows only for CVs
  with a zone;
* **soft CV limits** are DAQP soft rows with the linear weight (``limit_penalty``) and the quadratic
  weight (``limit_penalty_quadratic``) of the CV: the slack form's optimum ``l s + h s^2`` with
  ``s = max(lo - y, y - hi, 0)``.  Where the run-time limits cross (lo > hi) the one slack of the
  slack form covers both sides; the row becomes the mid-point with the linear weight raised by
  ``h (lo - hi)``, the same cost up to a constant.  Rows only for CVs with a finite limit;
* **hard MV limits** are simple bounds on ``U``; **rate limits** rows of the move matrix, only for
  MVs with a finite rate;
* the move suppression, the pull to the preferred (target) MVs and the optional terminal cost
  (DARE weight on the last predicted state) are in the Hessian;
* with setpoint preview (an input block ``ref``, :mod:`mpcproto.control.preview`) the band of a CV
  moves stage by stage: for a setpoint that is the gradient term ``-2 G' Q ref`` (one
  matrix-vector product per sample, nothing rebuilt), for a zone its rows' bounds.

DAQP minimizes ``0.5 U'HU + f'U`` plus the soft-row penalties; ``H`` is twice the Hessian form of
the controller's objective (which has no factor 1/2), so DAQP's objective *is* the controller's
(up to a constant) and the soft weights map as ``w = l`` and ``rho = 1 / (2 h)`` (scaled units).

The rows present (which CVs have a setpoint, a zone, a limit; which MVs a rate) form the
*structure* of a sample.  Each structure gets its Hessian, row matrix and DAQP workspace once; a
sample with the same structure only updates ``f`` and the bounds and re-solves warm-started from
the previous active set (``daqp.Model.update`` keeps the active set).  A closed loop rarely has
more than a few structures.

Accuracy: DAQP is an exact active-set method; with ``primal_tol = 1e-10`` (our default) the
applied move equals the QP's optimum to round-off (checked against Clarabel through cvxpy in
``tests/test_condensed.py``).  An exit flag other than optimal (1) or soft-optimal (2) is
refused and the controller's fallback rules apply.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from ._qp import QPResult

__all__ = ["CondensedQP", "DAQP_DEFAULTS", "DAQP_OPTIONS", "DAQP_EXIT"]

#: DAQP settings of the controller (tight primal tolerance: the applied move is the optimum)
DAQP_DEFAULTS: dict[str, Any] = {"primal_tol": 1e-10, "iter_limit": 10000}
#: DAQP settings a user may give in ``solver_options``
DAQP_OPTIONS = ("primal_tol", "dual_tol", "zero_tol", "pivot_tol", "progress_tol", "cycle_tol",
                "iter_limit", "eps_prox", "eta_prox", "time_limit", "sing_tol", "refactor_tol")
#: DAQP exit flags -> our status words (1 and 2 are optimal; 2: some soft row is violated)
DAQP_EXIT = {1: "optimal", 2: "optimal", -1: "infeasible", -2: "cycling", -3: "unbounded",
             -4: "iteration_limit", -5: "nonconvex", -6: "overdetermined_start",
             -7: "time_limit"}
_INF = 1e30          # DAQP's infinity
_SOFT = 8            # DAQP sense flag of a soft row
_RHO_LINEAR = 1e8   # reciprocal quadratic weight of a soft row with a linear weight only: DAQP
#                     needs it finite (1e12 and beyond lost the optimum in our tests); its s^2 / 2e8
#                     moves the plan by less than 1e-8 of the MV scale (tests/test_condensed.py)


class CondensedQP:
    """Condensed dynamic QP of :class:`~mpcproto.control.mpc.PredictiveController`.

    Parameters
    ----------
    A, B, C, D, Bd, Dd, Bw, Cw : ndarray
        Controller model in engineering deviation units (``Bw``, ``Cw``: the estimator's
        disturbance states).
    N, M : int
        Prediction and control horizons.
    scales : (sx, su, sy)
        State, MV and CV scales (the QP works in scaled units).
    weights : dict
        Scaled weights ``cv_weight``, ``move_weight``, ``preferred_weight``, ``limit_linear``,
        ``limit_quadratic`` (as in the controller's ``scaled_``).
    terminal : ndarray (nx, nx) or None
        Terminal weight on the scaled last state.
    inputs : dict of str to slice
        Where each block sits in the controller's input vector ``z`` (the same vector the sparse
        form reads).
    options : dict
        DAQP settings (over :data:`DAQP_DEFAULTS`).
    """

    def __init__(self, A, B, C, D, Bd, Dd, Bw, Cw, *, N: int, M: int, scales, weights,
                 terminal=None, inputs, options=None):
        self._mats = tuple(np.asarray(a, float) for a in (A, B, C, D, Bd, Dd, Bw, Cw))
        self.N, self.M = int(N), int(M)
        self._sx, self._su, self._sy = (np.asarray(s, float) for s in scales)
        self._w = {k: np.asarray(v, float) for k, v in weights.items()}
        self._Pt = None if terminal is None else np.asarray(terminal, float)
        self._zs = dict(inputs)
        self.options = dict(DAQP_DEFAULTS)
        self.options.update(options or {})
        self._preview = "ref" in self._zs
        self.is_built = False

    # ------------------------------------------------------------------ build
    def build(self) -> "CondensedQP":
        """Free-response and forced-response matrices, the structure-free part of the Hessian."""
        A, B, C, D, Bd, Dd, Bw, Cw = self._mats
        N, M = self.N, self.M
        nx, nu, ny, nd = A.shape[0], B.shape[1], C.shape[0], Bd.shape[1]
        sx, su, sy = self._sx, self._su, self._sy
        self.nx, self.nu, self.ny, self.nd = nx, nu, ny, nd
        n = nu * M
        self.n_variables_ = n
        # Markov parameters C A^i [B Bd Bw] (i = 0..N-1) and the rows C A^(k+1) of the free response
        BB = np.hstack([B, Bd, Bw])
        mk = np.empty((N, ny, BB.shape[1]))
        cak = np.empty((N, ny, nx))
        AiB = BB.copy()
        CA = C @ A
        for i in range(N):              # build time only: N small products
            mk[i] = C @ AiB
            cak[i] = CA
            AiB = A @ AiB
            CA = CA @ A
        mkB, mkD, mkW = mk[:, :, :nu], mk[:, :, nu:nu + nd], mk[:, :, nu + nd:]
        # forced response G (rows k*ny + i: CV i at sample k+1; columns j*nu + m: MV m, move j)
        G4 = np.zeros((N, ny, M, nu))
        for j in range(M - 1):
            G4[j:, :, j, :] = mkB[:N - j]
        G4[M - 1:, :, M - 1, :] = np.cumsum(mkB, axis=0)[:N - M + 1]
        if np.any(D != 0):
            G4[np.arange(N), :, np.minimum(np.arange(1, N + 1), M - 1), :] += D
        G = G4.reshape(N * ny, n) / np.tile(sy, N)[:, None] * np.tile(su, M)[None, :]
        self.G_ = G
        # free response over the input vector's leading blocks x0, u_prev, d_now, dtraj, w
        zs = self._zs
        k_end = zs["w"].stop
        P = np.zeros((N * ny, k_end))
        P[:, zs["x0"]] = cak.reshape(N * ny, nx)
        if nd:
            P[:, zs["d_now"]] = (np.cumsum(mkD, axis=0) + Dd).reshape(N * ny, nd)
            # forecast departure at sample j (0..N) reaches the output at k+1 >= j
            F5 = np.zeros((N, ny, N + 1, nd))
            for j in range(N):
                F5[j:, :, j, :] = mkD[:N - j]
            F5[np.arange(N), :, np.arange(1, N + 1), :] += Dd
            P[:, zs["dtraj"]] = F5.reshape(N * ny, (N + 1) * nd)
        P[:, zs["w"]] = (np.cumsum(mkW, axis=0) + Cw).reshape(N * ny, ny)
        self._sy_t = np.tile(sy, N)               # scale of each output row k*ny + i
        self.free_ = P / self._sy_t[:, None]
        self._k_end = k_end
        # move matrix: dU = Dm U - e1 (x) u_prev
        Dm = np.eye(n) - np.eye(n, k=-nu)
        self._Dm = Dm
        self._su_t = np.tile(su, M)               # scale of each entry of U
        wr = np.tile(self._w["move_weight"], M)
        count = np.minimum(np.arange(N), M - 1)
        count = np.bincount(count, minlength=M).astype(float)
        ws = np.kron(count, self._w["preferred_weight"])
        self._ws = ws
        self._fpref = 2.0 * ws[:, None] * np.tile(np.eye(nu) / su[None, :], (M, 1))   # times pref
        H0 = 2.0 * (Dm.T @ (wr[:, None] * Dm) + np.diag(ws))
        self._wr = wr
        self._fprev = -2.0 * (Dm.T[:, :nu] * wr[:nu][None, :]) / su[None, :]
        # terminal cost on the scaled last state x_N = xf + GxN U
        if self._Pt is not None:
            Pt = self._Pt
            AN = np.linalg.matrix_power(A, N)
            AiBlist = np.empty((N, nx, BB.shape[1]))
            AiB = BB.copy()
            for i in range(N):
                AiBlist[i] = AiB
                AiB = A @ AiB
            aB = AiBlist[:, :, :nu]
            GxN = np.zeros((nx, M, nu))
            for j in range(M - 1):
                GxN[:, j, :] = aB[N - 1 - j]
            GxN[:, M - 1, :] = aB[:N - M + 1].sum(axis=0)
            GxN = GxN.reshape(nx, n) / sx[:, None] * np.tile(su, M)[None, :]
            PxN = np.zeros((nx, k_end))
            PxN[:, zs["x0"]] = AN
            if nd:
                PxN[:, zs["d_now"]] = AiBlist[:, :, nu:nu + nd].sum(axis=0)
                T = np.zeros((nx, N + 1, nd))
                T[:, :N, :] = AiBlist[::-1, :, nu:nu + nd].transpose(1, 0, 2)
                PxN[:, zs["dtraj"]] = T.reshape(nx, (N + 1) * nd)
            PxN[:, zs["w"]] = AiBlist[:, :, nu + nd:].sum(axis=0)
            PxN /= sx[:, None]
            H0 = H0 + 2.0 * GxN.T @ Pt @ GxN
            self._Kt = 2.0 * GxN.T @ Pt                     # f += Kt (xf - x_term/sx)
            self._PxN = PxN
            self._GxN = GxN
        self._H0 = 0.5 * (H0 + H0.T)
        self._bands_idx = np.array([np.arange(zs[k].start, zs[k].stop) for k in
                                    ("band_lo", "band_hi", "lim_lo", "lim_hi")])   # (4, ny)
        self._q_active = self._w["cv_weight"] > 0
        self._lim_weighted = (self._w["limit_linear"] > 0) | (self._w["limit_quadratic"] > 0)
        self._structs: dict[bytes, dict[str, Any]] = {}
        self.is_built = True
        return self

    def restart(self) -> None:
        """Forget the workspaces and active sets of a previous run (a rerun repeats it exactly)."""
        self._structs.clear()

    # ------------------------------------------------------------------ per structure
    def _structure(self, eq, zone, lim, rated):
        key = np.concatenate([eq, zone, lim, rated]).tobytes()
        st = self._structs.get(key)
        if st is not None:
            return st, key
        import daqp

        N, ny, nu, M = self.N, self.ny, self.nu, self.M

        def rows_of(mask):         # rows k*ny + i of the CVs in mask, CV after CV
            return (np.arange(N)[:, None] * ny + np.flatnonzero(mask)[None, :]).ravel(order="F")

        r_eq, r_zone, r_lim = rows_of(eq), rows_of(zone), rows_of(lim)
        G = self.G_
        q = self._w["cv_weight"]
        Geq = G[r_eq]
        qeq = np.repeat(q[eq], N)
        H = self._H0 + 2.0 * Geq.T @ (qeq[:, None] * Geq)
        H = 0.5 * (H + H.T)
        r_rate = (np.arange(M)[:, None] * nu + np.flatnonzero(rated)[None, :]).ravel(order="F")
        Arows = np.vstack([G[r_zone], G[r_lim], self._Dm[r_rate]])
        n, mA = self.n_variables_, Arows.shape[0]
        m = n + mA
        sense = np.zeros(m, dtype=np.int32)
        sense[n:n + len(r_zone) + len(r_lim)] = _SOFT
        # soft weights of the zone rows (quadratic only); limit rows' weights are set per sample
        rho = np.full(m, _RHO_LINEAR)
        wlin = np.zeros(m)
        zq = np.repeat(q[zone], N)
        rho[n:n + len(r_zone)] = 1.0 / (2.0 * zq)
        # gradient: f = fz @ z[:k_end] + fb @ (setpoints of the eq CVs) (+ u_prev, pref, terminal)
        fG = -2.0 * Geq.T * qeq[None, :]
        fz = -fG @ self.free_[r_eq]
        if self._Pt is not None:
            fz = fz + self._Kt @ self._PxN
        fb = fG.reshape(n, int(eq.sum()), N).sum(axis=2)
        fref = fG / self._sy_t[r_eq][None, :] if self._preview else None   # times ref[r_eq]
        used = np.concatenate([r_zone, r_lim])
        bb = np.empty(2 * m)
        st = {"H": H, "A": Arows, "sense": sense, "rho": rho, "wlin": wlin, "r_eq": r_eq,
              "r_zone": r_zone, "r_lim": r_lim, "r_rate": r_rate, "free": self.free_[used],
              "fz": fz, "fb": fb, "fref": fref, "sy_zone": self._sy_t[r_zone],
              "n_eq": len(r_eq), "n_zone": len(r_zone),
              "n_lim": len(r_lim), "model": daqp.Model(), "ready": False, "wkey": None,
              "b": bb, "bl": bb[:m], "bu": bb[m:], "lim_cv": np.flatnonzero(lim),
              "zone_cv": np.flatnonzero(zone), "eq_cv": np.flatnonzero(eq),
              "rate_mv": r_rate % nu, "rate_first": r_rate < nu}
        if len(self._structs) > 32:
            self._structs.clear()
        self._structs[key] = st
        return st, key

    # ------------------------------------------------------------------ solve
    def data(self, z: np.ndarray):
        """``(H, f, A, bupper, blower, sense, weights, structure)`` of the QP for input vector z.

        ``weights`` = (rho_l, rho_u, w_l, w_u) of the soft rows (DAQP's convention).  Shared by
        :meth:`solve` and the benchmark's floor, which solves the same data with DAQP's own API.
        """
        zs = self._zs
        su, sy = self._su, self._sy
        N, M, n = self.N, self.M, self.n_variables_
        ny = self.ny
        # the four CV blocks (band_lo, band_hi, lim_lo, lim_hi) scaled in one division
        bands = z.take(self._bands_idx) / sy
        band_lo, band_hi, lim_lo, lim_hi = bands
        rate = z[zs["rate"]] / su
        q = self._w["cv_weight"]
        lq, hq = self._w["limit_linear"], self._w["limit_quadratic"]
        fin = np.isfinite(bands)
        fin_lo, fin_hi = fin[0], fin[1]
        eq = self._q_active & fin_lo & fin_hi & (band_lo == band_hi)
        zone = self._q_active & ~eq & (fin_lo | fin_hi)
        lim = self._lim_weighted & (fin[2] | fin[3])
        # a zone whose ends are the CV's limits shares the limit's row: q v^2 + l v + h v^2
        merged = zone & lim & (band_lo == lim_lo) & (band_hi == lim_hi)
        if self._preview:
            ref = z[zs["ref"]]
            merged &= ~np.any(ref.reshape(N, ny) != 0, axis=0)   # a moving band: its own rows
        zone = zone & ~merged
        rated = np.isfinite(rate)
        st, key = self._structure(eq, zone, lim, rated)
        zf = z[:self._k_end]
        yf = st["free"] @ zf                      # free response of the soft rows
        nz_, nl = st["n_zone"], st["n_lim"]
        u_prev = z[zs["u_prev"]]
        f = self._fprev @ u_prev - self._fpref @ z[zs["pref"]] + st["fz"] @ zf
        if st["n_eq"]:
            f += st["fb"] @ band_lo[st["eq_cv"]]
            if self._preview:
                f += st["fref"] @ ref[st["r_eq"]]
        if self._Pt is not None:
            f -= self._Kt @ (z[zs["x_term"]] / self._sx)
        bu, bl = st["bu"], st["bl"]
        bl[:n] = z[zs["u_lo"]] / self._su_t
        bu[:n] = z[zs["u_hi"]] / self._su_t
        o = n
        if nz_:
            c = st["zone_cv"]
            bl[o:o + nz_] = np.repeat(band_lo[c], N) - yf[:nz_]
            bu[o:o + nz_] = np.repeat(band_hi[c], N) - yf[:nz_]
            if self._preview:
                moved = ref[st["r_zone"]] / st["sy_zone"]
                bl[o:o + nz_] += moved
                bu[o:o + nz_] += moved
            o += nz_
        if nl:
            c = st["lim_cv"]
            lo, hi = lim_lo[c], lim_hi[c]
            wl = lq[c].copy()
            cross = lo > hi
            st["lim_off"] = 0.0
            if cross.any():          # one slack covers both sides: the mid-point, raised weight
                mid = 0.5 * (lo + hi)
                wl = np.where(cross, wl + hq[c] * (lo - hi), wl)
                st["lim_off"] = np.repeat(np.where(cross, 0.5 * (lo - hi), 0.0), N)
                lo, hi = np.where(cross, mid, lo), np.where(cross, mid, hi)
            ylim = yf[nz_:]
            bl[o:o + nl] = np.repeat(lo, N) - ylim
            bu[o:o + nl] = np.repeat(hi, N) - ylim
            rho_l = st["rho"]
            hq_c = hq[c] + np.where(merged[c], q[c], 0.0)
            wkey = (wl.tobytes(), hq_c.tobytes())
            if st["wkey"] != wkey:
                st["wkey"] = wkey
                with np.errstate(divide="ignore"):
                    rq = np.where(hq_c > 0, 1.0 / (2.0 * hq_c), _RHO_LINEAR)
                rho_l[o:o + nl] = np.repeat(rq, N)
                st["wlin"][o:o + nl] = np.repeat(wl, N)
                st["weights_changed"] = True
            o += nl
        if len(st["r_rate"]):
            # move rows: the first move is measured from u_prev, the others from the last move
            rr = rate[st["rate_mv"]]
            d0 = np.where(st["rate_first"], (u_prev / su)[st["rate_mv"]], 0.0)
            bl[o:] = d0 - rr
            bu[o:] = d0 + rr
        b = st["b"]                              # [bl; bu] in one buffer: two calls for four
        np.maximum(b, -_INF, out=b)             # (np.clip's dispatch costs more than these)
        np.minimum(b, _INF, out=b)
        weights = (st["rho"], st["rho"], st["wlin"], st["wlin"])
        return st["H"], f, st["A"], bu, bl, st["sense"], weights, st, key

    def solve(self, z: np.ndarray) -> QPResult:
        """Solve for the input vector *z*; warm-started from the last active set of the same
        structure.  ``values``: ``u`` (nu, M) and ``slack`` (ny, N), scaled."""
        H, f, A, bu, bl, sense, weights, st, key = self.data(z)
        t0 = time.perf_counter()
        mdl = st["model"]
        if not st["ready"]:
            ef = mdl.setup(H, f, A, bu, bl, sense)
            ef = int(ef[0] if isinstance(ef, tuple) else ef)
            if ef < 0:                 # e.g. a Hessian DAQP cannot factorize: not solved
                self.last_info_ = {"exit_flag": ef, "active_set": None, "solver": "daqp",
                                   "rows": int(A.shape[0]), "variables": self.n_variables_}
                return QPResult(status=f"setup_failed ({ef})", accepted=False,
                                solve_ms=(time.perf_counter() - t0) * 1e3)
            mdl.settings = self.options
            st["ready"] = True
            st["weights_changed"] = True
        else:
            mdl.update(f=f, bupper=bu, blower=bl)
        if st.get("weights_changed"):
            mdl.soft_weights(rho_l=weights[0], rho_u=weights[1], w_l=weights[2], w_u=weights[3])
            st["weights_changed"] = False
        x, _fval, flag, info = mdl.solve()
        ms = (time.perf_counter() - t0) * 1e3
        status = DAQP_EXIT.get(int(flag), f"exit_flag_{int(flag)}")
        ok = flag in (1, 2) and np.isfinite(x).all()
        lam = info.get("lam")
        self.last_info_ = {"exit_flag": int(flag), "active_set": int(np.count_nonzero(lam))
                           if lam is not None else None, "solver": "daqp",
                           "rows": int(A.shape[0]), "variables": self.n_variables_}
        vals: dict[str, np.ndarray] = {}
        if ok:
            U = np.asarray(x, float)
            vals["u"] = U.reshape(self.nu, self.M, order="F")
            slack = np.zeros((self.ny, self.N))
            nl = st["n_lim"]
            if nl:
                # only a row in the final active set can be violated (others hold to primal_tol)
                o, nz_ = self.n_variables_ + st["n_zone"], st["n_zone"]
                act = lam[o:o + nl].nonzero()[0] if lam is not None else np.arange(nl)
                s = np.zeros(nl)
                if act.size:
                    gu = A[nz_ + act] @ U
                    s[act] = np.maximum(np.maximum(bl[o + act] - gu, gu - bu[o + act]), 0.0)
                s += st["lim_off"]
                slack[st["lim_cv"], :] = s.reshape(len(st["lim_cv"]), self.N)
            vals["slack"] = slack
        return QPResult(status=status, accepted=bool(ok), values=vals,
                        iterations=int(info.get("iterations", 0)), solve_ms=ms)

    # ------------------------------------------------------------------ what-if helpers
    def states(self, z: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Scaled predicted states (nx, N) for the plan *u* (nu, M scaled) and input vector *z*.

        For :meth:`PredictiveController.plan` (a what-if tool): one loop over the horizon.
        """
        A, B, _C, _D, Bd, _Dd, Bw, _Cw = self._mats
        zs, N, nd = self._zs, self.N, self.nd
        x = z[zs["x0"]].astype(float)
        w = z[zs["w"]]
        d_now = z[zs["d_now"]] if nd else np.zeros(0)
        dtraj = z[zs["dtraj"]].reshape(nd, N + 1, order="F") if nd else np.zeros((0, N + 1))
        uu = u * self._su[:, None]
        out = np.empty((self.nx, N))
        for k in range(N):
            x = A @ x + B @ uu[:, min(k, self.M - 1)] + Bd @ (d_now + dtraj[:, k]) + Bw @ w
            out[:, k] = x
        return out / self._sx[:, None]

    def objective(self, z: np.ndarray, u: np.ndarray) -> float:
        """The controller's objective (the sparse statement's, no constant terms) at plan *u*."""
        zs, sy, su = self._zs, self._sy, self._su
        N, M = self.N, self.M
        U = u.ravel(order="F")
        Y = (self.free_ @ z[:self._k_end] + self.G_ @ U).reshape(self.ny, N, order="F")
        blo, bhi = (z[zs["band_lo"]] / sy)[:, None], (z[zs["band_hi"]] / sy)[:, None]
        if self._preview:
            moved = z[zs["ref"]].reshape(N, self.ny).T / sy[:, None]
            blo, bhi = blo + moved, bhi + moved
        E = np.where(Y < blo, Y - blo, np.where(Y > bhi, Y - bhi, 0.0))
        llo, lhi = (z[zs["lim_lo"]] / sy)[:, None], (z[zs["lim_hi"]] / sy)[:, None]
        with np.errstate(invalid="ignore"):
            S = np.maximum(np.maximum(np.nan_to_num(llo - Y, nan=0.0, neginf=0.0),
                                      np.nan_to_num(Y - lhi, nan=0.0, neginf=0.0)), 0.0)
        dU = self._Dm @ U
        dU[:self.nu] -= z[zs["u_prev"]] / su
        pref = np.tile(z[zs["pref"]] / su, M)
        w = self._w
        obj = (np.sum(w["cv_weight"][:, None] * E ** 2) + np.sum(self._wr * dU ** 2)
               + np.sum(self._ws * U ** 2) - 2 * np.sum(self._ws * pref * U)
               + np.sum(w["limit_linear"][:, None] * S)
               + np.sum(w["limit_quadratic"][:, None] * S ** 2))
        if self._Pt is not None:
            xN = self._PxN @ z[:self._k_end] + self._GxN @ U
            obj += xN @ self._Pt @ xN - 2 * (z[zs["x_term"]] / self._sx) @ (self._Pt @ xN)
        return float(obj)
