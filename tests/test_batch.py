"""Batch runner: streaming to results.jsonl, errors recorded, resume after a kill, bounded in-flight.

The cases are real closed loops (tests/test_batch_workload.py: a CasADi-integrated tank with a PI
loop) run on a real process pool; nothing is mocked.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from mpcproto import SettingsError, load_results, local_pool, run_batch
from test_batch_workload import TankCase, make_cases, run_tank_case

TESTS_DIR = Path(__file__).resolve().parent
VOLATILE = ("elapsed_s", "worker_pid", "cpu_s", "case_fingerprint")


def _stable(rec: dict) -> dict:
    return {k: v for k, v in rec.items() if k not in VOLATILE}


@pytest.fixture(scope="module")
def pool():
    with local_pool(2) as ex:
        yield ex


def _lines(path: Path) -> list[dict]:
    return [json.loads(x) for x in path.read_text().splitlines() if x.strip()]


def test_error_case_is_recorded_and_the_batch_goes_on(tmp_path, pool):
    cases = make_cases(8, steps=150, bad=(2, 5))
    out = run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    lines = _lines(tmp_path / "results.jsonl")
    assert sorted(r["case_id"] for r in lines) == sorted(c.case_id for c in cases)
    errors = {r["case_id"]: r for r in lines if r["status"] == "error"}
    assert set(errors) == {"tank-0002", "tank-0005"}
    for r in errors.values():
        assert r["message"].startswith("ValueError: case tank-000")
        assert "PI gain must be positive" in r["message"]
        assert r["passed"] is False and r["seed"] == next(
            c.seed for c in cases if c.case_id == r["case_id"])
    assert (out.total, out.ran, out.errors, out.skipped) == (8, 8, 2, 0)
    assert out.passed + out.failed == 6 and sorted(out.error_ids) == sorted(errors)
    assert not out.success


def test_pool_gives_the_numbers_of_a_direct_call(tmp_path, pool):
    # same case, same seed -> the same numbers in a worker process as in this process
    cases = make_cases(4, steps=150)
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    got = {r["case_id"]: _stable(r) for r in load_results(tmp_path / "results.jsonl")}
    for c in cases:
        assert got[c.case_id] == json.loads(json.dumps(run_tank_case(c)))


def test_failed_criterion_counts_as_failed(tmp_path, pool):
    cases = [TankCase("tight", gain=0.05, seed=3, steps=150, iae_limit=1.0),
             TankCase("loose", gain=0.3, seed=4, steps=150, iae_limit=100.0)]
    out = run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    assert (out.passed, out.failed, out.errors) == (1, 1, 0)
    assert out.failed_ids == ["tight"]


_KILL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from test_batch_workload import make_cases, run_tank_case
from mpcproto.scenario.batch import run_batch

if __name__ == "__main__":
    run_batch(make_cases({n}, steps=1500), {out!r}, workers=2, run=run_tank_case, progress=False)
"""


def test_resume_after_a_killed_batch_loses_no_case_and_runs_none_twice(tmp_path):
    n = 10
    out_dir = tmp_path / "out"
    script = tmp_path / "batch_script.py"
    script.write_text(textwrap.dedent(_KILL_SCRIPT.format(tests=str(TESTS_DIR), n=n, out=str(out_dir))))
    results = out_dir / "results.jsonl"
    proc = subprocess.Popen([sys.executable, str(script)], start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if results.exists() and results.read_bytes().count(b"\n") >= 3:
                break
            if proc.poll() is not None:
                pytest.fail(f"the batch ended before it could be killed: {proc.stderr.read()!r}")
            time.sleep(0.05)
        else:
            pytest.fail("no results appeared within 90 s")
        os.killpg(proc.pid, signal.SIGKILL)  # the batch, its fork server and workers: a hard crash
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    before = [json.loads(x) for x in results.read_text().splitlines() if x.strip()]
    done_before = {r["case_id"] for r in before}
    assert 3 <= len(done_before) < n, "kill the batch part-way"
    assert len(before) == len(done_before)

    ran_now: list[str] = []
    cases = make_cases(n, steps=1500)
    out = run_batch(cases, out_dir, workers=2, run=run_tank_case, resume=True,
                    progress=lambda done, total, rec: ran_now.append(rec["case_id"]))
    after = _lines(results)
    ids_after = [r["case_id"] for r in after]
    assert sorted(ids_after) == sorted(c.case_id for c in cases)      # no case lost
    assert len(ids_after) == len(set(ids_after)) == n                  # none recorded twice
    assert not set(ran_now) & done_before                              # none run twice
    assert set(ran_now) == {c.case_id for c in cases} - done_before
    assert (out.skipped, out.ran, out.total) == (len(done_before), n - len(done_before), n)
    assert out.passed == n and out.success
    # the records written before the kill are unchanged by the resume
    assert [_stable(r) for r in after[:len(before)]] == [_stable(r) for r in before]


def test_a_partial_last_line_is_dropped_on_resume(tmp_path, pool):
    cases = make_cases(5, steps=100)
    run_batch(cases[:3], tmp_path, executor=pool, run=run_tank_case, progress=False)
    results = tmp_path / "results.jsonl"
    full = run_tank_case(cases[3])
    with results.open("a") as fh:  # what a kill in the middle of a write leaves behind
        fh.write(json.dumps(full)[:40])
    with pytest.warns(RuntimeWarning, match="partial last line"):
        out = run_batch(cases, tmp_path, executor=pool, run=run_tank_case, resume=True,
                        progress=False)
    lines = _lines(results)  # every line parses again
    assert sorted(r["case_id"] for r in lines) == [c.case_id for c in cases]
    assert (out.skipped, out.ran) == (3, 2)


def test_without_resume_an_old_results_file_is_replaced(tmp_path, pool):
    cases = make_cases(2, steps=100)
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    assert len(_lines(tmp_path / "results.jsonl")) == 2


def test_in_flight_cases_are_bounded(tmp_path, pool):
    # a generator of cases: the runner may pull at most max_in_flight cases ahead of the records
    pulled = []
    ahead = []

    def gen():
        for c in make_cases(30, steps=60):
            pulled.append(c.case_id)
            yield c

    def seen(done, total, rec):
        ahead.append(len(pulled) - done)

    out = run_batch(gen(), tmp_path, executor=pool, run=run_tank_case, progress=seen,
                    max_in_flight=3)
    assert out.ran == 30 and len(ahead) == 30
    assert max(ahead) <= 3


def test_bad_arguments_are_named(tmp_path, pool):
    cases = make_cases(2, steps=50)
    with pytest.raises(SettingsError, match="either 'executor' or 'workers'"):
        run_batch(cases, tmp_path, executor=pool, workers=2, run=run_tank_case)
    with pytest.raises(SettingsError, match=r"key 'max_in_flight': expected an int in the range \[1, inf\), found 0"):
        run_batch(cases, tmp_path, executor=pool, run=run_tank_case, max_in_flight=0)
    with pytest.raises(SettingsError, match=r"key 'workers': expected an int in the range \[1, inf\), found 0"):
        run_batch(cases, tmp_path, workers=0, run=run_tank_case)
    with pytest.raises(SettingsError, match="share the id 'tank-0000'"):
        run_batch([cases[0], cases[0]], tmp_path, executor=pool, run=run_tank_case, progress=False)
    with pytest.raises(SettingsError, match="run_batch: key 'run': expected a picklable callable"):
        run_batch(cases, tmp_path, executor=pool, run=lambda case: {}, progress=False)
    with pytest.raises(SettingsError, match="stable id"):
        run_batch([object()], tmp_path, executor=pool, run=run_tank_case, progress=False)


_INTERRUPT_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from test_batch_workload import make_cases, run_tank_case
from mpcproto import run_batch

if __name__ == "__main__":
    try:
        run_batch(make_cases({n}, steps=1500), {out!r}, workers=2, run=run_tank_case, progress=False)
    except KeyboardInterrupt:
        print("interrupted", flush=True)
        sys.exit(130)
"""


def test_ctrl_c_keeps_finished_cases_and_resume_completes(tmp_path):
    # Ctrl-C on a terminal sends SIGINT to the whole foreground process group: the batch, its workers
    n = 10
    out_dir = tmp_path / "out"
    script = tmp_path / "interrupt_script.py"
    script.write_text(textwrap.dedent(_INTERRUPT_SCRIPT.format(tests=str(TESTS_DIR), n=n,
                                                               out=str(out_dir))))
    results = out_dir / "results.jsonl"
    proc = subprocess.Popen([sys.executable, str(script)], start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if results.exists() and results.read_bytes().count(b"\n") >= 2:
                break
            if proc.poll() is not None:
                pytest.fail(f"the batch ended before Ctrl-C: {proc.stderr.read()!r}")
            time.sleep(0.05)
        os.killpg(proc.pid, signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
    assert proc.returncode == 130, stderr
    assert "interrupted" in stdout
    before = _lines(results)                       # every line is a whole record
    ids_before = {r["case_id"] for r in before}
    assert len(ids_before) == len(before) >= 2
    out = run_batch(make_cases(n, steps=1500), out_dir, workers=2, run=run_tank_case, resume=True,
                    progress=False)
    after = _lines(results)
    assert sorted(r["case_id"] for r in after) == [f"tank-{i:04d}" for i in range(n)]
    assert out.skipped == len(ids_before) and out.ran == n - len(ids_before)


def crash_or_run(case):
    """Kill the worker process outright for a negative gain (what a segfault in compiled code does)."""
    if case.gain < 0:
        os._exit(3)
    return run_tank_case(case)


def test_a_case_that_kills_its_worker_is_pinned_and_the_rest_run(tmp_path):
    cases = make_cases(8, steps=150, bad=(3,))
    out = run_batch(cases, tmp_path, workers=2, run=crash_or_run, progress=False)
    lines = _lines(tmp_path / "results.jsonl")
    assert sorted(r["case_id"] for r in lines) == [c.case_id for c in cases]
    errors = [r for r in lines if r["status"] == "error"]
    assert [r["case_id"] for r in errors] == ["tank-0003"]       # the bystanders ran again
    assert "died while running this case alone" in errors[0]["message"]
    assert (out.errors, out.passed) == (1, 7)


def blas_threads_in_worker() -> list[int]:
    """Thread counts the OpenBLAS libraries loaded in this process report."""
    import ctypes

    import numpy as np

    np.ones((64, 64)) @ np.ones((64, 64))
    counts = []
    with open("/proc/self/maps") as fh:
        paths = sorted({ln.split()[-1] for ln in fh if "openblas" in ln.lower() and ".so" in ln})
    for p in paths:
        lib = ctypes.CDLL(p)
        for name in ("openblas_get_num_threads", "openblas_get_num_threads64_",
                     "scipy_openblas_get_num_threads", "scipy_openblas_get_num_threads64_"):
            if hasattr(lib, name):
                counts.append(int(getattr(lib, name)()))
                break
    return counts


def test_pool_workers_run_single_threaded_blas(pool):
    # one case per core: each worker's BLAS is capped at one thread (as Dask does for its workers)
    counts = pool.submit(blas_threads_in_worker).result()
    if not counts:
        pytest.skip("no OpenBLAS library with a thread-count query is loaded on this platform")
    assert counts == [1] * len(counts)


def test_resume_reruns_a_case_whose_definition_changed(tmp_path, pool):
    from dataclasses import replace

    cases = make_cases(3, steps=100)
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    edited = [cases[0], replace(cases[1], gain=0.45), cases[2]]     # same id, new gain
    out = run_batch(edited, tmp_path, executor=pool, run=run_tank_case, resume=True,
                    progress=False)
    assert (out.skipped, out.ran, out.changed) == (2, 1, ["tank-0001"])
    latest = {r["case_id"]: r for r in load_results(tmp_path / "results.jsonl")}
    assert latest["tank-0001"]["params"]["gain"] == 0.45
    assert _stable(latest["tank-0001"]) == json.loads(json.dumps(run_tank_case(edited[1])))


def test_progress_bar_shows_counts_and_eta_when_asked(tmp_path, pool, capsys):
    cases = make_cases(4, steps=60, bad=(1,))
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=True)
    err = capsys.readouterr().err
    last = err.rstrip("\n").split("\r")[-1]
    assert last.startswith("batch [") and "4/4 100%" in last and "ETA 0:00" in last
    assert "1 error" in last and err.endswith("\n")


def test_dask_missing_gives_the_install_command(monkeypatch):
    # as if the optional extra were not installed: importing 'distributed' fails
    from mpcproto import dask_executor

    monkeypatch.setitem(sys.modules, "distributed", None)
    with pytest.raises(ImportError, match=r'pip install "mpcproto\[dask\]"'):
        with dask_executor("tcp://127.0.0.1:8786"):
            pass


def test_a_garbled_line_in_the_middle_is_skipped_with_a_warning_and_rerun(tmp_path, pool):
    cases = make_cases(3, steps=60)
    run_batch(cases, tmp_path, executor=pool, run=run_tank_case, progress=False)
    results = tmp_path / "results.jsonl"
    lines = results.read_text().splitlines()
    garbled_id = json.loads(lines[1])["case_id"]
    lines[1] = lines[1][:25] + "#garbled#"
    results.write_text("\n".join(lines) + "\n")
    with pytest.warns(RuntimeWarning, match=r"results.jsonl: line 2 is not a JSON record"):
        out = run_batch(cases, tmp_path, executor=pool, run=run_tank_case, resume=True,
                        progress=False)
    assert (out.skipped, out.ran) == (2, 1)
    with pytest.warns(RuntimeWarning, match="line 2"):
        ids = sorted(r["case_id"] for r in load_results(results))
    assert ids == [c.case_id for c in cases] and garbled_id in ids


def test_the_package_does_not_import_dask_until_asked():
    code = ("import sys, mpcproto, mpcproto.cli; mpcproto.cli.build_parser(); "
            "print(sorted(m for m in ('dask', 'distributed') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
