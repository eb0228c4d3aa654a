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
more than a few structures.  The Hessian and the gradient's matrix depend only on which CVs have
a setpoint: structures that differ in their zones, limits or rates share them (built once per
set of setpoint CVs).  A restart (the controller's ``reset``) keeps the workspaces and forgets
only their active sets: the next solve of each structure starts cold, through the same
``update`` call as its first solve after set-up, so a rerun repeats a run to the bit.

Accuracy: DAQP is an exact active-set method; with ``primal_tol = 1e-10`` (our default) the
applied move equals the QP's optimum to round-off (checked against Clarabel through cvxpy in
``tests/test_condensed.py``).  An exit flag other than optimal (1) or soft-optimal (2) is
refused and the controller's fallback rules apply.
"""

from __future__ import annotations

import math
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
        # contiguous blocks of z read per sample (input_layout's order)
        assert zs["band_hi"].start == zs["band_lo"].stop and zs["lim_lo"].start == \
            zs["band_hi"].stop and zs["lim_hi"].start == zs["lim_lo"].stop and \
            zs["u_hi"].start == zs["u_lo"].stop
        # the entries read for a sample's signature, scaled: band_lo, band_hi, lim_lo, lim_hi, the
        # rates, then pairs (a <= b) giving band_lo == band_hi, the bands == the limits (both ways)
        # and lim_lo <= lim_hi
        blk = [np.arange(zs[k].start, zs[k].stop) for k in ("band_lo", "band_hi", "lim_lo",
                                                             "lim_hi")]
        pa, pb = (0, 1, 0, 2, 1, 3, 2), (1, 0, 2, 0, 3, 1, 3)
        self._q_idx = np.concatenate(blk + [np.arange(zs["rate"].start, zs["rate"].stop)]
                                     + [blk[i] for i in pa] + [blk[i] for i in pb])
        self._sq = np.concatenate([np.tile(sy, 4), su, np.tile(sy, 14)])   # their scales
        self._n4, self._nq = 4 * ny, 4 * ny + nu
        self._signature_buffer()
        self._usl = slice(zs["u_lo"].start, zs["u_hi"].stop)          # u_lo, u_hi
        self._zv = (None, None)
        self._zlen = max(s_.stop for s_ in zs.values())
        self._q_active = self._w["cv_weight"] > 0
        self._lim_weighted = (self._w["limit_linear"] > 0) | (self._w["limit_quadratic"] > 0)
        self._structs: dict[bytes, _Structure] = {}
        self._sigs: dict[bytes, Any] = {}        # sample signature -> _Entry (or dict of them)
        self._sp_parts: dict[bytes, tuple] = {}  # set of setpoint CVs -> (H, F, f_cols)
        self.is_built = True
        return self

    def _signature_buffer(self) -> None:
        """The signature's booleans in one buffer: (finiteness, pairs, the whole)."""
        sb = np.empty(self._nq + 7 * self.ny, dtype=bool)
        self._sigbuf = (sb[:self._nq], sb[self._nq:], sb)

    def __getstate__(self) -> dict[str, Any]:
        # DAQP workspaces do not pickle: a copy (a controller sent to another process) sets its
        # structures up again on first use; views would pickle as copies of their own
        state = dict(self.__dict__)
        if "_structs" in state:
            state["_structs"], state["_sigs"] = {}, {}
        state["_zv"] = (None, None)
        state.pop("_sigbuf", None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        if "_nq" in state:
            self._signature_buffer()

    def restart(self) -> None:
        """Forget the active sets of a previous run (a rerun repeats it exactly).  The
        workspaces stay: a structure's Hessian, rows and DAQP set-up depend on the design alone;
        its next solve starts from an empty active set (``update`` with the structure's own
        row flags), as its first solve after set-up did."""
        for st in self._structs.values():
            st.cold = True

    # ------------------------------------------------------------------ per structure
    def _structure(self, eq, zone, lim, rated):
        """The workspace of the row structure (eq, zone, lim, rated): Hessian, rows, DAQP model
        and the per-sample maps of the gradient and the bounds (built once)."""
        key = np.concatenate([eq, zone, lim, rated]).tobytes()
        st = self._structs.get(key)
        if st is not None:
            return st
        if len(self._structs) > 32:
            self._structs.clear()
            self._sigs.clear()            # its entries point to the workspaces just dropped
            self._sp_parts.clear()
        st = _Structure(self, eq, zone, lim, rated, key)
        self._structs[key] = st
        return st

    def _setpoint_part(self, eq, r_eq, eq_cv):
        """``(H, F, f_cols)`` of the structures whose setpoint CVs are *eq*: the Hessian (move
        suppression, preferred MVs, terminal cost and the setpoints' least squares) and the
        gradient's matrix over the entries of ``z`` it reads, ``f = F @ z[f_cols]``.  Built once
        per set of setpoint CVs and shared (read-only) by every structure with that set."""
        key = eq.tobytes()
        part = self._sp_parts.get(key)
        if part is not None:
            return part
        N, n, zs = self.N, self.n_variables_, self._zs
        Geq = self.G_[r_eq]
        qeq = np.repeat(self._w["cv_weight"][eq], N)
        H = self._H0 + 2.0 * Geq.T @ (qeq[:, None] * Geq)
        H = 0.5 * (H + H.T)
        # ---- gradient: one matrix over the whole input vector, kept on the columns it reads
        fG = -2.0 * Geq.T * qeq[None, :]
        F = np.zeros((n, self._zlen))
        k_end = self._k_end
        F[:, :k_end] = -fG @ self.free_[r_eq]
        F[:, zs["u_prev"]] += self._fprev
        F[:, zs["pref"]] -= self._fpref
        if len(r_eq):
            fb = fG.reshape(n, len(eq_cv), N).sum(axis=2)          # times the setpoints
            F[:, zs["band_lo"].start + eq_cv] += fb / self._sy[eq_cv][None, :]
            if self._preview:                                      # times the references
                F[:, zs["ref"].start + r_eq] += fG / self._sy_t[r_eq][None, :]
        if self._Pt is not None:
            F[:, :k_end] += self._Kt @ self._PxN
            F[:, zs["x_term"]] -= self._Kt / self._sx[None, :]
        f_cols = np.flatnonzero(np.any(F != 0, axis=0))
        F = np.ascontiguousarray(F[:, f_cols])
        for a in (H, F, f_cols):
            a.flags.writeable = False       # shared: each structure takes its own copy of H
        part = self._sp_parts[key] = (H, F, f_cols)
        return part

    def _entry(self, bs, rs, z):
        """The exact row structure of a sample (the rules in the module docstring) with the
        limit rows' soft weights; *bs*: the scaled band and limit blocks (4 ny), *rs*: the
        scaled rate limits.  Returns an :class:`_Entry` or, with setpoint preview and a zone
        that may share its limit's rows, a dict of entries by which CVs' bands move."""
        b4 = bs.reshape(4, self.ny)
        fin = np.isfinite(b4)
        eq = self._q_active & fin[0] & fin[1] & (b4[0] == b4[1])
        zone = self._q_active & ~eq & (fin[0] | fin[1])
        lim = self._lim_weighted & (fin[2] | fin[3])
        # a zone whose ends are the CV's limits shares the limit's row: q v^2 + l v + h v^2
        merged = zone & lim & (b4[0] == b4[2]) & (b4[1] == b4[3])
        rated = np.isfinite(rs)
        if self._preview and merged.any():
            return {}                      # resolved per sample by _moving_entry
        return _Entry(self, eq, zone & ~merged, lim, rated, merged, b4)

    def _moving_entry(self, split, bs, rs, z):
        """With preview, a zone sharing its limit's rows keeps its own rows while its band moves."""
        ref = z[self._zs["ref"]]
        moving = np.any(ref.reshape(self.N, self.ny) != 0, axis=0)
        ent = split.get(moving.tobytes())
        if ent is None:
            b4 = bs.reshape(4, self.ny)
            fin = np.isfinite(b4)
            eq = self._q_active & fin[0] & fin[1] & (b4[0] == b4[1])
            zone = self._q_active & ~eq & (fin[0] | fin[1])
            lim = self._lim_weighted & (fin[2] | fin[3])
            merged = zone & lim & (b4[0] == b4[2]) & (b4[1] == b4[3]) & ~moving
            ent = split[moving.tobytes()] = _Entry(self, eq, zone & ~merged, lim,
                                                   np.isfinite(rs), merged, b4)
        return ent

    # ------------------------------------------------------------------ solve
    def data(self, z: np.ndarray):
        """``(H, f, A, bupper, blower, sense, weights, structure)`` of the QP for input vector z.

        ``weights`` = (rho_l, rho_u, w_l, w_u) of the soft rows (DAQP's convention).  Shared by
        :meth:`solve` and the benchmark's floor, which solves the same data with DAQP's own API.
        Per sample: the structure looked up by a signature of the band, limit and rate blocks
        (their finiteness and which ends coincide), then one matrix-vector product for the
        gradient (on the input entries it reads), one batched product for the free response of
        the soft rows (per CV, on the state entries that CV sees), one small product for the rate
        rows and a few array operations for the bounds.
        """
        zv = self._zv
        if z is not zv[0]:                  # views of the blocks read (the same z each sample)
            zv = self._zv = (z, z[self._usl].reshape(2, self.n_variables_))
        # band_lo, band_hi, lim_lo, lim_hi, the rates and the signature's pairs, scaled
        q = z.take(self._q_idx) / self._sq
        nq = self._nq
        p = nq + 7 * self.ny
        sb = self._sigbuf                   # finiteness, then the pairs, in one buffer
        np.isfinite(q[:nq], out=sb[0])
        np.less_equal(q[nq:p], q[p:], out=sb[1])
        sig = sb[2].tobytes()
        bs = q[:self._n4]
        ent = self._sigs.get(sig)
        if ent is None:
            if len(self._sigs) > 256:
                self._sigs.clear()
            ent = self._sigs[sig] = self._entry(bs, q[self._n4:nq], z)
        if ent.__class__ is dict:
            ent = self._moving_entry(ent, bs, q[self._n4:nq], z)
        st = ent.st
        n = self.n_variables_
        if st.W is not None:                # one soft group: gradient and free response at once
            r = st.W.dot(z.take(st.w_cols))       # (the method: np.dot without its dispatch)
            f, yf = r[:n], r[n:]
        else:
            f = st.F.dot(z.take(st.f_cols))
            if st.n_groups:                 # free response of the soft rows (groups, 1, N)
                yf = np.matmul(z.take(st.g_cols), st.S)
                if st.g_map is not None:
                    yf = yf[st.g_map]
        ub = zv[1].tobytes()                # MV limits as written last into this structure's
        if ub != st.u_raw:                  # bounds: those bounds stand (DAQP only reads them)
            np.divide(zv[1], self._su_t, st.b_u)
            st.u_raw = ub
        if st.n_groups:
            if st.v_sl is not None:         # one group: its band or limit ends, a view of bs
                np.subtract(bs[st.v_sl], yf, st.b_soft1)
            else:
                np.subtract(bs.take(st.v_idx), yf, st.b_soft)
            if st.moved_idx is not None:                      # preview: zone bands move
                st.b_soft[:, :st.n_zone_groups] += z.take(st.moved_idx) / st.moved_scale
            if st.n_lim:
                if not (ent.check_cross and self._crossed(st, ent, bs, yf)):
                    st.lim_off = 0.0
                    if st.wkey != ent.wkey:
                        st.set_limit_weights(ent.wkey, ent.rho_rows, ent.wlin_rows)
        if st.n_rate:
            # move rows: the first move is measured from u_prev, the others from the last move
            np.matmul(st.R, z.take(st.rate_cols), out=st.b_rate)
        b = st.b                  # [bl; bu] in one buffer, clamped to DAQP's infinity by two
        np.maximum(b, -_INF, out=b)     # ufuncs (ndarray.clip's result to the bit, without its
        np.minimum(b, _INF, out=b)      # Python wrapper)
        return st.H, f, st.A, st.bu, st.bl, st.sense, st.weights, st, st.key

    def _crossed(self, st, ent, bs, yf) -> bool:
        """Run-time limits crossed (lo > hi) on a limited CV: one slack covers both sides (the
        slack form's), so the row becomes the mid-point with the linear weight raised by
        ``h (lo - hi)`` -- the same cost up to a constant.  False (nothing done) when none is."""
        b4 = bs.reshape(4, self.ny)
        if not (b4[2][st.lim_cv] > b4[3][st.lim_cv]).any():
            return False
        c, N = st.lim_cv, self.N
        lo, hi = b4[2][c], b4[3][c]
        cross = lo > hi
        mid = 0.5 * (lo + hi)
        wl = np.where(cross, ent.wl + self._w["limit_quadratic"][c] * (lo - hi), ent.wl)
        st.lim_off = np.repeat(np.where(cross, 0.5 * (lo - hi), 0.0), N)
        lo, hi = np.where(cross, mid, lo), np.where(cross, mid, hi)
        g = st.n_zone_groups
        yl = yf if yf.ndim == 1 else yf[g:]     # (N,): the soft rows of one CV
        st.b_soft[0, g:] = lo[:, None, None] - yl
        st.b_soft[1, g:] = hi[:, None, None] - yl
        wkey = (wl.tobytes(), ent.wkey[1])
        if st.wkey != wkey:
            st.set_limit_weights(wkey, ent.rho_rows, np.repeat(wl, N))
        return True

    def solve(self, z: np.ndarray) -> QPResult:
        """Solve for the input vector *z*; warm-started from the last active set of the same
        structure.  ``values``: ``u`` (nu, M) and ``slack`` (ny, N), scaled."""
        H, f, A, bu, bl, sense, weights, st, _key = self.data(z)
        t0 = time.perf_counter()
        mdl = st.model
        if not st.ready:
            ef = mdl.setup(H, f, A, bu, bl, sense)
            ef = int(ef[0] if isinstance(ef, tuple) else ef)
            if ef < 0:                 # e.g. a Hessian DAQP cannot factorize: not solved
                self.last_info_ = {"exit_flag": ef, "active_set": None, "solver": "daqp",
                                   "rows": int(A.shape[0]), "variables": self.n_variables_}
                return QPResult(status=f"setup_failed ({ef})", accepted=False,
                                solve_ms=(time.perf_counter() - t0) * 1e3)
            mdl.settings = self.options
            st.ready = True
            st.weights_changed = True
            st.cold = True
        if st.cold:
            # the first solve of a structure, and its first after a restart: the row flags as
            # set up (no active set) and the data through update() -- one path for both, so a
            # rerun repeats the first run to the bit (update's round-off differs from setup's)
            mdl.update(f=f, bupper=bu, blower=bl, sense=st.sense)
            st.cold = False
        else:
            mdl.update(f=f, bupper=bu, blower=bl)
        if st.weights_changed:
            mdl.soft_weights(rho_l=weights[0], rho_u=weights[1], w_l=weights[2], w_u=weights[3])
            st.weights_changed = False
        x, _fval, flag, info = mdl.solve()
        ms = (time.perf_counter() - t0) * 1e3
        flag = int(flag)
        if flag == 1 or flag == 2:
            status = "optimal"
            # finite: x'x is (unless an entry is not finite, or it overflows: then look at each)
            ok = math.isfinite(x.dot(x)) or bool(np.isfinite(x).all())
        else:
            status = DAQP_EXIT.get(flag) or f"exit_flag_{flag}"
            ok = False
        lam = info.get("lam")
        nact = None if lam is None else int(np.count_nonzero(lam))
        self.last_info_ = {"exit_flag": flag, "active_set": nact, "solver": "daqp",
                           "rows": st.n_rows, "variables": self.n_variables_}
        if ok:
            U = x
            # u: (nu, M), a view of x; slack: (ny, N), the shared zeros unless a row is violated
            vals = {"u": U.reshape(self.M, self.nu).T, "slack": st.zero_slack}
            off = st.lim_off
            if st.n_lim and (nact != 0 or off.__class__ is not float):
                slack = vals["slack"] = np.zeros((self.ny, self.N))
                # only a row in the final active set can be violated (others hold to primal_tol)
                o, nl = st.lim_o, st.n_lim
                act = lam[o:o + nl].nonzero()[0] if lam is not None else np.arange(nl)
                if act.size:
                    gu = np.dot(A[st.n_zone + act], U)
                    s = np.maximum(np.maximum(bl[o + act] - gu, gu - bu[o + act]), 0.0)
                    if off.__class__ is not float:
                        s += off[act]
                    slack.reshape(-1)[st.lim_flat[act]] = s
                if off.__class__ is not float:     # crossed limits: the slack's floor
                    rest = np.ones(nl, bool)
                    rest[act] = False
                    slack.reshape(-1)[st.lim_flat[rest]] = off[rest]
        else:
            vals = {}
        return QPResult(status=status, accepted=ok, values=vals,
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


class _Structure:
    """One row structure of the condensed QP (which CVs have a setpoint, a zone, a limit; which
    MVs a rate): its Hessian, rows, DAQP workspace, bound buffers and the per-sample maps.

    The maps read the input vector ``z`` through index arrays built here once:

    * gradient: ``f = F @ z[f_cols]`` -- every term of ``f`` (free response through the setpoint
      rows, setpoints, ``u_prev``, preferred MVs, terminal state, previewed references) folded
      into one matrix over the entries of ``z`` it reads;
    * soft rows: the free response of each CV with soft rows, on the state entries that CV
      sees (``S``: groups x columns x N, one batched product), subtracted from the CV's band or
      limit;
    * rate rows: ``(u_prev - rate, -rate, ...; u_prev + rate, rate, ...) / su`` from one small
      product.
    """

    __slots__ = ("key", "H", "A", "sense", "rho", "wlin", "weights", "model", "ready", "cold",
                 "weights_changed", "wkey", "b", "bl", "bu", "b_u", "b_soft", "b_rate",
                 "n_rows", "n_zone", "n_lim", "n_rate", "n_groups", "n_zone_groups", "lim_o",
                 "lim_cv", "lim_pairs", "lim_flat", "lim_off", "f_cols", "F", "g_cols", "S",
                 "v_idx", "moved_idx", "moved_scale", "rate_cols", "R", "W", "w_cols",
                 "g_map", "u_raw", "v_sl", "b_soft1", "zero_slack")

    def __init__(self, cq: "CondensedQP", eq, zone, lim, rated, key: bytes):
        import daqp

        N, ny, nu, M, n = cq.N, cq.ny, cq.nu, cq.M, cq.n_variables_
        zs = cq._zs

        def rows_of(mask):         # rows k*ny + i of the CVs in mask, CV after CV
            return (np.arange(N)[:, None] * ny + np.flatnonzero(mask)[None, :]).ravel(order="F")

        r_eq, r_zone, r_lim = rows_of(eq), rows_of(zone), rows_of(lim)
        eq_cv, zone_cv, lim_cv = np.flatnonzero(eq), np.flatnonzero(zone), np.flatnonzero(lim)
        G = cq.G_
        q = cq._w["cv_weight"]
        # the Hessian and the gradient's matrix depend on the setpoint CVs alone: built once per
        # set of setpoint CVs (the products with G are most of a new structure's cost)
        H, self.F, self.f_cols = cq._setpoint_part(eq, r_eq, eq_cv)
        self.H = H.copy()                   # DAQP's setup takes a writable Hessian
        r_rate = (np.arange(M)[:, None] * nu + np.flatnonzero(rated)[None, :]).ravel(order="F")
        self.A = np.vstack([G[r_zone], G[r_lim], cq._Dm[r_rate]])
        nz_, nl, nr = len(r_zone), len(r_lim), len(r_rate)
        m = n + self.A.shape[0]
        self.key, self.n_rows = key, int(self.A.shape[0])
        self.n_zone, self.n_lim, self.n_rate = nz_, nl, nr
        self.sense = np.zeros(m, dtype=np.int32)
        self.sense[n:n + nz_ + nl] = _SOFT
        # soft weights of the zone rows (quadratic only); limit rows' weights are set per sample
        self.rho = np.full(m, _RHO_LINEAR)
        self.wlin = np.zeros(m)
        self.rho[n:n + nz_] = 1.0 / (2.0 * np.repeat(q[zone], N))
        self.weights = (self.rho, self.rho, self.wlin, self.wlin)
        self.model, self.ready, self.weights_changed, self.wkey = daqp.Model(), False, False, None
        self.cold = False
        self.u_raw = None              # the MV limits (bytes of z's u_lo, u_hi) last in b_u
        # ---- bound buffer [bl; bu] and its blocks (views, written in place each sample)
        self.b = np.empty(2 * m)
        b2 = self.b.reshape(2, m)
        self.bl, self.bu = self.b[:m], self.b[m:]
        self.b_u = b2[:, :n]
        # ---- soft rows: a group per zone CV, then per limited CV (N rows each)
        groups = [(c, 0) for c in zone_cv] + [(c, 2) for c in lim_cv]
        ng = len(groups)
        self.n_groups, self.n_zone_groups = ng, len(zone_cv)
        self.lim_o, self.lim_cv, self.lim_off = n + nz_, lim_cv, 0.0
        self.lim_pairs = [(2 * ny + int(c), 3 * ny + int(c)) for c in lim_cv]
        self.lim_flat = (lim_cv[:, None] * N + np.arange(N)[None, :]).ravel()
        self.moved_idx = self.moved_scale = None
        self.g_map = None
        self.v_sl = self.b_soft1 = None
        if ng:
            # the free response once per CV (a CV with a zone of its own and a limit has both)
            gcv = [int(c) for c, _ in groups]
            ucv = list(dict.fromkeys(gcv))
            if len(ucv) < ng:
                self.g_map = np.array([ucv.index(c) for c in gcv])
            blocks = [cq.free_[np.arange(N) * ny + c] for c in ucv]
            used = [np.flatnonzero(np.any(bk != 0, axis=0)) for bk in blocks]
            kmax = max(1, max(len(u) for u in used))
            S = np.zeros((len(ucv), kmax, N))
            cols = np.zeros((len(ucv), 1, kmax), dtype=np.intp)
            for g, (bk, u) in enumerate(zip(blocks, used)):
                S[g, :len(u)] = bk[:, u].T
                cols[g, 0, :len(u)] = u
                cols[g, 0, len(u):] = u[0] if len(u) else 0      # padding: weight zero
            self.S, self.g_cols = S, cols
            self.v_idx = np.array([[base * ny + c for c, base in groups],
                                   [(base + 1) * ny + c for c, base in groups]]).reshape(2, ng, 1, 1)
            self.b_soft = b2[:, n:n + nz_ + nl].reshape(2, ng, 1, N)
            if ng == 1:                     # its (lower; upper) ends: bs[base*ny + c :: ny][:2]
                c, base = groups[0]
                self.v_sl = (slice(base * ny + int(c), (base + 2) * ny, ny), None)
                self.b_soft1 = b2[:, n:n + nz_ + nl]                        # (2, N)
            if cq._preview and len(zone_cv):
                self.moved_idx = (zs["ref"].start + r_zone).reshape(len(zone_cv), 1, N)
                self.moved_scale = cq._sy[zone_cv].reshape(len(zone_cv), 1, 1)
        # ---- rate rows: (lower; upper) = R @ (rates, u_prev) of the rated MVs
        self.b_rate = b2[:, n + nz_ + nl:]
        mv = np.flatnonzero(rated)
        k = len(mv)
        self.rate_cols = np.concatenate([zs["rate"].start + mv, zs["u_prev"].start + mv])
        R = np.zeros((2, nr, 2 * k))
        for i, j in enumerate(mv):
            rows = slice(i * M, (i + 1) * M)
            R[0, rows, i], R[1, rows, i] = -1.0 / cq._su[j], 1.0 / cq._su[j]
            R[:, i * M, k + i] = 1.0 / cq._su[j]
        self.R = R
        # soft rows of one CV: the gradient and its free response from one product
        self.W = self.w_cols = None
        if ng and S.shape[0] == 1:
            u = np.union1d(self.f_cols, cols[0, 0])
            W = np.zeros((n + N, len(u)))
            W[:n, np.searchsorted(u, self.f_cols)] = self.F
            W[n:, np.searchsorted(u, cols[0, 0])] = S[0].T
            self.W, self.w_cols = W, u
            self.S, self.g_cols = S[0], cols[0, 0]
        # the slacks of a sample whose limit rows all hold: zeros, shared and read-only
        self.zero_slack = np.zeros((ny, N))
        self.zero_slack.flags.writeable = False
        for view in (self.b_u, self.b_soft if ng else self.b, self.b_rate,
                     self.b_soft1 if ng == 1 else self.b):
            assert view.size == 0 or np.shares_memory(view, self.b)     # views, not copies

    def set_limit_weights(self, wkey, rho_rows, wlin_rows) -> None:
        o, nl = self.lim_o, self.n_lim
        self.rho[o:o + nl] = rho_rows
        self.wlin[o:o + nl] = wlin_rows
        self.wkey = wkey
        self.weights_changed = True


class _Entry:
    """A sample's exact structure with the soft weights of its limit rows (a zone whose ends
    are its CV's limits adds its weight to the limit row's quadratic weight)."""

    __slots__ = ("st", "wl", "wkey", "rho_rows", "wlin_rows", "check_cross")

    def __init__(self, cq: "CondensedQP", eq, zone, lim, rated, merged, b4):
        self.st = cq._structure(eq, zone, lim, rated)
        c = self.st.lim_cv
        # lim_lo <= lim_hi on every limited CV (a bit of the signature): no crossing to look for
        self.check_cross = not bool(np.all(b4[2][c] <= b4[3][c]))
        w = cq._w
        self.wl = w["limit_linear"][c].copy()
        hq_c = w["limit_quadratic"][c] + np.where(merged[c], w["cv_weight"][c], 0.0)
        self.wkey = (self.wl.tobytes(), hq_c.tobytes())
        with np.errstate(divide="ignore"):
            rq = np.where(hq_c > 0, 1.0 / (2.0 * hq_c), _RHO_LINEAR)
        self.rho_rows = np.repeat(rq, cq.N)
        self.wlin_rows = np.repeat(self.wl, cq.N)
