"""The one place where mpcproto reaches into private names of its dependencies.

Every use of a private module or attribute of SciPy, cvxpy, OSQP, the standard library's process
pool or Dask's ``distributed`` goes through a function of this module, and only through it.  Each
function

* says which private name it uses and what breaks if the dependency changes it,
* falls back to a public route when the name is gone (or raises :class:`DependencyChangedError`
  where no public route does the same job), and
* is pinned by a test in ``tests/test_deps.py`` that records the versions it was checked on
  (:data:`CHECKED_ON`), checks that the private name is there and that it behaves like its public
  equivalent.  That test runs on every version: an upgrade that changes a private name fails there
  first, instead of silently slowing or changing a run.

Nothing else in the package may name a private attribute of a dependency (``tests/test_deps.py``
greps the package for them).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .exceptions import MpcprotoError

__all__ = ["DependencyChangedError", "CHECKED_ON", "csr_matvec", "osqp_extension",
           "clear_cvxpy_solver_cache", "cvxpy_qp_map", "CvxpyQPMap", "pool_processes",
           "pool_max_workers", "dask_executor_client"]

#: adapter -> (distribution, version it was checked on); the versions of the machine the adapters
#: and their tests were last checked on (``tests/test_deps.py`` shows them in its failure messages)
CHECKED_ON: dict[str, tuple[str, str]] = {
    "csr_matvec": ("scipy", "1.17.1"),
    "osqp_extension": ("osqp", "1.1.3"),
    "clear_cvxpy_solver_cache": ("cvxpy", "1.9.3"),
    "cvxpy_qp_map": ("cvxpy", "1.9.3"),
    "pool_processes": ("python", "3.11.7"),
    "pool_max_workers": ("python", "3.11.7"),
    "dask_executor_client": ("distributed", "2026.8.0"),
}


class DependencyChangedError(MpcprotoError, RuntimeError):
    """A dependency no longer has a private name mpcproto needs, and no public route does the job."""


def _changed(adapter: str, what: str, consequence: str) -> DependencyChangedError:
    dist, version = CHECKED_ON[adapter]
    return DependencyChangedError(
        f"{what} is missing from the installed {dist} (mpcproto was checked on {dist} {version}): "
        f"{consequence}. Install {dist} {version} or run tests/test_deps.py to see what changed.")


# --------------------------------------------------------------------------------------- SciPy
try:  # the compiled kernel behind ``csr_matrix @ vector``, without scipy's dispatch layers
    from scipy.sparse._sparsetools import csr_matvec as _CSR_MATVEC
except ImportError:  # pragma: no cover - another scipy layout: the public product is used
    _CSR_MATVEC = None


def csr_matvec(A, x: np.ndarray) -> np.ndarray:
    """``A @ x`` for a SciPy CSR matrix *A* and a 1-D float64 vector *x*, as a new float64 array.

    Private name: ``scipy.sparse._sparsetools.csr_matvec(n_row, n_col, indptr, indices, data, x, y)``,
    which adds ``A x`` into ``y``.  It saves scipy's dispatch layers (a few microseconds a call) in
    the MPC's per-sample data map.  If SciPy moves or renames it, ``A @ x`` is used: same numbers,
    a few microseconds slower per solve.
    """
    if _CSR_MATVEC is None:
        return A @ x
    out = np.zeros(A.shape[0])
    _CSR_MATVEC(A.shape[0], A.shape[1], A.indptr, A.indices, A.data, x, out)
    return out


# ---------------------------------------------------------------------------------------- OSQP
_OSQP_EXT_METHODS = ("update_data_vec", "solve", "info", "solution")


def osqp_extension(solver) -> Any | None:
    """The compiled extension object under a set-up ``osqp.OSQP`` *solver*, or None.

    Private name: ``osqp.OSQP._solver`` with ``update_data_vec(q=, l=, u=)``, ``solve()``, ``info``
    and ``solution`` (the calls the public ``update``/``solve`` make, without their per-call
    bookkeeping).  When it is missing or lacks one of those, None is returned and the caller uses
    the public ``OSQP.update`` / ``OSQP.solve``: same iterates, a few microseconds slower per solve.
    """
    ext = getattr(solver, "_solver", None)
    return ext if all(hasattr(ext, a) for a in _OSQP_EXT_METHODS) else None


# --------------------------------------------------------------------------------------- cvxpy
def clear_cvxpy_solver_cache(problem) -> bool:
    """Forget the warm-start state cvxpy keeps in *problem* between ``solve(warm_start=True)`` calls.

    Private name: ``cvxpy.Problem._solver_cache`` (a dict; cvxpy's OSQP and Clarabel interfaces keep
    their previous solver object there).  Returns True when it was cleared.  When it is missing,
    returns False: the caller must then make its next solve cold with the public
    ``solve(warm_start=False)`` (without either, a rerun of a controller would start warm from the
    previous run and could differ from the first run in the last digits).
    """
    cache = getattr(problem, "_solver_cache", None)
    if isinstance(cache, dict):
        cache.clear()
        return True
    return False


@dataclass(frozen=True)
class CvxpyQPMap:
    """cvxpy's compiled, parameter-affine form of a DPP problem for its QP solvers (see
    :func:`cvxpy_qp_map`).  ``p`` below is the flattened parameter vector with a trailing 1."""

    data: dict            #: ``Problem.get_problem_data(cvxpy.OSQP)[0]`` (public)
    n: int                #: number of variables
    total_param_size: int
    param_id_to_col: dict  #: parameter id -> first column of that parameter in ``p``
    var_id_to_col: dict    #: variable id -> first entry of that variable in the solution vector
    A: Any                #: sparse tensor: rows ``[vec(A_con); b]`` by columns of ``p``
    P: Any                #: sparse tensor of the quadratic cost (None when there is none)
    q: Any                #: sparse tensor: ``[q; constant]`` = ``q @ p``


_QP_MAP_ATTRS = ("x", "total_param_size", "param_id_to_col", "var_id_to_col", "A", "P", "q")


def cvxpy_qp_map(problem) -> CvxpyQPMap:
    """Compile a DPP *problem* for OSQP with cvxpy and return its parameter-to-data map.

    Private names: the ``ParamConeProg`` that cvxpy stores under ``cvxpy.settings.PARAM_PROB`` in the
    problem data, with its attributes ``x``, ``total_param_size``, ``param_id_to_col``,
    ``var_id_to_col`` and the tensors ``A``, ``P``, ``q``; and the sign convention of cvxpy's
    ``QpSolver.apply`` (equality rows ``A x = -b_g``, inequality rows ``F x <= b_g``).  The MPC's
    OSQP fast path (``mpcproto.control._qp.CompiledQP``) is built on them.  If cvxpy changes them,
    :class:`DependencyChangedError` names what is missing (the fast path cannot be built without
    them); a changed sign convention is caught by ``tests/test_deps.py``.
    """
    import cvxpy as cp
    import cvxpy.settings as cps

    data, _chain, _inv = problem.get_problem_data(cp.OSQP)
    pp = data.get(getattr(cps, "PARAM_PROB", "param_prob"))
    missing = [a for a in _QP_MAP_ATTRS if not hasattr(pp, a)]
    if pp is None or missing:
        raise _changed("cvxpy_qp_map", f"cvxpy's parametric problem data ({missing or 'param_prob'})",
                       "the MPC's compiled OSQP path cannot be built")
    return CvxpyQPMap(data=data, n=int(pp.x.size), total_param_size=int(pp.total_param_size),
                      param_id_to_col=pp.param_id_to_col, var_id_to_col=pp.var_id_to_col,
                      A=pp.A, P=pp.P, q=pp.q)


# ------------------------------------------------------------------ concurrent.futures and Dask
def pool_processes(executor) -> list:
    """The worker processes (``multiprocessing.Process``) of a ``ProcessPoolExecutor``, or [].

    Private name: ``ProcessPoolExecutor._processes`` (pid -> Process).  The batch runner's stop
    (Ctrl-C, SIGTERM) terminates these workers at once.  When it is missing, [] is returned: the
    public ``shutdown(wait=False, cancel_futures=True)`` still cancels the queued cases, but each
    worker then finishes the case it is running before it exits.
    """
    procs = getattr(executor, "_processes", None)
    return list(procs.values()) if isinstance(procs, dict) else []


def pool_max_workers(executor) -> int | None:
    """How many workers a ``ProcessPoolExecutor`` / ``ThreadPoolExecutor`` runs, or None.

    Private name: ``_max_workers`` of both standard-library pools.  When it is missing, None is
    returned and the batch runner sizes its in-flight window from the CPU count instead (a window
    too large or too small for the pool: more memory or idle workers, same results).
    """
    n = getattr(executor, "_max_workers", None)
    return n if isinstance(n, int) and not isinstance(n, bool) and n > 0 else None


def dask_executor_client(executor) -> Any | None:
    """The ``distributed.Client`` behind ``client.get_executor()``, or None.

    Private name: ``distributed.client.ClientExecutor._client``.  Used to count the cluster's worker
    threads; when it is missing, None is returned and the batch runner sizes its in-flight window
    from this machine's CPU count instead (same results, a window sized for the wrong machine).
    """
    return getattr(executor, "_client", None)
