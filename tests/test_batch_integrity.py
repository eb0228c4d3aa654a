"""A batch never lies: incomplete records never count, no orphaned workers after SIGTERM or kill -9
of the batch, one batch per output folder, plain progress lines in a CI log.

Real process pools, real signals, real ``mpcproto batch`` processes.  Worker processes are found
through /proc by the process group of the batch (it is started in a session of its own).  The
"within N seconds" bounds below are generous deadlines for "the workers are gone", not speed
measurements: before the change both workers were still alive 60 s after the batch was killed.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import xml.etree.ElementTree as ET
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

from mpcproto import compare_with_baseline, load_results, run_batch, write_html_report, write_junit
from mpcproto.cli import main
from mpcproto.report.summary import write_summary_csv
from mpcproto.store import (FINGERPRINT_KEY, LOCK_FILE, OutputInUseError, case_fingerprint,
                            case_verdict, is_complete, lock_output)
from test_batch_workload import make_cases, run_tank_case, write_study

TESTS_DIR = Path(__file__).resolve().parent
REPO = TESTS_DIR.parent

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(),
                                reason="finds worker processes through /proc (Linux)")

#: Deadline for the workers of a stopped or killed batch to be gone (see the module docstring).
GONE_WITHIN_S = 15.0

def _write_study(folder: Path) -> Path:
    """The small blending-tank study of the CLI tests (4 cases), sampled every second over 6000 s:
    a few seconds per case, so that a signal lands while cases are running."""
    p = write_study(folder, name="slow_tank")
    text = p.read_text()
    assert "sample_time = 10.0\nduration = 200.0" in text
    p.write_text(text.replace("sample_time = 10.0\nduration = 200.0",
                              "sample_time = 1.0\nduration = 6000.0"))
    return p


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), str(TESTS_DIR), env.get("PYTHONPATH", "")])
    return env


def _group(pgid: int) -> list[int]:
    """Live (not zombie) processes of process group *pgid*, read from /proc."""
    pids = []
    for d in os.listdir("/proc"):
        if not d.isdigit():
            continue
        try:
            with open(f"/proc/{d}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if int(fields[2]) == pgid and fields[0] not in ("Z", "X"):
            pids.append(int(d))
    return pids


def _start_cli(args: list[str], log: Path) -> subprocess.Popen:
    with log.open("w") as fh:   # a file, not a pipe: an orphan holding a pipe would hang the test
        return subprocess.Popen([sys.executable, "-m", "mpcproto.cli", "batch", *args],
                                start_new_session=True, stdout=fh, stderr=fh, env=_env(),
                                cwd=str(TESTS_DIR))


def _wait_for(cond, proc: subprocess.Popen, what: str, log: Path | None = None,
              within: float = 120.0) -> None:
    deadline = time.monotonic() + within
    while time.monotonic() < deadline:
        if cond():
            return
        if proc.poll() is not None:
            pytest.fail(f"the batch ended before {what}: "
                        f"{log.read_text() if log is not None else proc.returncode}")
        time.sleep(0.05)
    pytest.fail(f"no {what} within {within:.0f} s")


def _gone_after(pgid: int) -> list[int]:
    """Wait up to GONE_WITHIN_S for process group *pgid* to empty; return what is left."""
    deadline = time.monotonic() + GONE_WITHIN_S
    left = _group(pgid)
    while left and time.monotonic() < deadline:
        time.sleep(0.1)
        left = _group(pgid)
    return left


def _cleanup(proc: subprocess.Popen) -> None:
    for pid in _group(proc.pid):
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    if proc.poll() is None:
        proc.kill()
    proc.wait(timeout=30)


def _lines(path: Path) -> list[dict]:
    return [json.loads(x) for x in path.read_text().splitlines() if x.strip()]


# ------------------------------------------------------------------------------- signals, orphans
def test_sigterm_stops_the_batch_cleanly_and_leaves_no_worker(tmp_path):
    study = _write_study(tmp_path)
    out = tmp_path / "out"
    log = tmp_path / "batch.log"
    results = out / "results.jsonl"
    proc = _start_cli([str(study), "--out", str(out), "--workers", "2", "--no-trajectories",
                       "--progress-interval", "0.5"], log)
    try:
        _wait_for(lambda: results.exists() and results.read_bytes().count(b"\n") >= 1
                  and len(_group(proc.pid)) >= 3, proc, "a finished case and two workers", log)
        workers = [p for p in _group(proc.pid) if p != proc.pid]
        os.kill(proc.pid, signal.SIGTERM)   # the batch process only, as a CI runner does
        proc.wait(timeout=60)
        left = _gone_after(proc.pid)
    finally:
        _cleanup(proc)
    text = log.read_text()
    assert proc.returncode == 143, text
    assert "Traceback" not in text
    assert "stopped by SIGTERM" in text and "--resume" in text
    assert left == [], f"workers {workers}: still alive {left}"
    # every line on disk is a whole, complete record of this batch
    recs = _lines(results)
    assert recs and all(is_complete(r) for r in recs)
    assert len({r["case_id"] for r in recs}) == len(recs) < 4
    # plain progress lines in the (non-terminal) log, no carriage returns
    progress = [ln for ln in text.splitlines() if ln.startswith("mpcproto batch: progress ")]
    assert progress and "\r" not in text
    assert "/4 cases done" in progress[-1] and "ETA" in progress[-1]


def test_kill_9_of_the_cli_batch_leaves_no_worker(tmp_path):
    study = _write_study(tmp_path)
    out = tmp_path / "out"
    log = tmp_path / "batch.log"
    proc = _start_cli([str(study), "--out", str(out), "--workers", "2", "--no-trajectories"], log)
    try:
        _wait_for(lambda: len(_group(proc.pid)) >= 3, proc, "two workers", log)
        time.sleep(1.0)    # the workers are inside their first cases
        workers = [p for p in _group(proc.pid) if p != proc.pid]
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        left = _gone_after(proc.pid)
    finally:
        _cleanup(proc)
    assert len(workers) == 2
    assert left == [], f"workers {workers}: still alive {left}"


_KILL_SCRIPT = """
import sys
from test_batch_workload import make_cases, run_tank_case, write_study
from mpcproto import local_pool, run_batch

if __name__ == "__main__":
    with local_pool(2, start_method={method!r}) as pool:
        run_batch(make_cases(8, steps=4000), {out!r}, executor=pool, run=run_tank_case,
                  progress=False)
"""


@pytest.mark.parametrize("method", ["forkserver"])
def test_kill_9_leaves_no_worker_of_a_fork_server_pool(tmp_path, method):
    # the fork start method is covered by the CLI test above
    out = tmp_path / "out"
    script = tmp_path / "kill_script.py"
    script.write_text(textwrap.dedent(_KILL_SCRIPT.format(method=method, out=str(out))))
    log = tmp_path / "script.log"
    with log.open("w") as fh:
        proc = subprocess.Popen([sys.executable, str(script)], start_new_session=True, stdout=fh,
                                stderr=fh, env=_env(), cwd=str(TESTS_DIR))
    try:
        # batch + fork server + 2 workers
        _wait_for(lambda: len(_group(proc.pid)) >= 4, proc, "a fork server and two workers", log)
        time.sleep(1.0)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        left = _gone_after(proc.pid)
    finally:
        _cleanup(proc)
    assert left == [], f"still alive: {left}"


# ------------------------------------------------------------------------------ the output lock
_HOLD_SCRIPT = """
from test_batch_workload import make_cases, run_tank_case, write_study
from mpcproto import run_batch

if __name__ == "__main__":
    run_batch(make_cases(6, steps=6000), {out!r}, workers=1, run=run_tank_case, progress=False)
"""


def test_a_second_batch_on_the_same_out_is_refused_while_the_first_runs(tmp_path, capsys):
    out = tmp_path / "out"
    script = tmp_path / "hold.py"
    script.write_text(textwrap.dedent(_HOLD_SCRIPT.format(out=str(out))))
    log = tmp_path / "hold.log"
    with log.open("w") as fh:
        first = subprocess.Popen([sys.executable, str(script)], start_new_session=True, stdout=fh,
                                 stderr=fh, env=_env(), cwd=str(TESTS_DIR))
    lock = out / LOCK_FILE
    try:
        _wait_for(lambda: lock.exists() and lock.read_text().strip() != "", first,
                  "a lock file", log)
        study = _write_study(tmp_path)
        code = main(["batch", str(study), "--out", str(out), "--workers", "1"])
        err = capsys.readouterr().err
        with pytest.raises(OutputInUseError, match=f"pid {first.pid}"):
            run_batch(make_cases(1), out, executor=ThreadPoolExecutor(1), run=run_tank_case,
                      progress=False)
        still_running = first.poll() is None
    finally:
        first.kill()
        first.wait(timeout=30)
        _cleanup(first)
    assert code == 2, err
    assert "Traceback" not in err
    assert f"in use by another batch (pid {first.pid} on host " in err and "started " in err
    assert still_running
    assert not (out / "summary.csv").exists()   # the refused batch wrote nothing there


def test_a_lock_left_by_a_dead_run_is_taken_over_with_a_warning(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    dead_pid = int(dead.stdout)
    import socket

    (tmp_path / LOCK_FILE).write_text(json.dumps({"pid": dead_pid, "host": socket.gethostname(),
                                                  "started": "2026-01-01 00:00:00 UTC"}))
    with pytest.warns(RuntimeWarning, match=rf"took over .*\(pid {dead_pid} on host .*no longer running"):
        with ThreadPoolExecutor(1) as ex:
            out = run_batch(make_cases(2, steps=60), tmp_path, executor=ex, run=run_tank_case,
                            progress=False)
    assert out.passed == 2
    assert (tmp_path / LOCK_FILE).read_text() == ""   # released cleanly: nothing to take over


def test_the_lock_is_reentrant_in_one_process_and_released_at_the_end(tmp_path):
    with lock_output(tmp_path):
        with lock_output(tmp_path):   # the CLI holds the folder; run_batch takes it again
            info = json.loads((tmp_path / LOCK_FILE).read_text())
            assert info["pid"] == os.getpid()
    # a second process can take it now
    code = ("import sys; from mpcproto.store import lock_output\n"
            f"with lock_output({str(tmp_path)!r}): print('held')")
    got = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=_env())
    assert got.stdout.strip() == "held", got.stderr


# ------------------------------------------------------------------------ incomplete records
def _fp_of(cases, cid):
    return case_fingerprint(next(c for c in cases if c.case_id == cid))


def test_an_incomplete_or_stale_record_never_counts_and_resume_reruns_it(tmp_path):
    cases = make_cases(6, steps=60)
    results = tmp_path / "results.jsonl"
    good = run_tank_case(cases[5])
    good[FINGERPRINT_KEY] = _fp_of(cases, cases[5].case_id)
    no_status = dict(run_tank_case(cases[1]))
    del no_status["status"]
    no_status[FINGERPRINT_KEY] = _fp_of(cases, cases[1].case_id)
    no_verdict = dict(run_tank_case(cases[2]))
    del no_verdict["passed"]
    no_verdict[FINGERPRINT_KEY] = _fp_of(cases, cases[2].case_id)
    stale = dict(run_tank_case(cases[3]), **{FINGERPRINT_KEY: "0123456789abcdef"})
    no_fp = dict(run_tank_case(cases[4]))
    lines = [{"case_id": cases[0].case_id}, no_status, no_verdict, stale, no_fp, good]
    results.write_text("".join(json.dumps(r) + "\n" for r in lines))

    ran: list[str] = []
    with ThreadPoolExecutor(1) as ex:
        out = run_batch(cases, tmp_path, executor=ex, run=run_tank_case, resume=True,
                        progress=lambda done, total, rec: ran.append(rec["case_id"]))
    assert sorted(ran) == [c.case_id for c in cases[:5]]          # only the whole record is kept
    assert out.skipped == 1 and out.ran == 5
    assert sorted(out.incomplete) == sorted(c.case_id for c in (cases[0], cases[1], cases[2],
                                                               cases[4]))
    assert out.changed == [cases[3].case_id]
    assert all(is_complete(r) for r in load_results(results))


def _incomplete_records() -> list[dict]:
    base = run_tank_case(make_cases(1, steps=60)[0])
    only_id = {"case_id": "only-id", "scenario": "tank-test"}
    no_verdict = {k: v for k, v in base.items() if k != "passed"}
    no_verdict["case_id"] = "no-verdict"
    return [only_id, no_verdict]


def test_reports_treat_a_missing_status_or_verdict_as_failure(tmp_path):
    recs = _incomplete_records()
    assert [case_verdict(r) for r in recs] == ["error", "failed"]
    # summary.csv
    write_summary_csv(recs, tmp_path / "summary.csv")
    import csv

    rows = {r["case_id"]: r for r in csv.DictReader((tmp_path / "summary.csv").open())}
    assert rows["only-id"]["verdict"] == "error" and rows["only-id"]["passed"] == "False"
    assert "incomplete record" in rows["only-id"]["message"]
    assert rows["no-verdict"]["verdict"] == "failed" and rows["no-verdict"]["passed"] == "False"
    assert rows["no-verdict"]["controller_passed"] == "False"
    # JUnit: an error and a failure, no passing test case for either
    write_junit(recs, tmp_path / "junit.xml")
    root = ET.parse(tmp_path / "junit.xml").getroot()
    assert root.get("errors") == "1" and root.get("failures") == "1"
    for tc in root.iter("testcase"):
        if "only-id" in tc.get("classname"):
            assert tc.find("error") is not None
        else:
            assert tc.find("failure") is not None and "'passed'" in tc.find("failure").get("message")
    # HTML: neither shows as passed
    write_html_report(recs, tmp_path / "report.html", title="incomplete")
    page = (tmp_path / "report.html").read_text()
    assert "incomplete record: no &#x27;status&#x27;" in page or "incomplete record: no 'status'" in page
    # baseline: a case that passed before and now has an incomplete record is a regression
    base = [dict(r, status="ok", passed=True) for r in recs]
    cmp = compare_with_baseline(recs, base)
    assert sorted(r.case_id for r in cmp.regressions if r.quantity == "verdict") == \
        ["no-verdict", "only-id"]


def test_a_baseline_of_incomplete_records_is_refused(tmp_path, capsys):
    # a baseline whose records carry no status or verdict would compare nothing and pass
    base = tmp_path / "old.jsonl"
    base.write_text('{"case_id": "slow_tank/0000"}\n{"case_id": "slow_tank/0001"}\n')
    code = main(["batch", str(_write_study(tmp_path)), "--out", str(tmp_path / "out"),
                 "--baseline", str(base)])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert "a 'status' and a 'passed' verdict per line; found no such record" in err
    assert str(base) in err


# ------------------------------------------------------------------------------------ progress
def test_plain_progress_lines_when_stderr_is_not_a_terminal(tmp_path, capsys):
    cases = make_cases(4, steps=1500, bad=(1,))
    with ThreadPoolExecutor(1) as ex:
        run_batch(cases, tmp_path, executor=ex, run=run_tank_case, progress_interval=0.05)
    err = capsys.readouterr().err
    assert "\r" not in err and "\x1b" not in err
    lines = [ln for ln in err.splitlines() if ln.startswith("mpcproto batch: progress ")]
    assert len(lines) >= 2     # at least one on the interval and one at the end
    assert lines[-1].startswith("mpcproto batch: progress 4/4 cases done, 0 failed, 1 error, ")
    assert "ETA 0:00" in lines[-1]


# ------------------------------------------------------------------------------- import direction
def _mpcproto_imports(path: Path) -> set[str]:
    """Every mpcproto module a file imports, at module level or inside a function."""
    import ast

    pkg = ".".join(path.relative_to(REPO).with_suffix("").parts)
    here = pkg.split(".")[:-1] if path.name != "__init__.py" else pkg.split(".")
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            base = here[:len(here) - node.level + 1] if node.level else []
            mod = ".".join(base + ([node.module] if node.module else []))
            names = [mod] + [f"{mod}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        else:
            continue
        found.update(n for n in names if n.startswith("mpcproto"))
    return found


def test_the_store_sits_below_the_batch_engine_and_the_reports():
    # one direction: cli -> scenario.batch -> store, cli -> report -> store; no circle between them
    store = _mpcproto_imports(REPO / "mpcproto" / "store.py")
    assert store <= {"mpcproto.exceptions", "mpcproto.exceptions.SettingsError"}, store
    for f in sorted((REPO / "mpcproto" / "report").glob("*.py")):
        bad = {m for m in _mpcproto_imports(f) if m.startswith(("mpcproto.scenario", "mpcproto.cli"))}
        assert not bad, f"{f.name} imports {bad}"
    for name in ("batch.py", "executors.py"):
        bad = {m for m in _mpcproto_imports(REPO / "mpcproto" / "scenario" / name)
               if m.startswith(("mpcproto.report", "mpcproto.cli"))}
        assert not bad, f"scenario/{name} imports {bad}"
