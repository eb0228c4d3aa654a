"""The one executor seam of the batch runner: a local process pool or a Dask cluster.

The batch runner (:func:`mpcproto.scenario.batch.run_batch`) only ever sees a
:class:`concurrent.futures.Executor`.  This module makes one:

* :func:`local_pool` -- a :class:`~concurrent.futures.ProcessPoolExecutor` whose worker processes stay
  alive across cases (a worker pays the ``import casadi`` / ``import cvxpy`` cost once, not per case).
* :func:`dask_executor` -- connects a ``distributed.Client`` to a running scheduler and adapts it with
  ``client.get_executor(pure=False)``.  Dask is an optional extra: it is imported here, lazily, and
  a missing install raises an :class:`ImportError` that gives the install command.

Nothing in this module imports Dask at module import time.

Start method
------------
By default a worker process is a ``fork`` of the parent when the parent runs a single Python
thread (the ``mpcproto batch`` command does): the worker then starts in milliseconds and inherits
the models the parent already built while checking the scenarios.  A fork of a process that runs
other threads (a Dask client, a GUI, a test runner with a cluster) can deadlock in the child, so then
the ``"forkserver"`` method is used, with NumPy, CasADi and the package's scenario runner preloaded
in the server (``"spawn"`` where the platform has no fork server).  ``benchmarks/bench_batch.py``
measures the start-up cost of each method; on the 2-core test machine a pool of 2 workers was
ready and through its first cases in 1.3 s with ``fork``, 2.9 s with a warm fork server (8.6 s when
the server itself had to start and import everything) and 13.7 s with ``spawn``.

No orphans
----------
Every worker of :func:`local_pool` ends with the batch process that made the pool, with either start
method and even after ``kill -9`` of the batch (:func:`end_with_parent`): a cancelled CI job leaves
no process behind.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import threading
import time
from concurrent.futures import Executor, ProcessPoolExecutor
from contextlib import contextmanager
from typing import Iterator

from .._deps import dask_executor_client, pool_max_workers
from ..validation import fail, shown

__all__ = ["local_pool", "dask_executor", "executor_slots", "default_start_method", "default_workers",
           "limit_blas_threads", "end_with_parent",
           "DASK_INSTALL_HINT", "START_METHODS"]

DASK_INSTALL_HINT = 'pip install "mpcproto[dask]"'
START_METHODS = ("fork", "forkserver", "spawn")

# Modules the fork server imports once, so that workers forked from it start warm.  Missing ones
# are skipped by multiprocessing without error.
_PRELOAD = ["numpy", "casadi", "mpcproto", "mpcproto.scenario.runner"]


def _check_workers(workers: object, what: str = "workers") -> int:
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise fail("batch runner", what, "an int in the range [1, inf)", shown(workers))
    return workers


def default_workers() -> int:
    """Number of worker processes used when none is given: the CPUs this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def default_start_method() -> str:
    """``"fork"`` when it is safe (one Python thread), else ``"forkserver"`` or ``"spawn"``."""
    available = multiprocessing.get_all_start_methods()
    if "fork" in available and threading.active_count() == 1:
        return "fork"
    return "forkserver" if "forkserver" in available else "spawn"


#: Environment variables that cap the thread pools of numerical libraries loaded after they are set.
_THREAD_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
_BLAS_SETTERS = ("openblas_set_num_threads", "openblas_set_num_threads64_",
                 "scipy_openblas_set_num_threads", "scipy_openblas_set_num_threads64_")


def limit_blas_threads(n: int = 1) -> int:
    """Cap the BLAS thread pools of this process at *n* threads; return how many were capped.

    Process-parallel batches run one case per core: a BLAS library that also starts a thread per
    core in every worker oversubscribes the machine (its idle threads spin).  This sets the
    ``*_NUM_THREADS`` environment variables (for libraries loaded later) and calls
    ``openblas_set_num_threads`` (under the names NumPy's and SciPy's bundled OpenBLAS builds
    export) in every OpenBLAS library already loaded, found through ``/proc/self/maps``.  Dask's
    worker processes get the same cap from Dask itself.  Returns 0 where nothing could be set
    (another platform or BLAS).
    """
    import ctypes  # noqa: PLC0415

    for var in _THREAD_ENV:
        os.environ[var] = str(n)
    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as fh:
            paths = sorted({ln.split()[-1] for ln in fh if "openblas" in ln.lower() and ".so" in ln})
    except OSError:
        return 0
    count = 0
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for name in _BLAS_SETTERS:
            setter = getattr(lib, name, None)
            if setter is not None:
                setter(ctypes.c_int(n))
                count += 1
                break
    return count


#: Seconds between two checks of a worker's watchdog thread that its batch process is still there.
PARENT_POLL_S = 0.5
_PR_SET_PDEATHSIG = 1   # from <linux/prctl.h>


def _set_parent_death_signal(signum: int) -> bool:
    """Ask Linux to send *signum* to this process when its parent ends; False elsewhere."""
    import ctypes  # noqa: PLC0415
    import sys  # noqa: PLC0415

    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, ctypes.c_ulong(signum), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch_parent(first_ppid: int, batch_pid: int, poll_s: float) -> None:
    from ..store import pid_running  # noqa: PLC0415

    while True:
        time.sleep(poll_s)
        if os.getppid() != first_ppid or not pid_running(batch_pid):
            os._exit(1)   # the batch is gone: nothing will read this worker's result


def end_with_parent(batch_pid: int, *, poll_s: float = PARENT_POLL_S) -> None:
    """Make this worker process end soon after the batch process *batch_pid* does.

    Run at the start of every worker of :func:`local_pool` (``fork`` or ``forkserver``):

    * SIGTERM gets its default action back (a forked worker inherits the batch's SIGTERM handler);
    * on Linux, ``prctl(PR_SET_PDEATHSIG, SIGKILL)``: the kernel kills the worker when its parent
      ends, even by ``kill -9`` (with ``fork`` the parent is the batch process, more exactly the
      thread that made the first submission; with ``forkserver`` it is the fork server, which ends
      when the batch process does);
    * everywhere, a daemon thread checks every *poll_s* seconds that the parent process is the same
      and that *batch_pid* still runs, and ends the worker otherwise (covers other platforms and a
      parent that died before the signal was set).
    """
    from ..store import pid_running  # noqa: PLC0415

    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    first_ppid = os.getppid()
    _set_parent_death_signal(signal.SIGKILL)
    if first_ppid == 1 or not pid_running(batch_pid):   # the batch died before the line above
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(first_ppid, batch_pid, poll_s), daemon=True,
                     name="mpcproto-parent-watch").start()


def _worker_start(blas_threads: int | None, initializer, initargs: tuple,
                  batch_pid: int | None = None) -> None:
    if batch_pid is not None:
        end_with_parent(batch_pid)
    if blas_threads is not None:
        limit_blas_threads(blas_threads)
    if initializer is not None:
        initializer(*initargs)


def local_pool(workers: int | None = None, *, start_method: str | None = None,
               preload: list[str] | None = None, initializer=None,
               initargs: tuple = (), blas_threads: int | None = 1,
               end_with_batch: bool = True) -> ProcessPoolExecutor:
    """A process pool for a batch, workers kept alive across cases.

    Parameters
    ----------
    workers : int, optional
        Number of worker processes; default: the CPUs available to this process.
    start_method : {"fork", "forkserver", "spawn"}, optional
        How worker processes start; default: ``"fork"`` when this process runs a single Python
        thread, else ``"forkserver"`` (``"spawn"`` where neither exists); see the module docstring.
    preload : list of str, optional
        Modules a fork server imports before forking workers (only for ``"forkserver"``); default:
        numpy, casadi and the package's scenario runner.
    initializer, initargs : optional
        ``initializer(*initargs)`` runs once in every worker when it starts (for example to warm
        caches); must be picklable.
    blas_threads : int or None
        Threads each worker's BLAS may use (default 1: the pool already runs one case per core;
        see :func:`limit_blas_threads`); None leaves the libraries' defaults.
    end_with_batch : bool
        Workers end within about a second when this process ends, even by ``kill -9``
        (:func:`end_with_parent`), so a cancelled CI job leaves no orphans.  With ``"fork"`` they
        are tied to the thread that submits first: submit from a thread that outlives the pool.

    Returns
    -------
    concurrent.futures.ProcessPoolExecutor
        The caller owns it (use it as a context manager or call ``shutdown()``).
    """
    n = default_workers() if workers is None else _check_workers(workers)
    available = multiprocessing.get_all_start_methods()
    if start_method is None:
        start_method = default_start_method()
    if start_method not in START_METHODS or start_method not in available:
        raise fail("local_pool", "start_method",
                   f"one of {[m for m in START_METHODS if m in available]}", shown(start_method))
    ctx = multiprocessing.get_context(start_method)
    if start_method == "forkserver":
        ctx.set_forkserver_preload(list(_PRELOAD if preload is None else preload))
    return ProcessPoolExecutor(max_workers=n, mp_context=ctx, initializer=_worker_start,
                               initargs=(blas_threads, initializer, tuple(initargs),
                                         os.getpid() if end_with_batch else None))


def _import_distributed():
    try:
        import distributed  # noqa: PLC0415 - optional extra, imported lazily on purpose
    except ImportError as exc:  # pragma: no cover - exercised only without the extra
        raise ImportError(
            "Running a batch on a Dask cluster needs the optional Dask extra, which is not "
            f"installed. Install it with: {DASK_INSTALL_HINT}") from exc
    return distributed


@contextmanager
def dask_executor(address: str, *, timeout: float = 30.0) -> Iterator[Executor]:
    """Connect to a running Dask scheduler and yield an executor that submits to it.

    Parameters
    ----------
    address : str
        Scheduler address, e.g. ``"tcp://10.0.0.5:8786"``; an in-process ``LocalCluster``'s
        ``cluster.scheduler_address`` works too.
    timeout : float
        Seconds to wait for the connection.

    Yields
    ------
    concurrent.futures.Executor
        ``client.get_executor(pure=False)``: every submitted case runs, even when two cases
        happen to have equal arguments.  The client is closed on exit; the cluster is left running.

    Raises
    ------
    ImportError
        Dask's ``distributed`` package is not installed (the message gives the install command).
    SettingsError
        The scheduler could not be reached.
    """
    distributed = _import_distributed()
    try:
        client = distributed.Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        # the found value shows the Dask client's own reason (its exception text)
        raise fail("dask_executor", "address",
                   "the address of a running Dask scheduler such as 'tcp://host:8786' (the "
                   "'--scheduler' option)",
                   f"{address!r}, which could not be reached within {timeout:g} s: {exc}") from None
    try:
        yield client.get_executor(pure=False)
    finally:
        client.close()


def executor_slots(executor: Executor) -> int:
    """How many cases *executor* can run at once (used to size the in-flight window).

    Reads the workers of a process or thread pool and the worker threads of a Dask client's
    executor (:mod:`mpcproto._deps`); falls back to the CPUs of this machine.
    """
    n = pool_max_workers(executor)
    if n is not None:
        return n
    client = dask_executor_client(executor)
    if client is not None:
        try:
            threads = client.nthreads()
            total = sum(int(v) for v in threads.values())
            if total > 0:
                return total
        except Exception:  # noqa: BLE001 - sizing only; a failure just uses the fallback
            pass
    return default_workers()

