"""Each private dependency name mpcproto uses (``mpcproto/_deps.py``) is there and behaves like its
public equivalent.

These tests run on every installed version (no skip on a version change): a dependency that renames
or changes a private name fails here, and the message names the version the adapter was checked on
(``_deps.CHECKED_ON``).  The public equivalents are the references: scipy's ``A @ x``, OSQP's public
``update``/``solve``, cvxpy's ``get_problem_data`` / ``solve(warm_start=False)``, the pids the workers
report themselves and the pool sizes given to the standard-library constructors.
"""

from __future__ import annotations

import importlib.metadata as md
import os
import platform
import re
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from mpcproto import _deps

ROOT = Path(__file__).resolve().parents[1] / "mpcproto"


def _installed(dist: str) -> str:
    return platform.python_version() if dist == "python" else md.version(dist)


def _why(adapter: str) -> str:
    dist, checked = _deps.CHECKED_ON[adapter]
    return f"{adapter}: checked on {dist} {checked}, installed {dist} {_installed(dist)}"


def test_every_adapter_records_the_version_it_was_checked_on():
    adapters = {n for n in _deps.__all__ if callable(getattr(_deps, n)) and n[0].islower()}
    assert adapters == set(_deps.CHECKED_ON)
    for adapter, (dist, version) in _deps.CHECKED_ON.items():
        assert re.fullmatch(r"\d+\.\d+(\.\d+)?", version), adapter
        _installed(dist)                 # the distribution exists under that name


def test_no_private_dependency_name_outside_the_adapter_module():
    # the private names the adapters wrap, and any `<dependency>._private` module path
    pattern = re.compile(r"_sparsetools|(?<!self)\._(?:processes|max_workers|client|solver_cache|solver)\b|"
                         r"[\"']_solver_cache|[\"']_processes[\"']|[\"']_max_workers[\"']|"
                         r"[\"']_client[\"']|getattr\([^,]+,\s*[\"']_solver[\"']|param_prob|PARAM_PROB|"
                         r"\b(?:numpy|np|scipy|sp|sps|cvxpy|cp|osqp|clarabel|daqp|casadi|ca|dask|"
                         r"distributed|concurrent|multiprocessing)(?:\.\w+)*\._[a-z]\w*")
    bad = []
    for path in ROOT.rglob("*.py"):
        if path.name == "_deps.py":
            continue
        for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if pattern.search(line.split("#")[0]) and "os._exit" not in line:
                bad.append(f"{path.relative_to(ROOT.parent)}:{i}: {line.strip()}")
    assert not bad, "private dependency names outside mpcproto/_deps.py:\n" + "\n".join(bad)


# ------------------------------------------------------------------------------------- scipy
def test_csr_matvec_is_scipys_kernel_and_equals_the_public_product():
    assert _deps._CSR_MATVEC is not None, _why("csr_matvec") + ": scipy.sparse._sparsetools.csr_matvec gone"
    rng = np.random.default_rng(7)
    for shape, density in (((40, 25), 0.2), ((1, 9), 1.0), ((300, 120), 0.02), ((5, 5), 0.0)):
        A = sp.random(*shape, density=density, format="csr", random_state=rng)
        x = rng.standard_normal(shape[1])
        # reference: scipy's public product (same kernel, so the same bits)
        np.testing.assert_array_equal(_deps.csr_matvec(A, x), A @ x, err_msg=_why("csr_matvec"))
    # the kernel ADDS into its output: the adapter must start from zeros on every call
    A = sp.csr_matrix(np.arange(6.0).reshape(2, 3))
    np.testing.assert_array_equal(_deps.csr_matvec(A, np.ones(3)), [3.0, 12.0])
    np.testing.assert_array_equal(_deps.csr_matvec(A, np.ones(3)), [3.0, 12.0])


# -------------------------------------------------------------------------------------- OSQP
def _small_qp():
    # min 1/2 x'Px + q'x  s.t.  l <= Ax <= u ; a strictly convex box-and-sum QP
    P = sp.csc_matrix(np.array([[4.0, 1.0], [1.0, 2.0]]))
    A = sp.csc_matrix(np.array([[1.0, 1.0], [1.0, 0.0], [0.0, 1.0]]))
    return P, A


def test_osqp_extension_gives_the_iterates_of_the_public_calls():
    import osqp
    P, A = _small_qp()
    opts = dict(eps_abs=1e-9, eps_rel=1e-9, polishing=False, verbose=False, adaptive_rho_interval=25)
    data = [(np.array([1.0, 1.0]), np.array([1.0, 0.0, 0.0]), np.array([1.0, 0.7, 0.7])),
            (np.array([-2.0, 0.5]), np.array([0.5, -1.0, -1.0]), np.array([2.0, 1.0, 0.3])),
            (np.array([0.3, -0.1]), np.array([-1.0, -1.0, -1.0]), np.array([1.0, 1.0, 1.0]))]
    a, b = osqp.OSQP(), osqp.OSQP()
    for s in (a, b):
        s.setup(P, np.zeros(2), A, np.full(3, -np.inf), np.full(3, np.inf), **opts)
    ext = _deps.osqp_extension(a)
    assert ext is not None, _why("osqp_extension") + ": osqp.OSQP._solver gone or changed"
    for q, l, u in data:
        ext.update_data_vec(q=q, l=l, u=u)
        ext.solve()
        b.update(q=q, l=l, u=u)
        res = b.solve(raise_error=False)
        # reference: OSQP's public update/solve from the same warm start
        assert int(ext.info.status_val) == int(res.info.status_val) == 1, _why("osqp_extension")
        assert int(ext.info.iter) == int(res.info.iter), _why("osqp_extension")
        np.testing.assert_array_equal(np.array(ext.solution.x), res.x, err_msg=_why("osqp_extension"))
        np.testing.assert_array_equal(np.array(ext.solution.y), res.y, err_msg=_why("osqp_extension"))
    # the first data set by hand (KKT, closed form): on x1 + x2 = 1 the cost is 2 x1^2 - x1 + 2,
    # minimal at x1 = 1/4, but x2 <= 0.7 forces x1 >= 0.3: the optimum is (0.3, 0.7)
    a2 = osqp.OSQP()
    a2.setup(P, data[0][0], A, data[0][1], data[0][2], **opts)
    np.testing.assert_allclose(a2.solve(raise_error=False).x, [0.3, 0.7], atol=1e-6)
    assert _deps.osqp_extension(object()) is None       # public fallback: no extension


# ------------------------------------------------------------------------------------- cvxpy
def _dpp_problem():
    import cvxpy as cp
    x = cp.Variable(3, name="x")
    c = cp.Parameter(3, name="c")
    lo = cp.Parameter(3, name="lo")
    hi = cp.Parameter(name="hi")
    prob = cp.Problem(cp.Minimize(cp.sum_squares(x) + c @ x),
                      [x >= lo, cp.sum(x) <= hi, x[0] == c[1] - 1.0])
    return cp, prob, x, c, lo, hi


def test_cvxpy_qp_map_reproduces_the_public_problem_data():
    cp, prob, x, c, lo, hi = _dpp_problem()
    rng = np.random.default_rng(3)
    c.value, lo.value, hi.value = rng.standard_normal(3), -np.ones(3), 2.0
    m = _deps.cvxpy_qp_map(prob)
    n, npar = m.n, m.total_param_size
    assert n == 3 and npar == 3 + 3 + 1, _why("cvxpy_qp_map")
    assert x.id in m.var_id_to_col
    for _ in range(3):
        vals = {c: rng.standard_normal(3), lo: rng.standard_normal(3), hi: float(rng.uniform(1, 3))}
        p = np.zeros(npar + 1)
        p[-1] = 1.0
        for par, v in vals.items():
            par.value = v
            c0 = m.param_id_to_col[par.id]
            p[c0:c0 + par.size] = np.ravel(v, order="F")
        # reference: cvxpy's public get_problem_data at these parameter values
        data, _, _ = prob.get_problem_data(cp.OSQP)
        q = sp.csc_matrix(m.q)[:n, :] @ p
        np.testing.assert_allclose(q, data["q"], rtol=0, atol=1e-14, err_msg=_why("cvxpy_qp_map"))
        Atens = sp.csc_matrix(m.A)
        ncon = Atens.shape[0] // (n + 1)
        bg = Atens[ncon * n: ncon * (n + 1), :] @ p
        neq = data["A"].shape[0]
        # the cone form is A_con x + bg in (zero cone) x (nonnegative cone); QpSolver.apply's
        # convention, which mpcproto/control/_qp.py relies on: equality rows A x = -bg with
        # A = A_con[:neq], inequality rows F x <= bg with F = -A_con[neq:]
        np.testing.assert_allclose(-bg[:neq], data["b"], atol=1e-14, err_msg=_why("cvxpy_qp_map"))
        np.testing.assert_allclose(bg[neq:], data["G"], atol=1e-14, err_msg=_why("cvxpy_qp_map"))
        Acon = Atens[: ncon * n, -1].toarray().reshape((ncon, n), order="F")
        np.testing.assert_allclose(Acon, np.vstack([data["A"].toarray(), -data["F"].toarray()]),
                                   atol=1e-14, err_msg=_why("cvxpy_qp_map"))


def test_cleared_cvxpy_cache_makes_the_next_warm_solve_a_cold_one():
    cp, prob, x, c, lo, hi = _dpp_problem()
    lo.value, hi.value = -np.ones(3), 2.0
    opts = dict(solver=cp.OSQP, eps_abs=1e-6, eps_rel=1e-6)
    for v in ([0.3, -1.0, 2.0], [1.0, 0.5, -0.5]):
        c.value = np.array(v)
        prob.solve(warm_start=True, **opts)
    assert "OSQP" in prob._solver_cache, _why("clear_cvxpy_solver_cache") + ": cache moved"
    c.value = np.array([-0.7, 0.2, 0.9])
    assert _deps.clear_cvxpy_solver_cache(prob), _why("clear_cvxpy_solver_cache")
    assert not prob._solver_cache
    prob.solve(warm_start=True, **opts)
    after_clear = (prob.solver_stats.num_iters, np.array(x.value))
    # reference: the public cold solve of a fresh copy of the same problem
    _, fresh, x2, c2, lo2, hi2 = _dpp_problem()
    c2.value, lo2.value, hi2.value = c.value, lo.value, hi.value
    fresh.solve(warm_start=False, **opts)
    assert after_clear[0] == fresh.solver_stats.num_iters, _why("clear_cvxpy_solver_cache")
    np.testing.assert_array_equal(after_clear[1], x2.value, err_msg=_why("clear_cvxpy_solver_cache"))
    assert not _deps.clear_cvxpy_solver_cache(object())   # fallback: nothing to clear, caller goes cold


# ------------------------------------------------------------------ concurrent.futures and Dask
def test_pool_processes_are_the_workers_that_run_the_cases():
    with ProcessPoolExecutor(max_workers=2) as ex:
        pids = {ex.submit(os.getpid).result() for _ in range(4)}
        procs = _deps.pool_processes(ex)
        # reference: the pids the workers report themselves (os.getpid inside the worker)
        assert procs and pids <= {p.pid for p in procs}, _why("pool_processes")
        assert all(p.is_alive() for p in procs), _why("pool_processes")
    assert _deps.pool_processes(object()) == []


def test_pool_max_workers_is_the_size_given_to_the_pool():
    with ProcessPoolExecutor(max_workers=3) as ex:
        assert _deps.pool_max_workers(ex) == 3, _why("pool_max_workers")
    with ThreadPoolExecutor(max_workers=2) as ex:
        assert _deps.pool_max_workers(ex) == 2, _why("pool_max_workers")
    assert _deps.pool_max_workers(object()) is None


def test_dask_executor_client_is_the_client_that_made_the_executor():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None, silence_logs=40) as cluster:
        with distributed.Client(cluster) as client:
            ex = client.get_executor(pure=False)
            assert _deps.dask_executor_client(ex) is client, _why("dask_executor_client")
            assert sum(client.nthreads().values()) == 2
    assert _deps.dask_executor_client(object()) is None
