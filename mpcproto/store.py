"""The results store of a batch: ``results.jsonl``, case verdicts and the lock of an output folder.

Both the batch engine (:mod:`mpcproto.scenario.batch`) and the report writers
(:mod:`mpcproto.report`) read and write results through this module; it imports neither of them
(only the standard library and :mod:`mpcproto.exceptions`).

Records
-------
One JSON object per line, one line per finished case, appended, flushed and ``fsync``-ed.  A record
*counts* (is complete) only when it carries

* ``case_id``,
* ``status`` (a string: ``"ok"`` when the case ran to its end, anything else when it did not),
* ``passed`` (a boolean: the case's verdict over its criteria),
* ``case_fingerprint`` (:func:`case_fingerprint` of the case that produced it).

``--resume`` runs a case again when its last record is not complete or its fingerprint differs
from the case's (the scenario was edited, the ids stayed).  Every report reads a missing ``status``
as "did not complete" and a missing ``passed`` as "failed" (:func:`case_verdict`): a missing input is
never a pass.

Output lock
-----------
:func:`lock_output` holds an exclusive :func:`fcntl.flock` on ``DIR/batch.lock`` for the length of a
batch, with the holder's pid, host and start time written in it.  A second batch on the same folder
is refused at once with :class:`OutputInUseError` naming that run.  The kernel drops the lock when its
holder dies (even by ``kill -9``) and its workers have ended (a forked worker shares the lock; it
ends within about a second of the batch); the next batch then finds the dead run's details in the
file and takes the folder over with a warning, waiting up to :data:`STALE_WAIT_S` seconds for those
workers when the holder's pid is already gone.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import socket
import threading
import time
import warnings
from collections.abc import Iterable, Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

from .exceptions import SettingsError

__all__ = ["RESULTS_FILE", "LOCK_FILE", "ID_KEY", "FINGERPRINT_KEY", "case_id_of",
           "case_fingerprint", "case_verdict", "criterion_passed", "incomplete_note", "missing_fields", "is_complete",
           "iter_results", "load_results", "repair_tail", "scan_done", "append_record",
           "dumps_record", "lock_output", "OutputInUseError", "pid_running"]

RESULTS_FILE = "results.jsonl"
LOCK_FILE = "batch.lock"

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
    raise SettingsError(owner="batch case", key="case_id",
                        expected="a stable id (an attribute or key 'case_id' or 'id')",
                        found=f"a {type(case).__name__} without one")


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


# ------------------------------------------------------------------------------------------ verdicts
def missing_fields(record: Mapping[str, Any]) -> list[str]:
    """The keys a record needs to count as a finished, judged case and lacks (or holds wrongly).

    ``status`` must be a string and ``passed`` a boolean.  The fingerprint is checked by
    :func:`is_complete`, which knows the case.
    """
    missing = []
    if not isinstance(record.get("status"), str):
        missing.append("status")
    if not isinstance(record.get("passed"), bool):
        missing.append("passed")
    return missing


def case_verdict(record: Mapping[str, Any]) -> str:
    """``"error"`` (the case did not complete), ``"failed"`` (a criterion failed) or ``"passed"``.

    A record without a ``status`` did not complete; one without ``passed = true`` did not pass.
    """
    status = record.get("status")
    if not isinstance(status, str) or status != "ok":
        return "error"
    return "passed" if record.get("passed") is True else "failed"


def incomplete_note(record: Mapping[str, Any]) -> str:
    """A message for a record that lacks its status or verdict ("" for a whole record)."""
    missing = missing_fields(record)
    if not missing:
        return ""
    return ("incomplete record: no " + " and no ".join(repr(k) for k in missing)
            + "; counted as not passed")


def criterion_passed(criterion: Mapping[str, Any]) -> bool:
    """True only when a criterion says ``passed: true`` (a missing verdict is a failure)."""
    return criterion.get("passed") is True


def is_complete(record: Mapping[str, Any], fingerprint: str | None = None) -> bool:
    """True when *record* counts: status and verdict present and, if given, the fingerprint matches."""
    if missing_fields(record):
        return False
    fp = record.get(FINGERPRINT_KEY)
    if not isinstance(fp, str):
        return False
    return fingerprint is None or fp == fingerprint


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


def dumps_record(record: Mapping[str, Any]) -> str:
    """One record as one line of JSON (no newline; numpy values made plain, NaN/inf as null)."""
    try:
        return json.dumps(record, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError):
        return json.dumps(_plain(record), allow_nan=False, separators=(",", ":"))


def append_record(fh: TextIO, record: Mapping[str, Any]) -> None:
    """Append *record* to an open ``results.jsonl``: written, flushed and ``fsync``-ed."""
    fh.write(dumps_record(record) + "\n")
    fh.flush()
    os.fsync(fh.fileno())


def iter_results(path: str | os.PathLike) -> Iterator[dict[str, Any]]:
    """Yield the records of a ``results.jsonl`` file one at a time (constant memory).

    A line that does not parse (the last line of a file whose writer was killed mid-line) is
    skipped; a bad line elsewhere is skipped with a warning that names the file and line.  Records
    are yielded as written, complete or not (see :func:`is_complete`).
    """
    path = Path(path)
    with path.open("rb") as fh:
        lineno = 0
        prev: bytes | None = None
        for raw in fh:
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

    Records keep the order in which their cases finished.  An incomplete record is returned as it
    is; the reports judge it with :func:`case_verdict` (never a pass).
    """
    wanted = None if ids is None else set(ids)
    latest: dict[str, dict[str, Any]] = {}
    for rec in iter_results(path):
        cid = str(rec[ID_KEY])
        if wanted is None or cid in wanted:
            latest.pop(cid, None)
            latest[cid] = rec
    return list(latest.values())


def repair_tail(path: str | os.PathLike) -> int:
    """Cut a partial last line (a writer killed mid-line) off *path*; return the bytes removed."""
    path = Path(path)
    size = path.stat().st_size
    if size == 0:
        return 0
    with path.open("rb+") as fh:
        fh.seek(size - 1)
        if fh.read(1) == b"\n":
            return 0
        pos, block, keep = size, 4096, 0
        while pos > 0:   # walk back to the last newline
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


def scan_done(path: str | os.PathLike) -> dict[str, dict[str, Any]]:
    """Case id -> its last record in *path*, reduced to what resuming needs.

    Each value holds ``verdict`` (:func:`case_verdict`), ``fingerprint`` (or None) and
    ``missing`` (:func:`missing_fields`).
    """
    done: dict[str, dict[str, Any]] = {}
    for rec in iter_results(path):
        fp = rec.get(FINGERPRINT_KEY)
        done[str(rec[ID_KEY])] = {"verdict": case_verdict(rec),
                                  "fingerprint": fp if isinstance(fp, str) else None,
                                  "missing": missing_fields(rec)}
    return done


# -------------------------------------------------------------------------------------- output lock
class OutputInUseError(SettingsError):
    """Another batch holds the output folder (its pid, host and start time are in the message)."""


_held: dict[str, list[Any]] = {}   # resolved lock path -> [open file, depth] held by this process
_held_guard = threading.Lock()


def pid_running(pid: int) -> bool:
    """True when process *pid* exists on this host and is not a zombie."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    try:
        with open(f"/proc/{pid}/stat", encoding="utf-8", errors="replace") as fh:
            state = fh.read().rsplit(")", 1)[1].split()[0]
        return state not in ("Z", "X")
    except (OSError, IndexError):
        return True


def _describe_holder(info: Mapping[str, Any]) -> str:
    return (f"pid {info.get('pid', '?')} on host {info.get('host', '?')}, started "
            f"{info.get('started', '?')}")


def _read_holder(fh) -> dict[str, Any]:
    fh.seek(0)
    text = fh.read()
    try:
        info = json.loads(text) if text.strip() else {}
    except ValueError:
        info = {}
    return info if isinstance(info, dict) else {}


#: Seconds a new batch waits for the lock of a batch that has died (its workers are ending).
STALE_WAIT_S = 10.0


def _try_lock(fh, fcntl) -> bool:
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False
    return True


@contextmanager
def lock_output(out_dir: str | os.PathLike, *, what: str = "mpcproto batch") -> Iterator[Path]:
    """Hold the output folder *out_dir* for one batch (see the module docstring).

    Re-entrant within one process (the CLI holds the folder across the run and its reports; the
    batch engine inside takes it again).  Yields the lock file's path.

    Raises
    ------
    OutputInUseError
        Another process holds the folder; the message names it (pid, host, start time).
    """
    import fcntl  # noqa: PLC0415 - POSIX only; imported where it is needed

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / LOCK_FILE
    key = str(path.resolve())
    with _held_guard:
        if key in _held:
            _held[key][1] += 1
            reentered = True
        else:
            reentered = False
    if reentered:
        try:
            yield path
        finally:
            with _held_guard:
                _held[key][1] -= 1
        return
    fh = open(path, "a+", encoding="utf-8")   # never truncated before the lock is ours
    if not _try_lock(fh, fcntl):
        info = _read_holder(fh)
        ended = (isinstance(info.get("pid"), int) and info.get("host") == socket.gethostname()
                 and not pid_running(info["pid"]))
        # the holder has died: what still holds the lock are its workers, which end within about
        # a second of it (mpcproto.scenario.executors.end_with_parent); wait for them
        deadline = time.monotonic() + (STALE_WAIT_S if ended else 0.0)
        while not (locked := _try_lock(fh, fcntl)) and time.monotonic() < deadline:
            time.sleep(0.1)
        if not locked:
            fh.close()
            raise OutputInUseError(
                owner="batch output", key="out_dir",
                expected="a folder no other batch is writing to",
                found=f"'{out}', in use by another batch ({_describe_holder(info)}"
                + ("; that process has ended but processes it started still hold the folder after "
                   f"{STALE_WAIT_S:g} s" if ended else "") + ")",
                fix="Wait for that run to end, stop it, or give another --out.")
    try:
        old = _read_holder(fh)
        if old.get("pid") is not None:
            host = socket.gethostname()
            gone = old.get("host") != host or not pid_running(int(old["pid"]))
            warnings.warn(
                f"{path}: took over the output folder from an earlier batch that did not end "
                f"cleanly ({_describe_holder(old)}" + ("; no longer running)" if gone else ")"),
                RuntimeWarning, stacklevel=3)
        fh.seek(0)
        fh.truncate()
        fh.write(json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                             "started": time.strftime("%Y-%m-%d %H:%M:%S %Z"),
                             "what": what}) + "\n")
        fh.flush()
        with _held_guard:
            _held[key] = [fh, 1]
        try:
            yield path
        finally:
            with _held_guard:
                _held.pop(key, None)
            fh.seek(0)
            fh.truncate()   # an empty lock file: the last holder ended cleanly
            fh.flush()
    finally:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
        finally:
            fh.close()
