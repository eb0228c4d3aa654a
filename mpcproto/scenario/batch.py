"""Batch runs of many closed-loop cases: a process pool or a Dask cluster, results streamed to disk.

:func:`run_batch` takes the cases of one or more studies, runs each through a callable (by default
the package's one-case runner) on a :class:`concurrent.futures.Executor`, and appends one JSON line
per *finished* case to ``DIR/results.jsonl`` (through :mod:`mpcproto.store`): written, flushed and
``fsync``-ed before the next result is looked at, so a crash, a kill or Ctrl-C loses no finished
case.  ``resume=True`` reads that file back (a last line cut short by a kill is dropped) and runs
only the cases without a complete record of the same definition (:func:`mpcproto.store.is_complete`).

A case that raises is recorded as an error (``status: "error"`` with the exception's type and
message) and the batch goes on.  A case that kills its worker process (a crash in compiled code, out
of memory) breaks a process pool: the pool owned by the call is replaced, the cases that were in
flight are re-run one at a time, and only the one that kills a worker on its own is recorded as an
error.  Only a bounded number of cases is in flight at any time, so the
parent's memory does not grow with the size of the study.

Stopping
--------
Ctrl-C (SIGINT) and SIGTERM (what a cancelled CI job sends) stop the batch the same way: no new case
is submitted, the cases already finished are on disk, an owned pool is shut down and its workers are
ended; :func:`run_batch` then raises :class:`KeyboardInterrupt` (SIGINT) or :class:`BatchTerminated`
(SIGTERM, a subclass of it).  Workers of a local pool also end on their own within about a second
when the batch process is killed outright (see :func:`mpcproto.scenario.executors.local_pool`).
The output folder is locked for the length of the call (:func:`mpcproto.store.lock_output`).

The executor seam
-----------------
Pass ``executor=`` (any :class:`concurrent.futures.Executor`: a process pool, a thread pool for
quick checks, or ``client.get_executor(pure=False)`` of a Dask client, see
:func:`mpcproto.scenario.executors.dask_executor`) or ``workers=N`` for a local process pool owned by
the call.  The callable and the cases are pickled to the workers, so both must be picklable: a
module-level function and plain-data cases (no CasADi symbols, no solved cvxpy problems).

The ``batch`` command of the CLI (:mod:`mpcproto.cli`) wraps this function and writes the reports.
"""

from __future__ import annotations

import math
import os
import pickle
import signal
import sys
import threading
import time
import traceback
import warnings
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from concurrent.futures import FIRST_COMPLETED, Executor, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from .._deps import pool_processes
from ..validation import fail, shown
from ..store import (FINGERPRINT_KEY, ID_KEY, RESULTS_FILE, append_record, case_fingerprint,
                     case_id_of, iter_results, load_results, lock_output, repair_tail, scan_done)
from ..store import case_verdict as verdict
from .executors import executor_slots, local_pool

__all__ = ["run_batch", "BatchOutcome", "BatchTerminated", "iter_results", "load_results", "verdict",
           "case_id_of", "case_fingerprint", "RESULTS_FILE", "PROGRESS_INTERVAL_S"]

#: Seconds between two plain progress lines when stderr is not a terminal (a CI log).
PROGRESS_INTERVAL_S = 30.0


def _case_meta(case: Any) -> dict[str, Any]:
    """Plain-data fields of a case that help read an error record (scenario, params, seed)."""
    meta: dict[str, Any] = {}
    for name in ("scenario", "params", "seed"):
        v = case.get(name) if isinstance(case, Mapping) else getattr(case, name, None)
        if name == "scenario" and v is not None and not isinstance(v, (str, int, float)):
            v = getattr(v, "name", None)
        if v is not None:
            meta[name] = v
    return meta


# ------------------------------------------------------------------------------- worker-side guard
def _guarded_call(run: Callable[[Any], Mapping[str, Any]], case: Any, cid: str) -> dict[str, Any]:
    """Run one case in a worker; never raises for an ordinary exception (it becomes an error record)."""
    t0 = time.perf_counter()
    c0 = time.process_time()
    try:
        result = run(case)
        if not isinstance(result, Mapping):
            raise TypeError(f"the case runner must return a mapping (a dict); it returned a "
                            f"{type(result).__name__}")
        record = dict(result)
    except Exception as exc:  # noqa: BLE001 - a failing case is data, not a crash of the batch
        record = _error_record(cid, case, exc)
    record.setdefault(ID_KEY, cid)
    record.setdefault("elapsed_s", time.perf_counter() - t0)
    record["cpu_s"] = time.process_time() - c0   # CPU time of the worker for this case
    record.setdefault("worker_pid", os.getpid())
    return record


def _error_record(cid: str, case: Any, exc: BaseException, where: str = "") -> dict[str, Any]:
    tb = traceback.extract_tb(exc.__traceback__)
    last = tb[-1] if tb else None
    record = {ID_KEY: cid, **_case_meta(case), "status": "error",
              "message": f"{type(exc).__name__}: {exc}" + (f" ({where})" if where else ""),
              "error_type": type(exc).__name__, "passed": False}
    if last is not None:
        record["error_at"] = f"{Path(last.filename).name}:{last.lineno} in {last.name}"
    return record


# ------------------------------------------------------------------------------------ the outcome
@dataclass
class BatchOutcome:
    """What a batch did: counts, verdicts and where the results are.

    Attributes
    ----------
    out_dir, results_path : Path
        The output directory and its ``results.jsonl``.
    total : int
        Cases given (each id once).
    skipped : int
        Cases already in ``results.jsonl`` and not run again (``resume=True``).
    ran : int
        Cases run and recorded by this call.
    passed, failed, errors : int
        Verdicts over all given cases, skipped ones included (read from the file).
    wall_s : float
        Wall time of the call in seconds.
    interrupted : bool
        True when Ctrl-C or SIGTERM stopped the batch early (finished cases are on disk).
    failed_ids, error_ids : list of str
        Ids of the cases that failed a criterion / raised an error.
    changed : list of str
        With ``resume=True``: ids whose recorded result came from a different definition of the
        case (see :func:`mpcproto.store.case_fingerprint`) and that therefore ran again.
    incomplete : list of str
        With ``resume=True``: ids whose last record lacked its status, verdict or fingerprint (see
        :func:`mpcproto.store.is_complete`) and that therefore ran again.
    """

    out_dir: Path
    results_path: Path
    total: int = 0
    skipped: int = 0
    ran: int = 0
    passed: int = 0
    failed: int = 0
    errors: int = 0
    wall_s: float = 0.0
    interrupted: bool = False
    failed_ids: list[str] = field(default_factory=list)
    error_ids: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    incomplete: list[str] = field(default_factory=list)
    executor: str = ""

    @property
    def success(self) -> bool:
        """True when every case ran and passed."""
        return not self.interrupted and self.failed == 0 and self.errors == 0

    def _tally(self, cid: str, v: str) -> None:
        if v == "passed":
            self.passed += 1
        elif v == "failed":
            self.failed += 1
            self.failed_ids.append(cid)
        else:
            self.errors += 1
            self.error_ids.append(cid)


# --------------------------------------------------------------------------------------- progress
def _fmt_s(s: float) -> str:
    s = int(round(max(0.0, s)))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"


class _Progress:
    """Progress on stderr: a one-line bar on a terminal, or plain lines at a steady interval.

    The plain form (``lines=True``, for CI logs that do not understand ``\\r``) writes one line every
    *interval* seconds, whether or not a case finished meanwhile, and one at the end.
    """

    def __init__(self, total: int | None, skipped: int, stream: TextIO, *, lines: bool,
                 interval: float = PROGRESS_INTERVAL_S, width: int = 28):
        self.total = total
        self.skipped = skipped
        self.stream = stream
        self.lines = lines
        self.interval = interval
        self.width = width
        self.t0 = time.perf_counter()
        self._last = self.t0 if lines else 0.0
        self._state = (0, 0, 0)

    def due_in(self) -> float | None:
        """Seconds until the next plain line is due (None for the bar: it waits for results)."""
        if not self.lines:
            return None
        return max(0.0, self._last + self.interval - time.perf_counter())

    def tick(self) -> None:
        """Write a plain line when one is due (called when no case finished for a while)."""
        self.update(*self._state)

    def update(self, ran: int, failed: int, errors: int, *, final: bool = False) -> None:
        self._state = (ran, failed, errors)
        now = time.perf_counter()
        gap = self.interval if self.lines else 0.1
        if not final and now - self._last < gap:
            return
        self._last = now
        elapsed = now - self.t0
        done = self.skipped + ran
        eta = math.nan
        if self.total:
            eta = (elapsed / ran * (self.total - done)) if ran else math.nan
        eta_s = _fmt_s(eta) if math.isfinite(eta) else "--:--"
        if self.lines:
            of = f"{done}/{self.total} cases done" if self.total else f"{done} cases done"
            line = (f"mpcproto batch: progress {of}, {failed} failed, {errors} error"
                    f"{'' if errors == 1 else 's'}, elapsed {_fmt_s(elapsed)}, ETA {eta_s}")
            self.stream.write(line + "\n")
            self.stream.flush()
            return
        parts = []
        if self.total:
            frac = min(1.0, done / self.total)
            fill = int(round(frac * self.width))
            parts.append("[" + "#" * fill + "." * (self.width - fill) + "]")
            parts.append(f"{done}/{self.total} {100 * frac:3.0f}%")
            parts.append(f"elapsed {_fmt_s(elapsed)}")
            parts.append("ETA " + eta_s)
        else:
            parts.append(f"{done} cases  elapsed {_fmt_s(elapsed)}")
        if failed:
            parts.append(f"{failed} failed")
        if errors:
            parts.append(f"{errors} error" + ("s" if errors > 1 else ""))
        line = "batch " + "  ".join(parts)
        self.stream.write("\r" + line + "\x1b[K" + ("\n" if final else ""))
        self.stream.flush()


# ------------------------------------------------------------------------------------------ SIGTERM
class BatchTerminated(KeyboardInterrupt):
    """Raised by :func:`run_batch` after a SIGTERM, once the finished cases are on disk and an owned
    pool's workers are ended.  ``signum`` is the signal number."""

    def __init__(self, signum: int = signal.SIGTERM):
        super().__init__(signum)
        self.signum = int(signum)


class _TermGuard:
    """SIGTERM handler of a batch: ask the loop to stop; interrupt it only while it waits.

    The exception is raised from the handler only inside :meth:`waiting` (while the loop blocks on
    the executor), so a signal never cuts a record in half; elsewhere the request is noted and
    :meth:`check` raises it at the top of the next loop turn.  Installed only from the main thread.
    """

    def __init__(self) -> None:
        self.requested: int | None = None
        self.raised = False
        self.armed = False
        self.pid = os.getpid()
        self.previous: Any = None
        self.installed = False

    def install(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return
        try:
            self.previous = signal.signal(signal.SIGTERM, self._handler)
            self.installed = True
        except (ValueError, OSError):   # pragma: no cover - an embedded interpreter
            pass

    def restore(self) -> None:
        if self.installed:
            signal.signal(signal.SIGTERM, self.previous)
            self.installed = False

    def _handler(self, signum: int, frame: Any) -> None:  # noqa: ARG002
        if os.getpid() != self.pid:   # a forked worker before its start-up reset the handler
            os._exit(128 + signum)
        if self.requested is None:
            self.requested = signum
        if self.armed and not self.raised:
            self.raised = True
            raise BatchTerminated(signum)

    def check(self) -> None:
        if self.requested is not None and not self.raised:
            self.raised = True
            raise BatchTerminated(self.requested)

    def waiting(self, fs: list[Future], timeout: float | None) -> set[Future]:
        """``wait(fs, timeout, FIRST_COMPLETED)`` during which a SIGTERM interrupts at once."""
        self.armed = True
        try:
            self.check()
            finished, _ = wait(fs, timeout=timeout, return_when=FIRST_COMPLETED)
        finally:
            self.armed = False
        return finished


# ---------------------------------------------------------------------------------- the runner
def _default_run() -> Callable[[Any], Mapping[str, Any]]:
    from .runner import run_case  # noqa: PLC0415 - the scenario layer is imported on first use
    return run_case


def run_batch(cases: Iterable[Any], out_dir: str | os.PathLike, *,
              executor: Executor | None = None, workers: int | None = None,
              resume: bool = False, run: Callable[[Any], Mapping[str, Any]] | None = None,
              progress: bool | str | Callable[[int, int | None, dict], None] | None = None,
              max_in_flight: int | None = None,
              progress_interval: float = PROGRESS_INTERVAL_S) -> BatchOutcome:
    """Run many cases in parallel and stream one JSON line per finished case to ``results.jsonl``.

    Parameters
    ----------
    cases : iterable
        Picklable cases, each with a stable id (``case_id``/``id`` attribute or key).  Read lazily,
        so a generator keeps the parent's memory flat; a sized collection also gives the progress
        bar its total.  Ids must be unique.
    out_dir : path
        Output directory (created); results go to ``out_dir/results.jsonl``.  The folder is locked
        for the length of the call (:func:`mpcproto.store.lock_output`).
    executor : concurrent.futures.Executor, optional
        Where to run the cases (the caller owns it and shuts it down).  Mutually exclusive with
        *workers*.
    workers : int, optional
        Size of a local process pool owned by this call (default: the available CPUs).
    resume : bool
        Keep the complete records already in ``results.jsonl`` and run only the other cases: those
        without a record, with an incomplete one (no status, verdict or fingerprint) or with one
        of another definition of the case (:func:`mpcproto.store.case_fingerprint`).  Without it
        an existing ``results.jsonl`` is replaced.
    run : callable, optional
        ``run(case) -> dict`` executed in the workers; default
        :func:`mpcproto.scenario.runner.run_case`.  Must be picklable (a module-level function).
        The dict must hold ``status`` ("ok" when the case ran to its end) and ``passed`` (bool); a
        record without them counts as not completed / not passed.
    progress : bool, "lines" or callable, optional
        ``None`` (default): a progress bar with ETA on stderr when it is a terminal, else plain
        progress lines every *progress_interval* seconds and at the end (for CI logs);
        ``True`` forces the bar, ``"lines"`` the plain lines, ``False`` silence; a callable is
        called as ``progress(done, total, record)`` after each recorded case (and nothing is
        printed).
    max_in_flight : int, optional
        Most cases submitted but not yet recorded; default twice the executor's worker count.
    progress_interval : float
        Seconds between two plain progress lines (default :data:`PROGRESS_INTERVAL_S`).

    Returns
    -------
    BatchOutcome
        Counts and verdicts over all given cases.

    Raises
    ------
    SettingsError
        Bad arguments, or two cases with the same id.
    mpcproto.store.OutputInUseError
        Another batch is writing to *out_dir*.
    KeyboardInterrupt, BatchTerminated
        Re-raised after Ctrl-C / SIGTERM, once the finished cases are on disk and an owned pool is
        stopped.
    """
    if executor is not None and workers is not None:
        raise fail("run_batch", "workers", "either 'executor' or 'workers', not both",
                   f"executor={executor!r} and workers={workers!r}")
    if max_in_flight is not None and (isinstance(max_in_flight, bool)
                                      or not isinstance(max_in_flight, int) or max_in_flight < 1):
        raise fail("run_batch", "max_in_flight", "an int in the range [1, inf)", shown(max_in_flight))
    if (isinstance(progress_interval, bool) or not isinstance(progress_interval, (int, float))
            or not math.isfinite(progress_interval) or progress_interval <= 0):
        raise fail("run_batch", "progress_interval", "a finite number of seconds > 0",
                   shown(progress_interval))
    if isinstance(progress, str) and progress != "lines":
        raise fail("run_batch", "progress", "None, True, False, 'lines' or a callable",
                   shown(progress))
    run_fn = _default_run() if run is None else run
    out = Path(out_dir)
    with lock_output(out):
        return _run_locked(cases, out, executor=executor, workers=workers, resume=resume,
                           run_fn=run_fn, progress=progress, max_in_flight=max_in_flight,
                           progress_interval=float(progress_interval))


def _run_locked(cases: Iterable[Any], out: Path, *, executor: Executor | None,
                workers: int | None, resume: bool, run_fn: Callable[[Any], Mapping[str, Any]],
                progress: Any, max_in_flight: int | None,
                progress_interval: float) -> BatchOutcome:
    t_start = time.perf_counter()
    path = out / RESULTS_FILE

    done: dict[str, dict[str, Any]] = {}
    if resume and path.exists():
        removed = repair_tail(path)
        if removed:
            warnings.warn(f"{path}: dropped a partial last line ({removed} bytes) left by an "
                          "interrupted writer; that case runs again", RuntimeWarning, stacklevel=3)
        done = scan_done(path)
    elif path.exists():
        path.unlink()

    total = len(cases) if hasattr(cases, "__len__") else None  # type: ignore[arg-type]
    outcome = BatchOutcome(out_dir=out, results_path=path, total=0)

    own = executor is None
    if own or isinstance(executor, ProcessPoolExecutor):
        try:   # fail now, not once per case in the workers
            pickle.dumps(run_fn)
        except Exception as exc:  # noqa: BLE001 - pickling raises many types
            raise fail("run_batch", "run",
                       "a picklable callable, to reach the worker processes (a function defined "
                       "at module level, not a lambda or a local function)",
                       f"{run_fn!r}, which does not pickle: {exc}") from None
    guard = _TermGuard()
    guard.install()   # before the pool: forked workers reset it when they start
    ex = local_pool(workers) if own else executor
    outcome.executor = type(ex).__name__
    window = max_in_flight or 2 * executor_slots(ex)

    callback = progress if callable(progress) else None
    show = progress is True or progress == "lines" or progress is None
    as_lines = progress == "lines" or (progress is None and not sys.stderr.isatty())
    bar: _Progress | None = None

    seen: set[str] = set()
    pending: dict[Future, tuple[str, Any, bool, str]] = {}
    case_iter = iter(cases)
    exhausted = False

    def record(rec: dict[str, Any], fh) -> None:
        cid = str(rec[ID_KEY])
        append_record(fh, rec)
        outcome.ran += 1
        outcome._tally(cid, verdict(rec))
        if bar is not None:
            bar.update(outcome.ran, outcome.failed, outcome.errors)
        if callback is not None:
            callback(outcome.skipped + outcome.ran, total, rec)

    suspects: deque[tuple[str, Any, str]] = deque()   # cases in flight when a worker process died

    def collect(fut: Future, fh) -> bool:
        """Record a finished future; return True when its worker process died under it."""
        cid, case, alone, fp = pending.pop(fut)
        if fut.cancelled():
            rec = _error_record(cid, case, RuntimeError("the executor cancelled this case"))
            rec[FINGERPRINT_KEY] = fp
            record(rec, fh)
            return False
        exc = fut.exception()
        if exc is None:
            rec = fut.result()
        elif isinstance(exc, BrokenProcessPool) and own:
            if not alone:   # maybe a bystander: run it again, on its own, in a fresh pool
                suspects.append((cid, case, fp))
                return True
            rec = _error_record(cid, case, exc, "the worker process died while running this "
                                "case alone (a crash in compiled code, or out of memory)")
        elif isinstance(exc, Exception):  # e.g. unpicklable case, dead cluster worker
            rec = _error_record(cid, case, exc, "raised outside the case runner")
        else:  # KeyboardInterrupt/SystemExit in a worker: not a verdict, leave it for --resume
            raise KeyboardInterrupt
        rec[FINGERPRINT_KEY] = fp
        record(rec, fh)
        return isinstance(exc, BrokenProcessPool)

    pool_broken = [False]   # the owned pool broke before a finished future told us

    def submit(cid: str, case: Any, alone: bool, fp: str) -> None:
        try:
            pending[ex.submit(_guarded_call, run_fn, case, cid)] = (cid, case, alone, fp)
        except BrokenProcessPool:
            if not own:
                raise
            # a worker died between two submissions: this case never started; run it (on its
            # own, like the other cases that were about) once the pool has been replaced
            suspects.append((cid, case, fp))
            pool_broken[0] = True

    try:
        with path.open("a", encoding="utf-8") as fh:
            try:
                while True:
                    guard.check()   # a SIGTERM that came while a record was being written
                    if pool_broken[0] and not pending:
                        ex.shutdown(wait=False, cancel_futures=True)
                        ex = local_pool(workers)
                        pool_broken[0] = False
                    if suspects:
                        # after a worker died: re-run each case that was in flight on its own,
                        # so that a crash is pinned on the case that causes it
                        if not pending:
                            cid, case, fp = suspects.popleft()
                            submit(cid, case, True, fp)
                    while not suspects and not exhausted and len(pending) < window:
                        try:
                            case = next(case_iter)
                        except StopIteration:
                            exhausted = True
                            break
                        cid = case_id_of(case)
                        if cid in seen:
                            raise fail("run_batch", "cases", "unique case ids",
                                       f"two batch cases that share the id {cid!r}",
                                       "give each scenario a distinct name")
                        seen.add(cid)
                        outcome.total += 1
                        fp = case_fingerprint(case)
                        if cid in done:
                            was = done[cid]
                            if was["missing"] or was["fingerprint"] is None:
                                outcome.incomplete.append(cid)   # never judged: run it again
                            elif was["fingerprint"] == fp:
                                outcome.skipped += 1
                                outcome._tally(cid, was["verdict"])
                                continue
                            else:
                                outcome.changed.append(cid)   # edited since it ran: run it again
                        if bar is None and show:
                            bar = _Progress(total, outcome.skipped, sys.stderr, lines=as_lines,
                                            interval=progress_interval)
                        submit(cid, case, False, fp)
                    if not pending:
                        if suspects:
                            continue
                        break
                    finished = guard.waiting(list(pending),
                                             None if bar is None else bar.due_in())
                    if not finished and bar is not None:
                        bar.tick()
                    broken = False
                    for fut in finished:
                        broken |= collect(fut, fh)
                    if (broken or pool_broken[0]) and own:
                        # a dead worker breaks the whole pool: the other futures fail too
                        for fut in list(pending):
                            wait([fut])
                            collect(fut, fh)
                        ex.shutdown(wait=False, cancel_futures=True)
                        ex = local_pool(workers)
                        pool_broken[0] = False
            except KeyboardInterrupt:
                outcome.interrupted = True
                for fut in list(pending):  # keep whatever finished before the interrupt
                    if fut.done() and not fut.cancelled() and fut.exception() is None:
                        collect(fut, fh)
                    else:
                        fut.cancel()
                raise
    finally:
        try:
            if own:
                if outcome.interrupted:
                    _stop_pool(ex)
                else:
                    ex.shutdown(wait=True)
        finally:
            guard.restore()
        outcome.wall_s = time.perf_counter() - t_start
        if bar is not None:
            bar.update(outcome.ran, outcome.failed, outcome.errors, final=True)
    return outcome


def _stop_pool(ex: Executor, grace_s: float = 3.0) -> None:
    """Stop an owned process pool now (Ctrl-C, SIGTERM): cancel queued cases, end its workers.

    Each worker gets SIGTERM, then SIGKILL if it is still there after *grace_s* seconds.
    """
    procs = pool_processes(ex)
    ex.shutdown(wait=False, cancel_futures=True)
    for p in procs:
        try:
            p.terminate()
        except Exception:  # noqa: BLE001 - already gone
            pass
    deadline = time.monotonic() + grace_s
    for p in procs:
        try:
            p.join(max(0.0, deadline - time.monotonic()))
            if p.is_alive():
                p.kill()
                p.join(1.0)
        except Exception:  # noqa: BLE001 - already gone or reaped by the pool
            pass
