"""A cvxpy problem compiled once and re-solved by driving OSQP directly.

cvxpy writes and canonicalizes the problem; this module reads the *compiled* problem's
parameter-to-data map, which for a DPP problem is affine: ``q = Mq @ p``, ``b = Mb @ p`` where ``p`` is
the flattened parameter vector with a trailing 1 (cvxpy's ``ParamConeProg`` tensors).  When neither
``P`` nor ``A`` depends on a parameter, each re-solve only needs new ``q``, ``l`` and ``u``: one sparse
matrix-vector product, an ``osqp.OSQP.update`` and a warm-started ``solve``; the factorization is
kept.  Pairs of one-sided rows ``a x <= g1`` and ``-a x <= g2`` that cvxpy emits for a two-sided
constraint are merged into one OSQP row ``-g2 <= a x <= g1`` (the same feasible set, fewer rows).

:class:`CompiledQP` also keeps the plain path (``Problem.solve`` through cvxpy with OSQP or Clarabel)
for reference and for users who prefer it; a test checks the two agree.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp

from .._deps import clear_cvxpy_solver_cache, csr_matvec, cvxpy_qp_map, osqp_extension
from ..validation import fail

__all__ = ["CompiledQP", "QPResult", "OSQP_DEFAULTS"]

# OSQP settings used by both the fast path and the benchmark floor (cvxpy's own defaults for the
# tolerances; polishing off because it costs a factorization per call).  OSQP's default
# adaptive_rho_interval=0 decides when to adapt rho from measured *time*, so a run under load could
# differ from the same run on an idle machine; a fixed iteration interval keeps every run
# reproducible from its seed.
OSQP_DEFAULTS: dict[str, Any] = {
    "eps_abs": 1e-5, "eps_rel": 1e-5, "max_iter": 10000, "polishing": False,
    "warm_starting": True, "verbose": False, "adaptive_rho_interval": 25,
}

OSQP_INFTY = 1e30   # OSQP's infinity: bounds at or beyond it are treated as absent

# osqp >= 1.0 status_val -> our solver status words
_OSQP_STATUS = {1: "optimal", 2: "optimal_inaccurate", 3: "infeasible", 4: "infeasible_inaccurate",
                5: "unbounded", 6: "unbounded_inaccurate", 7: "max_iterations", 8: "time_limit",
                9: "non_convex", 10: "interrupted", 11: "unsolved"}


@dataclass
class QPResult:
    """Outcome of one solve: ``status`` (solver word), ``accepted`` (optimal to tolerance) and values."""

    status: str
    accepted: bool
    values: dict[str, np.ndarray] = field(default_factory=dict)
    iterations: int | None = None
    solve_ms: float = 0.0
    objective: float = float("nan")


class CompiledQP:
    """A DPP cvxpy problem plus its extracted affine data map and a persistent OSQP object.

    Parameters
    ----------
    problem : cvxpy.Problem
        A DPP problem whose parameters enter only the linear cost and the constraint right-hand sides.
    parameters : mapping of str to cvxpy.Parameter
        The parameters, by the names used when solving.
    variables : mapping of str to cvxpy.Variable
        The variables whose values are returned.
    inf_parameters : sequence of str
        Names of parameters that may hold +-inf (limits): rows they reach become unbounded.
    owner : str
        Name used in error messages.
    """

    def __init__(self, problem, parameters: Mapping[str, Any], variables: Mapping[str, Any],
                 inf_parameters: Sequence[str] = (), owner: str = "problem"):
        self.problem = problem
        self.parameters = dict(parameters)
        self.variables = dict(variables)
        self.inf_parameters = tuple(inf_parameters)
        self.owner = owner
        self._solver = None
        self._started = False
        self._cold_cvxpy = False    # next plain solve cold (where cvxpy's cache cannot be cleared)
        self.keep_duals = False     # keep OSQP's duals of the last solve in ``last_duals``
        self.last_duals = None

    # ------------------------------------------------------------------ compile
    def compile(self) -> "CompiledQP":
        """Canonicalize with cvxpy (once) and extract ``P``, ``A`` and the affine maps to q, l, u."""
        if not self.problem.is_dpp():
            raise fail(self.owner, "problem", "a DPP optimization problem (compiled once)",
                       "a problem that is not DPP (it would be recompiled at every solve)")
        for name, par in self.parameters.items():
            if par.value is None:
                par.value = np.zeros(par.shape)
        pp = cvxpy_qp_map(self.problem)
        data = pp.data
        n = pp.n
        npar = pp.total_param_size
        # -- parameter vector layout
        self._slices: dict[str, tuple[slice, tuple[int, ...]]] = {}
        for name, par in self.parameters.items():
            if par.id not in pp.param_id_to_col:
                # parameter that canonicalization dropped (multiplies nothing): keep a dummy slot
                self._slices[name] = (slice(0, 0), par.shape)
                continue
            c0 = pp.param_id_to_col[par.id]
            self._slices[name] = (slice(c0, c0 + par.size), par.shape)
        self._npar = npar
        # -- the matrices must not depend on parameters
        Atens = sp.csc_matrix(pp.A)
        ncon = Atens.shape[0] // (n + 1) if n else 0
        mat_part = Atens[: ncon * n, :npar]
        if mat_part.count_nonzero():
            raise fail(self.owner, "problem", "constraints whose matrix holds no parameter",
                       "a parameter multiplying a variable in a constraint (the constraint matrix "
                       "would change every step)")
        if pp.P is not None and sp.csc_matrix(pp.P)[:, :npar].count_nonzero():
            raise fail(self.owner, "problem", "a quadratic cost without parameters",
                       "a parameter in the quadratic cost")
        P = sp.csc_matrix(data["P"])
        AF = sp.vstack([sp.csr_matrix(data["A"]), sp.csr_matrix(data["F"])]).tocsr()
        neq = data["A"].shape[0]
        Mb = sp.csr_matrix(Atens[ncon * n: ncon * (n + 1), :])     # rows of bg = Mb @ p (cvxpy form)
        # QpSolver.apply: eq rows A x = -bg, ineq rows F x <= g with F = -AF, g = bg
        Mq = sp.csr_matrix(sp.csc_matrix(pp.q)[:n, :])
        # data["A"] / data["F"] already carry the signs; build the maps with matching signs
        sign = np.concatenate([-np.ones(neq), np.ones(ncon - neq)])
        Mrhs = sp.diags(sign) @ Mb                                   # eq: b, ineq: g
        # -- merge opposite one-sided rows into two-sided rows
        F = AF[neq:]
        keys: dict[tuple, int] = {}
        partner = -np.ones(F.shape[0], dtype=int)
        for i in range(F.shape[0]):
            a, b_ = F.indptr[i], F.indptr[i + 1]
            idx = F.indices[a:b_]
            val = F.data[a:b_]
            order = np.argsort(idx)
            key = (tuple(idx[order]), tuple(np.round(val[order], 14)))
            nkey = (key[0], tuple(np.round(-val[order], 14)))
            j = keys.pop(nkey, None)
            if j is not None and partner[j] < 0:
                partner[j] = i
                partner[i] = -2  # absorbed
            else:
                keys.setdefault(key, i)
        keep = np.flatnonzero(partner != -2)
        low_src = partner[keep]                                      # -1: no lower bound
        rows_u = np.concatenate([np.arange(neq), neq + keep])
        has_low = low_src >= 0
        rows_l_eq = np.arange(neq)
        rows_l_in = neq + low_src[has_low]
        self.P_ = P
        self.A_ = sp.csc_matrix(AF[rows_u])
        m = self.A_.shape[0]
        self._low_rows = np.concatenate([rows_l_eq, neq + np.flatnonzero(has_low)])
        Ml = sp.vstack([Mrhs[rows_l_eq], -Mrhs[rows_l_in]]) if len(rows_l_eq) + len(rows_l_in) else \
            sp.csr_matrix((0, npar + 1))
        Mu = Mrhs[rows_u]
        self._n, self._m = n, m
        self._nl = Ml.shape[0]
        self._M = sp.csr_matrix(sp.vstack([Mq, Mu, Ml]))
        # rows reached by parameters that may be infinite: the sign of the coefficient tells where
        inf_cols = np.zeros(npar + 1, bool)
        for name in self.inf_parameters:
            inf_cols[self._slices[name][0]] = True
        Ms = self._M[:, np.flatnonzero(inf_cols)]
        self._inf_cols = np.flatnonzero(inf_cols)
        self._Msign = sp.csr_matrix(Ms.sign()) if Ms.nnz else None
        # variable slices in the solution vector
        self._vslices = {}
        for name, var in self.variables.items():
            c0 = pp.var_id_to_col[var.id]
            self._vslices[name] = (slice(c0, c0 + var.size), var.shape)
        self.n_variables_ = n
        self.n_rows_ = m
        self.n_rows_cvxpy_ = ncon
        return self

    # ------------------------------------------------------------------ data map
    def parameter_vector(self, values: Mapping[str, np.ndarray]) -> np.ndarray:
        """Flattened parameter vector (cvxpy's column order, Fortran order per parameter, then 1)."""
        p = np.zeros(self._npar + 1)
        p[-1] = 1.0
        for name, (sl, shape) in self._slices.items():
            v = values[name]
            p[sl] = np.ravel(v, order="F") if np.ndim(v) > 1 else v
        return p

    def set_inputs(self, layout: Mapping[str, int], maps: Mapping[str, Mapping[str, Any]],
                   inf_inputs: Sequence[str] = ()) -> None:
        """Compose the data map with an affine expansion of a smaller *input* vector.

        Parameters
        ----------
        layout : mapping of input name to size
            The input vector ``z`` is the concatenation of these blocks, in this order.
        maps : mapping of parameter name to {input name: matrix}
            Each parameter's flattened (Fortran-order) value is ``sum E @ z_block`` over its
            entries.  Every parameter must appear.
        inf_inputs : sequence of str
            Input blocks that may hold +-inf (limits).

        After this, :meth:`data_inputs` needs one sparse product per solve: the expansion (a
        setpoint repeated over the horizon, DVs through ``Bd``...) is folded into the map.
        """
        offs = {}
        o = 0
        for name, size in layout.items():
            offs[name] = (o, int(size))
            o += int(size)
        nz = o
        missing = [p for p in self.parameters if p not in maps]
        if missing:
            raise fail(self.owner, "maps", "an input map for every parameter",
                       f"none for parameter(s) {missing}")
        M = sp.csc_matrix(self._M)
        blocks = {name: sp.csc_matrix((M.shape[0], size)) for name, (_, size) in offs.items()}
        self._expand = {}
        for pname, entries in maps.items():
            sl, shape = self._slices[pname]
            size = int(np.prod(shape))
            Mp = M[:, sl]
            exp = []
            for iname, E in entries.items():
                E = sp.csc_matrix(E)
                if E.shape != (size, offs[iname][1]):
                    raise fail(self.owner, f"maps.{pname}.{iname}",
                               f"shape {(size, offs[iname][1])}", f"shape {E.shape}")
                if Mp.shape[1]:
                    blocks[iname] = blocks[iname] + Mp @ E
                exp.append((iname, E))
            self._expand[pname] = exp
        Mz = sp.hstack([blocks[name] for name in layout] + [M[:, [-1]]]).tocsr()
        Mz.eliminate_zeros()
        self._Mz = Mz
        # a small map is faster as a dense matrix (one BLAS call, no sparse bookkeeping)
        self._Mz_dense = Mz.toarray() if Mz.shape[0] * Mz.shape[1] <= 40000 else None
        self._zoffs = offs
        self.n_inputs_ = nz
        self._zz = np.zeros(nz + 1)
        self._zz[-1] = 1.0
        self._lbuf = np.full(self._m, -OSQP_INFTY)
        self._inf_cache: dict[bytes, tuple] = {}
        cols = [np.arange(offs[n][0], offs[n][0] + offs[n][1]) for n in inf_inputs]
        self._zinf = np.concatenate(cols) if cols else np.zeros(0, int)
        self._Mz_inf_sign = sp.csr_matrix(sp.csc_matrix(Mz)[:, self._zinf].sign())

    @staticmethod
    def _affine_inf(E, z: np.ndarray) -> np.ndarray:
        """``E @ z`` where entries of *z* may be +-inf: reached rows become +-inf."""
        fin = np.isfinite(z)
        if fin.all():
            return E @ z
        v = E @ np.where(fin, z, 0.0)
        d = sp.csc_matrix(E)[:, ~fin].sign() @ np.sign(z[~fin])
        hit = d != 0
        v[hit] = np.sign(d[hit]) * np.inf
        return v

    def values_from_inputs(self, z: np.ndarray) -> dict[str, np.ndarray]:
        """Parameter values (cvxpy shapes) for input vector *z* (for the plain cvxpy path)."""
        out = {}
        for pname, exp in self._expand.items():
            sl, shape = self._slices[pname]
            v = np.zeros(int(np.prod(shape)))
            for iname, E in exp:
                o, s = self._zoffs[iname]
                v = v + self._affine_inf(E, z[o:o + s])
            out[pname] = v.reshape(shape, order="F")
        return out

    def _finish_data(self, out: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        n, m = self._n, self._m
        q = out[:n]
        u = out[n:n + m]
        l = np.full(m, -OSQP_INFTY)
        l[self._low_rows] = out[n + m:]
        return q, l, u

    def data_inputs(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(q, l, u)`` for input vector *z* (see :meth:`set_inputs`); limits may be +-inf.

        Bounds that are unbounded come back as +-``OSQP_INFTY`` (OSQP's own infinity).
        """
        zz = self._zz
        zz[:-1] = z
        zi = zz[self._zinf]
        isinf = np.isinf(zi)
        hit = None
        if isinf.any():
            key = (zi * isinf).tobytes()      # +-inf where infinite, 0 (or nan) elsewhere
            hit = self._inf_cache.get(key)
            if hit is None:
                direction = self._Mz_inf_sign @ np.where(isinf, np.sign(zi), 0.0)
                rows = np.flatnonzero(direction != 0)
                hit = (self._zinf[isinf], rows, np.sign(direction[rows]) * OSQP_INFTY)
                if len(self._inf_cache) > 64:
                    self._inf_cache.clear()
                self._inf_cache[key] = hit
            zz[hit[0]] = 0.0
        Mz = self._Mz
        if self._Mz_dense is not None:
            out = self._Mz_dense @ zz
        else:
            out = csr_matvec(Mz, zz)
        if hit is not None:
            out[hit[1]] = hit[2]
        n, m = self._n, self._m
        l = self._lbuf
        l[self._low_rows] = out[n + m:]
        return out[:n], l, out[n:n + m]

    def solve_inputs(self, z: np.ndarray) -> QPResult:
        """Fast re-solve for input vector *z* (see :meth:`set_inputs`)."""
        q, l, u = self.data_inputs(z)
        return self.solve_data(q, l, u)

    def data(self, values: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(q, l, u)`` of the OSQP problem for these parameter values."""
        p = self.parameter_vector(values)
        infs = None
        if self._Msign is not None:
            pin = p[self._inf_cols]
            bad = ~np.isfinite(pin)
            if bad.any():
                infs = np.where(bad, np.sign(pin), 0.0)
                p[self._inf_cols[bad]] = 0.0
        out = self._M @ p
        if infs is not None:
            direction = self._Msign @ infs
            hit = direction != 0
            out[hit] = np.sign(direction[hit]) * OSQP_INFTY
        if not np.all(np.isfinite(out[: self._n])):
            raise fail(self.owner, "values", "finite values (they reach the cost vector)",
                       "a non-finite value in the cost vector", code="non_finite")
        return self._finish_data(out)

    # ------------------------------------------------------------------ solving
    def setup(self, settings: Mapping[str, Any] | None = None) -> None:
        """Create the OSQP object with the fixed ``P`` and ``A`` (factorized once)."""
        import osqp

        opts = dict(OSQP_DEFAULTS)
        opts.update(settings or {})
        self._opts = opts
        self._solver = osqp.OSQP()
        m = self._m
        self._solver.setup(self.P_, np.zeros(self._n), self.A_, np.full(m, -np.inf), np.full(m, np.inf),
                           **opts)
        self._ext = osqp_extension(self._solver)
        self._started = False

    def update_settings(self, **settings) -> None:
        """Change OSQP settings of the fast path (those OSQP allows after setup)."""
        if self._solver is None:
            raise fail(self.owner, "fast_path", "the fast path set up before its settings change",
                       "no fast path (fast_path=False?)")
        self._solver.update_settings(**settings)
        self._opts.update(settings)

    def restart(self) -> None:
        """Forget everything a previous run left in the solvers, so a rerun repeats it exactly.

        The fast path's OSQP object is set up afresh (the warm start *and* the step size that
        adaptive rho tuned during the last run are both state: zeroing the iterate alone does not
        repeat a run), the kept duals are dropped and cvxpy's own warm-start cache is cleared.
        """
        if self._solver is not None:
            self.setup(self._opts)
        self.last_duals = None
        self._cold_cvxpy = not clear_cvxpy_solver_cache(self.problem)

    def reset_warm_start(self) -> None:
        """Forget the previous solution (the next solve starts cold)."""
        if self._solver is not None:
            self._solver.warm_start(x=np.zeros(self._n), y=np.zeros(self._m))

    def solve_fast(self, values: Mapping[str, np.ndarray]) -> QPResult:
        """Re-solve through the persistent OSQP object (warm start, no refactorization)."""
        q, l, u = self.data(values)
        return self.solve_data(q, l, u)

    def solve_data(self, q: np.ndarray, l: np.ndarray, u: np.ndarray) -> QPResult:
        """Solve with given ``q, l, u`` (the matrices are the compiled ones), warm started.

        Talks to the OSQP extension object under ``osqp.OSQP`` when it is there (the same
        ``update_data_vec``/``solve`` calls the wrapper makes, without its per-call bookkeeping);
        otherwise to the public ``update``/``solve``.
        """
        t0 = time.perf_counter()
        ext = self._ext
        if ext is not None:
            ext.update_data_vec(q=q, l=l, u=u)
            ext.solve()
            info = ext.info
            sol = ext.solution
            x = np.array(sol.x)
            if self.keep_duals:
                self.last_duals = np.array(sol.y)
        else:
            self._solver.update(q=q, l=l, u=u)
            res = self._solver.solve(raise_error=False)
            info, x = res.info, np.array(res.x)
            if self.keep_duals:
                self.last_duals = np.array(res.y)
        ms = (time.perf_counter() - t0) * 1e3
        sv = int(info.status_val)
        status = _OSQP_STATUS.get(sv, str(info.status))
        ok = sv == 1
        vals = {}
        if np.isfinite(x).all():
            for name, (sl, shape) in self._vslices.items():
                vals[name] = x[sl].reshape(shape, order="F")
        else:
            ok = False
        return QPResult(status=status, accepted=ok, values=vals, iterations=int(info.iter),
                        solve_ms=ms, objective=float(info.obj_val))

    def solve_cvxpy(self, values: Mapping[str, np.ndarray], solver: str = "OSQP",
                    options: Mapping[str, Any] | None = None) -> QPResult:
        """Plain path: set the cvxpy Parameters and call ``Problem.solve`` (same compiled problem)."""
        import cvxpy as cp

        for name, par in self.parameters.items():
            par.value = np.asarray(values[name], float).reshape(par.shape)
        opts = dict(options or {})
        t0 = time.perf_counter()
        try:
            self.problem.solve(solver=solver, warm_start=not self._cold_cvxpy, **opts)
            self._cold_cvxpy = False
            status = str(self.problem.status)
        except cp.error.SolverError as exc:  # solver crashed: treated like a failed solve
            status = f"solver_error: {exc}"
        ms = (time.perf_counter() - t0) * 1e3
        ok = status == cp.OPTIMAL
        vals = {}
        if ok:
            for name, var in self.variables.items():
                vals[name] = np.asarray(var.value, float).reshape(var.shape)
            if not all(np.all(np.isfinite(v)) for v in vals.values()):
                ok = False
        stats = self.problem.solver_stats
        iters = getattr(stats, "num_iters", None) if stats is not None else None
        obj = float(self.problem.value) if ok else float("nan")
        return QPResult(status=status, accepted=ok, values=vals, iterations=iters, solve_ms=ms,
                        objective=obj)
