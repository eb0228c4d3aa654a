"""The malformed-scenario corpus: every file in tests/bad_scenarios/ must be refused with a message
that names the file, the key path, what was expected and what was found -- through the Python API
and through the command line (exit 2, no traceback).

Each corpus file lists the fragments its message must contain in ``# expect:`` header lines.
"""

import re
from pathlib import Path

import pytest

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.exceptions import ScenarioError
from mpcproto.scenario import check_scenario
from mpcproto.scenario.schema import TOP_KEYS

CORPUS = sorted((Path(__file__).parent / "bad_scenarios").glob("*.toml"))


def expected_fragments(path: Path) -> list[str]:
    text = path.read_bytes().decode("utf-8", "replace")
    return re.findall(r"^# expect: (.*)$", text, re.M)


def test_corpus_is_large_enough():
    assert len(CORPUS) >= 25
    for p in CORPUS:
        assert expected_fragments(p), f"{p.name} declares no '# expect:' fragment"


def has_controllers(path: Path) -> bool:
    return "[controllers." in path.read_bytes().decode("utf-8", "replace")


@pytest.mark.parametrize("path", CORPUS, ids=lambda p: p.stem)
def test_loader_refuses_with_named_key(path):
    with pytest.raises(mp.ScenarioError) as ei:
        check_scenario(path, build_controllers=has_controllers(path))
    msg = str(ei.value)
    assert path.name in msg
    for frag in expected_fragments(path):
        assert frag in msg, f"{frag!r} not in {msg!r}"
    # one paragraph
    assert "\n" not in msg


@pytest.mark.parametrize("path", CORPUS, ids=lambda p: p.stem)
def test_cli_exit_2_without_traceback(path, capsys):
    args = ["check", str(path)] if has_controllers(path) else ["check", "--no-controllers", str(path)]
    code = main(args)
    out, err = capsys.readouterr()
    assert code == 2
    assert "Traceback" not in err and "Traceback" not in out
    assert path.name in err
    for frag in expected_fragments(path):
        assert frag in err


# ------------------------------------------------------------------------- bounded time and memory
# Every corpus file is refused within 30 s and 2 GB of address space (the bounds the reliability
# campaign set; a refusal normally takes about a second).  One helper process imports mpcproto once
# and forks a child per file; the child runs `mpcproto check` under RLIMIT_AS = 2 GB, and SIGALRM
# after 30 s kills it (a hang guard, not a speed measurement: speed lives in benchmarks/).
_BOUNDED = r"""
import json, os, resource, signal, sys
from mpcproto.cli import main

out = {}
for path, args in json.loads(sys.argv[1]):
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:
        os.close(r)
        resource.setrlimit(resource.RLIMIT_AS, (2 << 30, 2 << 30))
        signal.alarm(30)
        os.dup2(w, 1)
        os.dup2(w, 2)
        code = main(args)
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(code)
    os.close(w)
    chunks = []
    while True:
        b = os.read(r, 65536)
        if not b:
            break
        chunks.append(b)
    os.close(r)
    _, status = os.waitpid(pid, 0)
    out[path] = {"code": os.waitstatus_to_exitcode(status),
                 "text": b"".join(chunks).decode("utf-8", "replace")}
print(json.dumps(out))
"""


def _bounded_runs(jobs: list[tuple[str, list[str]]]) -> dict:
    import json
    import os
    import subprocess
    import sys

    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    res = subprocess.run([sys.executable, "-c", _BOUNDED, json.dumps(jobs)], capture_output=True,
                         text=True, env=env, timeout=30 * len(jobs) + 60)
    assert res.returncode == 0, res.stderr[-2000:]
    return json.loads(res.stdout.strip().splitlines()[-1])


def test_every_refusal_within_bounded_time_and_memory(tmp_path):
    jobs = []
    for p in CORPUS:
        args = ["check", str(p)] if has_controllers(p) else ["check", "--no-controllers", str(p)]
        jobs.append((str(p), args))
        if "[study]" in p.read_bytes().decode("utf-8", "replace"):
            # `run` refuses a broken study like check and batch do (it used to run the nominal case)
            jobs.append((str(p) + " (run)", ["run", str(p), "--no-plots", "--out",
                                             str(tmp_path / p.stem)]))
    results = _bounded_runs(jobs)
    for key, _ in jobs:
        path = Path(key.removesuffix(" (run)"))
        r = results[key]
        assert r["code"] != -14, f"{key}: not refused within 30 s (killed by the alarm)"
        assert r["code"] == 2, f"{key}: exit {r['code']}: {r['text'][-600:]}"
        assert "Traceback" not in r["text"] and "out of memory" not in r["text"], r["text"][-600:]
        for frag in expected_fragments(path):
            assert frag in r["text"], f"{key}: {frag!r} not in {r['text']!r}"


# ------------------------------------------------------------------------- CSV files out of bounds
_VALID = """
[scenario]
name = "{name}"
sample_time = 10.0
duration = 600.0
{extra_scenario}
[plant]
model = "blending_tank"

[operating_point]
dvs = {{ draw_off = 1.5 }}
{rest}
"""


def _write(folder: Path, stem: str, *, name: str = "ok", rest: str = "",
           extra_scenario: str = "") -> Path:
    p = folder / f"{stem}.toml"
    p.write_text(_VALID.format(name=name.replace("\\", "\\\\").replace('"', '\\"'), rest=rest,
                               extra_scenario=extra_scenario))
    return p


def test_csv_outside_the_folder_is_never_read_nor_echoed(tmp_path):
    secret = tmp_path / "secret.csv"
    secret.write_text("TOP SECRET first line,x\n1,2\n")
    sub = tmp_path / "study"
    sub.mkdir()
    for path in ("../secret.csv", str(secret)):
        scn = _write(sub, "s", rest=f'[disturbances]\ndraw_off = {{ kind = "csv", path = "{path}" }}\n')
        with pytest.raises(mp.ScenarioError) as ei:
            check_scenario(scn, build_controllers=False)
        assert "disturbances.draw_off.path" in str(ei.value)
        assert "leads out of it" in str(ei.value)
        assert "SECRET" not in str(ei.value)
    # a link inside the folder that points out of it is refused the same way
    (sub / "link.csv").symlink_to(secret)
    scn = _write(sub, "s", rest='[disturbances]\ndraw_off = { kind = "csv", path = "link.csv" }\n')
    with pytest.raises(mp.ScenarioError, match="leads out of it"):
        check_scenario(scn, build_controllers=False)
    # a table in a sub-folder is fine
    (sub / "tables").mkdir()
    (sub / "tables" / "t.csv").write_text("time,draw_off\n0,1.5\n600,1.6\n")
    scn = _write(sub, "s", rest='[disturbances]\ndraw_off = { kind = "csv", path = "tables/t.csv" }\n')
    check_scenario(scn, build_controllers=False)


def test_csv_that_is_not_a_regular_file_or_too_large_is_refused_unread(tmp_path):
    import os

    from mpcproto.sim.signals import MAX_CSV_BYTES

    os.mkfifo(tmp_path / "pipe.csv")      # opening it would block until a writer comes
    big = tmp_path / "big.csv"
    with big.open("wb") as fh:            # sparse: no disk space used
        fh.truncate(MAX_CSV_BYTES + 1)
    mb = MAX_CSV_BYTES // 2**20
    for name, frag in (("pipe.csv", "is not a regular file"), ("big.csv", f"found {mb}.0 MB")):
        scn = _write(tmp_path, "s", rest=f'[disturbances]\ndraw_off = {{ kind = "csv", path = "{name}" }}\n')
        with pytest.raises(mp.ScenarioError) as ei:
            check_scenario(scn, build_controllers=False)
        assert "disturbances.draw_off.path" in str(ei.value) and frag in str(ei.value)
        assert f"at most {mb} MB" in str(ei.value)


# ------------------------------------------------------------------------- accepted, with a warning
@pytest.mark.parametrize("rest, extra, fragment", [
    # a setpoint the CV's limits forbid (blending tank level: physical range 0-1.8 m)
    ('[setpoints]\nlevel = { kind = "step", at = 100.0, size = 5.0 }\n', "",
     "key 'setpoints.level': the setpoint reaches 6.2 m at t = 100, above the CV's high limit 1.8 m"),
    # the operating point (level 1.2 m) starts outside an operating limit: legitimate (the
    # controller must bring it back) but said
    ('[limits.level]\nhigh = 1.0\n', "",
     "key 'limits.level.high': the operating point's level = 1.2 m is above this limit (1)"),
    # an event the CI-sized run length cuts off
    ('[disturbances]\ndraw_off = { kind = "step", at = 400.0, size = 0.2 }\n', "ci = { duration = 300.0 }\n",
     "key 'disturbances.draw_off.at': the event at 400 is dropped in CI-sized runs"),
], ids=["setpoint_beyond_limits", "start_outside_limit", "event_dropped_by_ci"])
def test_suspicious_but_valid_set_ups_warn_naming_the_key(tmp_path, capsys, rest, extra, fragment):
    scn = _write(tmp_path, "s", rest=rest, extra_scenario=extra)
    assert main(["check", "--no-controllers", str(scn)]) == 0
    err = capsys.readouterr().err
    assert fragment in err, err


def test_event_after_the_end_of_the_run_names_fault_key(tmp_path):
    scn = _write(tmp_path, "s", rest='[faults.stuck]\nkind = "valve_stuck"\nvariable = "water_flow"\n'
                                     'at = 600.0\n')
    with pytest.raises(mp.ScenarioError, match=r"key 'faults.stuck.at'.*never happen"):
        check_scenario(scn, build_controllers=False)


# ------------------------------------------------------------------------- odd names in the outputs
def test_dollar_signs_in_names_are_plotted_literally(tmp_path):
    scn = _write(tmp_path, "s", name="cost $x$ and $$ {a_b}", rest="[controllers.pid]\n")
    assert main(["run", str(scn), "--out", str(tmp_path / "o")]) == 0
    assert (tmp_path / "o" / "plot_cvs.png").stat().st_size > 0
    assert (tmp_path / "o" / "plot_mvs.png").stat().st_size > 0


def test_non_utf8_file_name_gives_readable_csv_and_parsable_junit(tmp_path):
    import csv
    import os
    import xml.etree.ElementTree as ET

    folder = tmp_path / "in"
    folder.mkdir()
    name = os.fsdecode(b"caf\xe9")         # what Python makes of a Latin-1 file name
    p = _write(folder, "x", rest="[controllers.pid]\n")
    odd = p.with_name(name + ".toml")
    p.rename(odd)
    odd.write_text(odd.read_text().replace('name = "ok"\n', ""))   # the name defaults to the stem
    out, junit = tmp_path / "out", tmp_path / "junit.xml"
    assert main(["batch", str(odd), "--out", str(out), "--workers", "1", "--junit", str(junit)]) == 0
    root = ET.parse(junit).getroot()
    assert root.get("tests") == "1"
    with (out / "summary.csv").open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert rows[0]["case_id"] == "caf\ufffd"
    # the writers also hold names that still carry surrogate escapes or control characters
    from mpcproto.report.junit import write_junit
    from mpcproto.report.summary import write_summary_csv

    rec = {"case_id": name + "\x01", "scenario": name, "file": str(odd), "status": "ok",
           "passed": True, "controllers": {}, "comparisons": [], "elapsed_s": 0.1}
    write_junit([rec], tmp_path / "j2.xml")
    assert "caf\\udce9" in ET.parse(tmp_path / "j2.xml").getroot()[0].get("name")
    write_summary_csv([rec], tmp_path / "s2.csv")
    assert "caf\\udce9" in (tmp_path / "s2.csv").read_text(encoding="utf-8")


# ------------------------------------------------------------------------- solver options
@pytest.mark.parametrize("solver, options, fragment", [
    ("osqp", '{ alpha = 2.0 }', "solver_options.alpha': expected a number > 0 and < 2"),
    ("osqp", '{ rho = 0 }', "solver_options.rho': expected a number > 0"),
    ("osqp", '{ polishing = 1 }', "solver_options.polishing': expected true or false"),
    ("clarabel", '{ direct_solve_method = "bogus" }',
     "solver_options.direct_solve_method': expected a value Clarabel accepts"),
    ("clarabel", '{ tol_feas = -1.0 }', "solver_options.tol_feas': expected a number >= 0"),
    ("clarabel", '{ max_iter = 0 }', "solver_options.max_iter': expected an integer >= 1"),
], ids=lambda v: str(v)[:24])
def test_solver_options_are_typed_per_solver(tmp_path, solver, options, fragment):
    scn = _write(tmp_path, "s", rest=f'[controllers.mpc]\nhorizon = 10\nsolver = "{solver}"\n'
                                     f'solver_options = {options}\n')
    with pytest.raises(mp.ScenarioError) as ei:
        check_scenario(scn)
    assert "key 'controllers.mpc." + fragment in str(ei.value)


def test_valid_solver_options_pass(tmp_path):
    scn = _write(tmp_path, "s", rest='[controllers.mpc]\nhorizon = 10\nsolver = "osqp"\n'
                                     'solver_options = { eps_abs = 1e-5, max_iter = 200, '
                                     'polishing = true }\n')
    check_scenario(scn)
    scn = _write(tmp_path, "d", rest='[controllers.mpc]\nhorizon = 10\n'
                                     'solver_options = { primal_tol = 1e-9, iter_limit = 500 }\n')
    check_scenario(scn)


def test_osqp_options_under_the_default_solver_say_which_solver_was_chosen(tmp_path):
    scn = _write(tmp_path, "s", rest='[controllers.mpc]\nhorizon = 10\n'
                                     'solver_options = { eps_abs = 1e-5 }\n')
    with pytest.raises(ScenarioError, match="solver 'auto' chose daqp"):
        check_scenario(scn)


def test_daqp_option_of_the_wrong_type_is_named(tmp_path):
    scn = _write(tmp_path, "s", rest='[controllers.mpc]\nhorizon = 10\n'
                                     'solver_options = { iter_limit = "many" }\n')
    with pytest.raises(ScenarioError, match="solver_options.iter_limit"):
        check_scenario(scn)


def test_a_case_that_shortens_the_run_warns_about_the_events_it_cuts_off(tmp_path, capsys):
    # the file's own duration (600) holds the step at 400; the case with duration 300 drops it:
    # a warning for that case, not a refusal of the study
    scn = _write(tmp_path, "s", rest='[disturbances]\ndraw_off = { kind = "step", at = 400.0, size = 0.2 }\n'
                                     '[controllers.pid]\n[study]\n[[study.sweep]]\n'
                                     'key = "scenario.duration"\nvalues = [600.0, 300.0]\n')
    assert main(["check", "--no-controllers", str(scn)]) == 0
    capsys.readouterr()
    assert main(["run", str(scn), "--no-plots", "--case", "ok-s001", "--out", str(tmp_path / "o")]) == 0
    err = capsys.readouterr().err
    assert "key 'disturbances.draw_off[0].at'" not in err
    assert "key 'disturbances.draw_off.at': the event at 400 is dropped in this run (it ends at 300)" in err


# ------------------------------------------------------------------------ structured fields
@pytest.mark.parametrize("path", CORPUS, ids=lambda p: p.stem)
def test_every_refusal_carries_its_file_and_key(path):
    """The error of every corpus file carries its file and (for a file that parses as TOML) its
    key path as fields, and the key in the message is the field, not text to be parsed back."""
    with pytest.raises(mp.ScenarioError) as ei:
        check_scenario(path, build_controllers=has_controllers(path))
    e = ei.value
    assert e.file is not None and Path(e.file).name == path.name
    whole_file = ("empty_file", "not_utf8", "toml_syntax", "toml_nested_too_deep")
    if path.stem not in whole_file:
        assert e.key, f"{path.name}: no key in {e.fields()}"
        assert f"key '{e.key}'" in str(e)
        # the key is a path of the file's own keys: its first part is a top-level key, one of
        # the format's sections or a misspelt one the file holds (key 'disturbance')
        top = re.split(r"[.\[]", e.key)[0]
        text = path.read_bytes().decode("utf-8", "replace")
        assert top in TOP_KEYS or re.search(rf"^\[{re.escape(top)}\b", text, re.M), (path.name, e.key)


def test_a_closed_loop_refusal_lands_at_the_scenario_key_of_its_argument(tmp_path):
    """simulate() keys its own refusals by its argument (``cv_limits.level``); the scenario layer
    places them at the section that argument comes from (``limits.level``), from the fields."""
    from mpcproto.exceptions import SettingsError
    from mpcproto.scenario.runner import prepare, simulate_error
    from mpcproto.sim import OpenLoop

    scn = mp.load_scenario(_write(tmp_path, "s"))
    prep = prepare(scn)
    m = prep.plant
    # a high limit that steps below the low one at t = 100 (the scenario format takes numbers
    # only, so this reaches the loop through the Python API)
    lim = {"level": {"low": 1.0, "high": {"kind": "step", "at": 100.0, "size": -1.0, "base": 1.5}}}
    with pytest.raises(SettingsError) as ei:
        mp.simulate(m, OpenLoop(m.mv_names), op=prep.op, Ts=10.0, duration=600.0, cv_limits=lim)
    assert (ei.value.owner, ei.value.key) == ("ClosedLoop", "cv_limits.level")
    err = simulate_error(ei.value, scn, "pid")
    assert isinstance(err, mp.ScenarioError) and err.file == scn.file
    assert err.key == "limits.level" and "found low 1 above high 0.5 at t=100" in str(err)
    # an error that is not the loop's own stays at the controller's key
    other = SettingsError(owner="PIDController", key="loops[0].gain", expected="a number",
                          found="'x'")
    assert simulate_error(other, scn, "pid").key == "controllers.pid.loops[0].gain"
