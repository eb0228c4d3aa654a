"""Batch runs of many closed-loop cases: a process pool or a Dask cluster, results streamed to disk.

:func:`run_batch` takes the cases of one or more studies, runs each through a callable (by default
the package's one-case runner) on a :class:`concurrent.futures.Executor`, and appends one JSON line
per *finished* case to ``DIR/results.jsonl``: written, flushed and ``fsync``-ed before the next result
is looked at, so a crash, a kill or Ctrl-C loses no finished case.  ``resume=True`` reads that file
back (a last line cut short by a kill is dropped) and runs only the cases whose ids are missing.

A case that raises is recorded as an error (``status: "error"`` with the exception's type and
message) and the batch goes on.  A case that kills its worker process (a crash in compiled code, out
of memory) breaks a process pool: the pool owned by the call is replaced, the cases that were in
flight are re-run one at a time, and only the one that kills a worker on its own is recorded as an
error.  Only a bounded number of cases is in flight at any time, so the
parent's memory does not grow with the size of the study.

The executor seam
-----------------
Pass ``executor=`` (any :class:`concurrent.futures.Executor`: a process pool, a thread pool for
quick checks, or ``client.get_executor(pure=False)`` of a Dask client, see
:func:`mpcproto.scenario.executors.dask_executor`) or ``workers=N`` for a local process pool owned by
the call.  The callable and the cases are pickled to the workers, so both must be picklable: a
module-level function and plain-data cases (no CasADi symbols, no solved cvxpy problems).

The ``batch`` command of the CLI (:func:`register_cli`) wraps this function and writes the reports:
``summary.csv``, ``report.html``, an optional JUnit XML file and an optional baseline comparison.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import pickle
import sys
import time
import traceback
import warnings
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Mapping
from concurrent.futures import FIRST_COMPLETED, Executor, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from ..exceptions import SettingsError
from ..report.summary import case_verdict as verdict
from .executors import default_workers, executor_slots, local_pool

__all__ = ["run_batch", "BatchOutcome", "iter_results", "load_results", "verdict", "case_id_of",
           "case_fingerprint",
           "RESULTS_FILE", "register_cli"]

RESULTS_FILE = "results.jsonl"

#: Key of the case id in every result record.
ID_KEY = "case_id"
#: Key of the case fingerprint (see :func:`case_fingerprint`).
FINGERPRINT_KEY = "case_fingerprint"


# ------------------------------------------------------------------------------------- case identity
def case_id_of(case: Any) -> str:
    """The stable id of a case: its ``case_id`` or ``id`` attribute, or that key of a mapping."""
    for name in (ID_KEY, "id"):
        if isinstance(case, Mapping):
            if name in case:
                return str(case[name])
        elif hasattr(case, name):
            return str(getattr(case, name))
    raise SettingsError(
        f"A batch case must carry a stable id (an attribute or key 'case_id' or 'id'). "
        f"Got a {type(case).__name__} without one.")


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


# ------------------------------------------------------------------------------------- JSON lines
def _plain(value: Any) -> Any:
    """Make a result JSON-able: numpy scalars/arrays to Python, non-finite floats to None."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (str, int, bool)) or value is None:
        return value
    tolist = getattr(value, "tolist", None)  # numpy scalar or array
    if callable(tolist):
        return _plain(tolist())
    return str(value)


def _dumps(record: Mapping[str, Any]) -> str:
    try:
        return json.dumps(record, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError):
        return json.dumps(_plain(record), allow_nan=False, separators=(",", ":"))


def iter_results(path: str | os.PathLike) -> Iterator[dict[str, Any]]:
    """Yield the records of a ``results.jsonl`` file one at a time (constant memory).

    A line that does not parse (the last line of a file whose writer was killed mid-line) is
    skipped; a bad line elsewhere is skipped with a warning that names the file and line.
    """
    path = Path(path)
    with path.open("rb") as fh:
        lines = iter(fh)
        lineno = 0
        prev: bytes | None = None
        for raw in lines:
            lineno += 1
            if prev is not None:
                rec = _parse_line(prev, path, lineno - 1, last=False)
                if rec is not None:
                    yield rec
            prev = raw
        if prev is not None:
            rec = _parse_line(prev, path, lineno, last=True)
            if rec is not None:
                yield rec


def _parse_line(raw: bytes, path: Path, lineno: int, *, last: bool) -> dict[str, Any] | None:
    text = raw.strip()
    if not text:
        return None
    try:
        rec = json.loads(text)
    except (ValueError, UnicodeDecodeError):
        if not (last and not raw.endswith(b"\n")):
            warnings.warn(f"{path}: line {lineno} is not a JSON record; it was skipped",
                          RuntimeWarning, stacklevel=3)
        return None
    if not isinstance(rec, dict) or ID_KEY not in rec:
        warnings.warn(f"{path}: line {lineno} has no '{ID_KEY}'; it was skipped",
                      RuntimeWarning, stacklevel=3)
        return None
    return rec


def load_results(path: str | os.PathLike, ids: Iterable[str] | None = None) -> list[dict[str, Any]]:
    """All records of a ``results.jsonl`` file, the last one per case id, optionally only *ids*.

    Records keep the order in which their cases finished.
    """
    wanted = None if ids is None else set(ids)
    latest: dict[str, dict[str, Any]] = {}
    for rec in iter_results(path):
        cid = str(rec[ID_KEY])
        if wanted is None or cid in wanted:
            latest.pop(cid, None)
            latest[cid] = rec
    return list(latest.values())


def _repair_tail(path: Path) -> int:
    """Cut a partial last line (a writer killed mid-line) off *path*; return the bytes removed."""
    size = path.stat().st_size
    if size == 0:
        return 0
    with path.open("rb+") as fh:
        fh.seek(size - 1)
        if fh.read(1) == b"\n":
            return 0
        # walk back to the last newline
        pos, block = size, 4096
        keep = 0
        while pos > 0:
            start = max(0, pos - block)
            fh.seek(start)
            chunk = fh.read(pos - start)
            i = chunk.rfind(b"\n")
            if i >= 0:
                keep = start + i + 1
                break
            pos = start
        fh.truncate(keep)
        fh.flush()
        os.fsync(fh.fileno())
        return size - keep


def _scan_done(path: Path) -> dict[str, tuple[str, str | None]]:
    """Case id -> (verdict, fingerprint) of every complete record in *path* (the last per id wins)."""
    done: dict[str, tuple[str, str | None]] = {}
    for rec in iter_results(path):
        done[str(rec[ID_KEY])] = (verdict(rec), rec.get(FINGERPRINT_KEY))
    return done


def case_fingerprint(case: Any) -> str:
    """A short hash of everything that defines a case (its fields, scenario data, parameters, seed).

    Stored in each record; on resume a case whose fingerprint changed (the scenario file was edited
    but the ids stayed) runs again instead of keeping a stale result.
    """
    try:
        if dataclasses.is_dataclass(case) and not isinstance(case, type):
            data: Any = dataclasses.asdict(case)
        elif isinstance(case, Mapping):
            data = dict(case)
        else:
            data = vars(case)
        text = json.dumps(data, sort_keys=True, default=repr)
    except (TypeError, ValueError):
        text = repr(case)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


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
        True when Ctrl-C stopped the batch early (finished cases are on disk).
    failed_ids, error_ids : list of str
        Ids of the cases that failed a criterion / raised an error.
    changed : list of str
        With ``resume=True``: ids whose recorded result came from a different definition of the
        case (see :func:`case_fingerprint`) and that therefore ran again.
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


class _ProgressBar:
    """A one-line progress bar with ETA written to a terminal (no dependency)."""

    def __init__(self, total: int | None, skipped: int, stream: TextIO, width: int = 28):
        self.total = total
        self.skipped = skipped
        self.stream = stream
        self.width = width
        self.t0 = time.perf_counter()
        self._last = 0.0

    def update(self, ran: int, failed: int, errors: int, *, final: bool = False) -> None:
        now = time.perf_counter()
        if not final and now - self._last < 0.1:
            return
        self._last = now
        elapsed = now - self.t0
        done = self.skipped + ran
        parts = []
        if self.total:
            frac = min(1.0, done / self.total)
            fill = int(round(frac * self.width))
            parts.append("[" + "#" * fill + "." * (self.width - fill) + "]")
            parts.append(f"{done}/{self.total} {100 * frac:3.0f}%")
            remaining = self.total - done
            eta = (elapsed / ran * remaining) if ran else float("nan")
            parts.append(f"elapsed {_fmt_s(elapsed)}")
            parts.append("ETA " + (_fmt_s(eta) if math.isfinite(eta) else "--:--"))
        else:
            parts.append(f"{done} cases  elapsed {_fmt_s(elapsed)}")
        if failed:
            parts.append(f"{failed} failed")
        if errors:
            parts.append(f"{errors} error" + ("s" if errors > 1 else ""))
        line = "batch " + "  ".join(parts)
        self.stream.write("\r" + line + "\x1b[K" + ("\n" if final else ""))
        self.stream.flush()


# ---------------------------------------------------------------------------------- the runner
def _default_run() -> Callable[[Any], Mapping[str, Any]]:
    from .runner import run_case  # noqa: PLC0415 - the scenario layer is imported on first use
    return run_case


def run_batch(cases: Iterable[Any], out_dir: str | os.PathLike, *,
              executor: Executor | None = None, workers: int | None = None,
              resume: bool = False, run: Callable[[Any], Mapping[str, Any]] | None = None,
              progress: bool | Callable[[int, int | None, dict], None] | None = None,
              max_in_flight: int | None = None) -> BatchOutcome:
    """Run many cases in parallel and stream one JSON line per finished case to ``results.jsonl``.

    Parameters
    ----------
    cases : iterable
        Picklable cases, each with a stable id (``case_id``/``id`` attribute or key).  Read lazily,
        so a generator keeps the parent's memory flat; a sized collection also gives the progress
        bar its total.  Ids must be unique.
    out_dir : path
        Output directory (created); results go to ``out_dir/results.jsonl``.
    executor : concurrent.futures.Executor, optional
        Where to run the cases (the caller owns it and shuts it down).  Mutually exclusive with
        *workers*.
    workers : int, optional
        Size of a local process pool owned by this call (default: the available CPUs).
    resume : bool
        Keep the records already in ``results.jsonl`` and run only the cases whose ids are missing
        (or whose definition changed since their record was written: :func:`case_fingerprint`).
        Without it an existing ``results.jsonl`` is replaced.
    run : callable, optional
        ``run(case) -> dict`` executed in the workers; default
        :func:`mpcproto.scenario.runner.run_case`.  Must be picklable (a module-level function).
    progress : bool or callable, optional
        ``None`` (default): a progress bar with ETA on stderr when it is a terminal, quiet
        otherwise; ``True``/``False`` force it on/off; a callable is called as
        ``progress(done, total, record)`` after each recorded case.
    max_in_flight : int, optional
        Most cases submitted but not yet recorded; default twice the executor's worker count.

    Returns
    -------
    BatchOutcome
        Counts and verdicts over all given cases.

    Raises
    ------
    SettingsError
        Bad arguments, or two cases with the same id.
    KeyboardInterrupt
        Re-raised after Ctrl-C, once the finished cases are on disk and an owned pool is stopped.
    """
    if executor is not None and workers is not None:
        raise SettingsError("run_batch takes either 'executor' or 'workers', not both. "
                            f"Got executor={executor!r} and workers={workers!r}.")
    if max_in_flight is not None and (isinstance(max_in_flight, bool)
                                      or not isinstance(max_in_flight, int) or max_in_flight < 1):
        raise SettingsError("The 'max_in_flight' argument of run_batch must be an int in the range "
                            f"[1, inf). Got {max_in_flight!r} instead.")
    run_fn = _default_run() if run is None else run
    t_start = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / RESULTS_FILE

    done: dict[str, tuple[str, str | None]] = {}
    if resume and path.exists():
        removed = _repair_tail(path)
        if removed:
            warnings.warn(f"{path}: dropped a partial last line ({removed} bytes) left by an "
                          "interrupted writer; that case runs again", RuntimeWarning, stacklevel=2)
        done = _scan_done(path)
    elif path.exists():
        path.unlink()

    total = len(cases) if hasattr(cases, "__len__") else None  # type: ignore[arg-type]
    outcome = BatchOutcome(out_dir=out, results_path=path, total=0)

    own = executor is None
    if own or isinstance(executor, ProcessPoolExecutor):
        try:   # fail now, not once per case in the workers
            pickle.dumps(run_fn)
        except Exception as exc:  # noqa: BLE001 - pickling raises many types
            raise SettingsError(
                f"The 'run' callable of run_batch must be picklable to reach the worker processes "
                f"(a function defined at module level, not a lambda or a local function). Got "
                f"{run_fn!r}, which does not pickle: {exc}.") from None
    ex = local_pool(workers) if own else executor
    outcome.executor = type(ex).__name__
    window = max_in_flight or 2 * executor_slots(ex)

    callback = progress if callable(progress) else None
    show_bar = (progress is True) or (progress is None and sys.stderr.isatty())
    bar: _ProgressBar | None = None

    seen: set[str] = set()
    pending: dict[Future, tuple[str, Any, bool, str]] = {}
    case_iter = iter(cases)
    exhausted = False

    def record(rec: dict[str, Any], fh) -> None:
        cid = str(rec[ID_KEY])
        fh.write(_dumps(rec) + "\n")
        fh.flush()
        os.fsync(fh.fileno())
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
                            raise SettingsError(
                                f"Two batch cases share the id {cid!r}; case ids must be unique "
                                "(give each scenario a distinct name).")
                        seen.add(cid)
                        outcome.total += 1
                        fp = case_fingerprint(case)
                        if cid in done:
                            was, old_fp = done[cid]
                            if old_fp is None or old_fp == fp:
                                outcome.skipped += 1
                                outcome._tally(cid, was)
                                continue
                            outcome.changed.append(cid)   # edited since it ran: run it again
                        if bar is None and show_bar:
                            bar = _ProgressBar(total, outcome.skipped, sys.stderr)
                        submit(cid, case, False, fp)
                    if not pending:
                        if suspects:
                            continue
                        break
                    finished, _ = wait(list(pending), return_when=FIRST_COMPLETED)
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
        if own:
            if outcome.interrupted:
                _stop_pool(ex)
            else:
                ex.shutdown(wait=True)
        outcome.wall_s = time.perf_counter() - t_start
        if bar is not None:
            bar.update(outcome.ran, outcome.failed, outcome.errors, final=True)
    return outcome


def _stop_pool(ex: Executor) -> None:
    """Stop an owned process pool now (Ctrl-C): cancel queued cases, end its worker processes."""
    procs = list((getattr(ex, "_processes", None) or {}).values())
    ex.shutdown(wait=False, cancel_futures=True)
    for p in procs:
        try:
            p.terminate()
        except Exception:  # noqa: BLE001 - already gone
            pass


# ------------------------------------------------------------------------------------------ CLI
EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


def register_cli(subparsers) -> None:
    """Add the ``batch`` sub-command to the ``mpcproto`` argument parser.

    Parameters
    ----------
    subparsers
        The object returned by ``ArgumentParser.add_subparsers()``.
    """
    b = subparsers.add_parser(
        "batch", help="run every case of one or more studies in parallel, with CI verdicts",
        description="Run every case (sweeps x Monte Carlo draws) of the given scenario files on a "
                    "local process pool or a Dask cluster. One JSON line per finished case is "
                    "appended to DIR/results.jsonl; DIR/summary.csv and DIR/report.html are written "
                    "at the end. Exit code 0: every case passed; 1: a criterion failed, a case did "
                    "not complete or a KPI got worse than the baseline; 2: bad input. Simulation "
                    "only: a real plant needs its own independent safety systems, management of "
                    "change, local codes and licensed engineers.")
    b.add_argument("paths", nargs="+", metavar="PATH",
                   help="scenario files (.toml) or directories of them")
    b.add_argument("--out", required=True, metavar="DIR", help="output directory (created)")
    where = b.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="worker processes of the local pool (default: the available CPUs)")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run on a running Dask scheduler, e.g. tcp://host:8786 (needs the "
                            "optional extra: pip install \"mpcproto[dask]\")")
    b.add_argument("--resume", action="store_true",
                   help="keep DIR/results.jsonl and run only the cases missing from it")
    b.add_argument("--full", action="store_true",
                   help="use the studies' full Monte Carlo sizes and sweep values (default: the "
                        "CI-sized study)")
    b.add_argument("--junit", default=None, metavar="FILE",
                   help="also write JUnit XML: one test case per case and criterion")
    b.add_argument("--baseline", default=None, metavar="RESULTS.jsonl",
                   help="compare with an earlier run's results.jsonl; KPIs worse beyond the "
                        "tolerance fail the batch")
    b.add_argument("--tolerance", type=float, default=0.05, metavar="REL",
                   help="relative tolerance of the baseline comparison (default 0.05 = 5 %%)")
    b.add_argument("--abs-tolerance", type=float, default=1e-9, metavar="ABS",
                   help="absolute tolerance of the baseline comparison, in each KPI's unit "
                        "(default 1e-9)")
    b.add_argument("--no-trajectories", action="store_true",
                   help="do not re-run the worst cases for the report's trajectory plots (by "
                        "default the worst case of each scenario with a failed case, at most 3, "
                        "or the case closest to a limit when all passed)")
    b.set_defaults(handler=_cmd_batch)


def _scenario_files(paths: Iterable[str]) -> list[Path]:
    from ..exceptions import ScenarioError  # noqa: PLC0415

    files: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            found = sorted(p.glob("*.toml"))
            if not found:
                raise ScenarioError("expected a scenario file (.toml) or a directory holding some; "
                                    "found a directory with no .toml file.", file=str(p))
            files.extend(found)
        elif p.is_file():
            files.append(p)
        else:
            raise ScenarioError("expected a scenario file (.toml) or a directory of them; found no "
                                "such file or directory.", file=str(p))
    unique: list[Path] = []
    for f in files:
        if f.resolve() not in {u.resolve() for u in unique}:
            unique.append(f)
    return unique


def _load_cases(files: list[Path], full: bool) -> tuple[list[Any], dict[str, Any]]:
    from ..exceptions import ScenarioError  # noqa: PLC0415
    from . import check_scenario, expand, load_scenario  # noqa: PLC0415

    cases: list[Any] = []
    owner: dict[str, str] = {}
    scenarios: dict[str, Any] = {}
    for f in files:
        scn = load_scenario(f)
        check_scenario(scn, build_controllers=True)
        for c in expand(scn, full=full):
            if c.case_id in owner:
                raise ScenarioError(
                    f"case id {c.case_id!r} also comes from {owner[c.case_id]}; case ids must be "
                    "unique across a batch: give the scenarios distinct names "
                    "([scenario] name = ...).", file=str(f), key="scenario.name")
            owner[c.case_id] = str(f)
            cases.append(c)
        scenarios[scn.name] = scn
    return cases, scenarios


def _worst_case_images(records: list[dict[str, Any]], cases: list[Any], limit: int = 3
                       ) -> list[tuple[str, bytes]]:
    """Re-run (same seed, same numbers) and plot the worst case of each scenario with a failed case
    (at most *limit*), or the case closest to a limit when every case passed."""
    import tempfile  # noqa: PLC0415

    from ..report.html import sort_worst_first  # noqa: PLC0415

    try:
        from ..report import plots  # noqa: PLC0415
        from .runner import _run  # noqa: PLC0415 - the runner's (record, trajectories) form
    except ImportError:
        return []
    by_id = {case_id_of(c): c for c in cases}
    picked: dict[str, dict[str, Any]] = {}
    ranked = [r for r in sort_worst_first(records)
              if verdict(r) != "error" and r.get("case_id") in by_id]
    for rec in ranked:   # the worst case of every scenario with a failed case ...
        scen = str(rec.get("scenario", ""))
        if verdict(rec) == "failed" and scen not in picked:
            picked[scen] = rec
    if not picked and ranked:   # ... or, when all passed, the one closest to a limit
        picked[str(ranked[0].get("scenario", ""))] = ranked[0]
    images: list[tuple[str, bytes]] = []
    with tempfile.TemporaryDirectory() as tmp:
        for scen, rec in list(picked.items())[:limit]:
            cid = rec["case_id"]
            try:
                _, trajs = _run(by_id[cid])
                if not trajs:
                    continue
                stem = Path(tmp) / f"{len(images)}"
                plots.plot_cvs(dict(trajs), f"{stem}_cvs.png", title=f"{scen}: {cid}")
                plots.plot_mvs(dict(trajs), f"{stem}_mvs.png", title=f"{scen}: {cid}")
                what = f"{scen}: the case closest to (or beyond) a limit, {cid} ({verdict(rec)})"
                images.append((what + ": CVs", Path(f"{stem}_cvs.png").read_bytes()))
                images.append((what + ": MVs", Path(f"{stem}_mvs.png").read_bytes()))
            except Exception as exc:  # noqa: BLE001 - a figure must not sink the report
                warnings.warn(f"no trajectory plot for case {cid}: {type(exc).__name__}: {exc}",
                              RuntimeWarning, stacklevel=2)
    return images


def _cmd_batch(args) -> int:
    """Handler of ``mpcproto batch`` (exit codes: 0 pass, 1 fail/error/regression, 2 bad input)."""
    from ..exceptions import ScenarioError  # noqa: PLC0415
    from ..report.baseline import compare_with_baseline  # noqa: PLC0415
    from ..report.html import write_html_report  # noqa: PLC0415
    from ..report.junit import write_junit  # noqa: PLC0415
    from ..report.summary import write_summary_csv  # noqa: PLC0415
    from .executors import dask_executor  # noqa: PLC0415

    if args.workers is not None and args.workers < 1:
        raise SettingsError(f"The '--workers' option must be an int in the range [1, inf). "
                            f"Got {args.workers} instead.")
    for opt in ("tolerance", "abs_tolerance"):
        v = getattr(args, opt)
        if not (math.isfinite(v) and v >= 0):
            raise SettingsError(f"The '--{opt.replace('_', '-')}' option must be a finite number "
                                f">= 0. Got {v} instead.")
    if args.baseline is not None and not Path(args.baseline).is_file():
        raise ScenarioError("expected the results.jsonl of an earlier batch (--baseline); found no "
                            "such file.", file=args.baseline)
    if args.baseline is not None:
        # a wrong file given as the baseline would otherwise compare nothing and pass
        with warnings.catch_warnings(record=True) as skipped:
            warnings.simplefilter("always")
            n_base = len(load_results(args.baseline))
        if n_base == 0:
            raise ScenarioError(
                "expected the results.jsonl of an earlier batch (--baseline): one JSON record with "
                f"a '{ID_KEY}' per line; found no such record ({len(skipped)} line(s) skipped).",
                file=args.baseline)
    files = _scenario_files(args.paths)
    cases, _ = _load_cases(files, args.full)
    ids = [case_id_of(c) for c in cases]
    out_dir = Path(args.out)
    print(f"mpcproto batch: {len(cases)} cases from {len(files)} scenario file(s) -> {out_dir}",
          file=sys.stderr)
    try:
        if args.scheduler:
            try:
                dask_cm = dask_executor(args.scheduler)
                ex = dask_cm.__enter__()
            except ImportError as exc:
                print(f"mpcproto batch: error: {exc}", file=sys.stderr)
                return EXIT_BAD_INPUT
            try:
                outcome = run_batch(cases, out_dir, executor=ex, resume=args.resume)
            finally:
                dask_cm.__exit__(None, None, None)
            where = f"Dask scheduler {args.scheduler}"
        else:
            outcome = run_batch(cases, out_dir, workers=args.workers, resume=args.resume)
            where = f"{args.workers or default_workers()} local worker process(es)"
    except KeyboardInterrupt:
        done = sum(1 for _ in iter_results(out_dir / RESULTS_FILE)) \
            if (out_dir / RESULTS_FILE).exists() else 0
        print(f"\nmpcproto batch: interrupted; {done} finished case(s) are kept in "
              f"{out_dir / RESULTS_FILE}. Run the same command with --resume to finish the rest.",
              file=sys.stderr)
        return EXIT_INTERRUPTED

    order = {cid: i for i, cid in enumerate(ids)}
    records = sorted(load_results(outcome.results_path, ids), key=lambda r: order[r["case_id"]])
    write_summary_csv(records, out_dir / "summary.csv")   # rows in case order, stable for diffs
    comparison = None
    if args.baseline:
        comparison = compare_with_baseline(records, args.baseline, rtol=args.tolerance,
                                           atol=args.abs_tolerance)
        comparison.baseline_file = str(args.baseline)
        if comparison.cases_compared == 0:
            print(f"mpcproto batch: warning: the baseline {args.baseline} has none of these cases' "
                  f"ids; nothing was compared with it.", file=sys.stderr)
    if args.junit:
        write_junit(records, args.junit, baseline=comparison)
    images = [] if args.no_trajectories else _worst_case_images(records, cases)
    info = {"run on": where, "wall time": f"{outcome.wall_s:.1f} s"}
    if outcome.skipped:
        info["resumed"] = f"{outcome.skipped} case(s) kept from an earlier run"
    title = "Closed-loop study: " + ", ".join(sorted({str(r.get("scenario")) for r in records}))
    write_html_report(records, out_dir / "report.html", title=title, run_info=info,
                      baseline=comparison, images=images)

    n_reg = len(comparison.regressions) if comparison else 0
    print(f"{outcome.passed} passed, {outcome.failed} failed a criterion, {outcome.errors} did not "
          f"complete" + (f", {n_reg} KPI(s) worse than the baseline" if comparison else "")
          + f" ({outcome.total} cases, {outcome.ran} run now, {outcome.wall_s:.1f} s)")
    if outcome.changed:
        print(f"  {len(outcome.changed)} case(s) had changed since their results were recorded and "
              f"ran again (e.g. {outcome.changed[0]})")
    for cid in outcome.error_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        print(f"  error  {cid}: {rec.get('message', '')}")
    from ..report.summary import criteria_of  # noqa: PLC0415

    for cid in outcome.failed_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        failed = [f"{label + ': ' if label else ''}{cr.get('name')}" for label, cr in criteria_of(rec)
                  if cr.get("passed") is False]
        print(f"  FAIL   {cid}" + (f": {', '.join(failed[:4])}" + (", ..." if len(failed) > 4 else "")
                                   if failed else ""))
    if comparison:
        for r in comparison.regressions[:10]:
            print(f"  WORSE  {r.describe()}")
    print(f"results: {outcome.results_path}  summary: {out_dir / 'summary.csv'}  "
          f"report: {out_dir / 'report.html'}" + (f"  junit: {args.junit}" if args.junit else ""))
    from ..report.html import SAFETY_CAUTION  # noqa: PLC0415
    print(SAFETY_CAUTION)
    return EXIT_OK if (outcome.success and n_reg == 0) else EXIT_FAILED
