"""``mpcproto run`` and run_case end to end on a short scenario of our own (the CIP caustic tank)."""

import json

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.scenario import (CAUTION, expand, load_scenario, parse_scenario, prepare, run_case)

SHORT = """
[scenario]
name = "short_tank"
sample_time = 10.0
duration = 600.0
seed = 3

[plant]
model = "blending_tank"

[operating_point]
dvs = { draw_off = 1.5 }
targets = { level = 1.2, concentration = 2.0, temperature = 75.0 }

[disturbances]
draw_off = { kind = "step", at = 100.0, size = 0.3 }

[instruments]
level = { noise_std = 0.001 }

[controllers.mpc]
horizon = 20
control_horizon = 4
steady_target = false
cv = { level = { disturbance = "auto" } }

[controllers.pid]
rule = "simc"
pairs = { level = "water_flow", concentration = "caustic_flow", temperature = "heater_duty" }
tau_c = 120.0

[[criteria]]
check = "no_limit_violation"

[[criteria]]
check = "iae_below"
cv = "level"
limit = LEVEL_LIMIT

[[criteria]]
check = "solve_time_below"
fraction = 0.5
"""


def write(tmp_path, limit="100.0", name="short.toml", text=SHORT):
    p = tmp_path / name
    p.write_text(text.replace("LEVEL_LIMIT", limit))
    return p


@pytest.fixture(scope="module")
def passing_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("run")
    path = write(tmp)
    out = tmp / "out"
    code = main(["run", str(path), "--out", str(out)])
    return code, out


def test_run_exit_0_and_files(passing_run):
    code, out = passing_run
    assert code == 0
    names = {p.name for p in out.iterdir()}
    assert {"summary.json", "trajectories_mpc.csv", "trajectories_pid.csv",
            "plot_cvs.png", "plot_mvs.png"} <= names
    for png in ("plot_cvs.png", "plot_mvs.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_summary_layout(passing_run):
    _, out = passing_run
    s = json.loads((out / "summary.json").read_text())
    assert s["status"] == "ok" and s["passed"] is True and s["case_id"] == "short_tank"
    assert s["caution"] == CAUTION and "licensed engineers" in s["caution"]
    for label in ("mpc", "pid"):
        b = s["controllers"][label]
        assert set(b) >= {"kpi", "violations", "solver", "criteria"}
        assert set(b["kpi"]["cv"]["level"]) >= {"iae", "ise", "itae", "settling_time", "overshoot",
                                                "max_abs_error"}
        assert "total_travel" in b["kpi"]["mv"]["water_flow"]
        assert set(b["solver"]) >= {"steps", "failures", "fallbacks", "median_solve_ms",
                                    "p95_solve_ms", "worst_fraction"}
        assert {c["name"] for c in b["criteria"]} == {"no_limit_violation", "iae_below:level",
                                                      "solve_time_below"}
        for c in b["criteria"]:
            assert set(c) >= {"name", "value", "limit", "passed"}


def test_summary_iae_matches_the_written_trajectory(passing_run):
    # recompute the IAE of the level from the CSV with numpy: sum |sp - y| * Ts (the KPI's
    # definition, common practice, no source)
    _, out = passing_run
    s = json.loads((out / "summary.json").read_text())
    traj = mp.Trajectory.from_csv(out / "trajectories_pid.csv")
    e = np.abs(traj.series("sp", "level") - traj.series("y", "level"))
    iae = float(np.nansum(e) * 10.0)
    assert s["controllers"]["pid"]["kpi"]["cv"]["level"]["iae"] == pytest.approx(iae, rel=1e-9)
    crit = {c["name"]: c for c in s["controllers"]["pid"]["criteria"]}
    assert crit["iae_below:level"]["value"] == pytest.approx(iae, rel=1e-9)
    # the run started at the requested targets
    assert s["operating_point"]["cvs"]["level"] == pytest.approx(1.2, abs=1e-6)


def test_run_exit_1_when_a_criterion_fails(tmp_path, capsys):
    text = SHORT.replace("[controllers.mpc]\nhorizon = 20\ncontrol_horizon = 4\nsteady_target = false\n"
                         "cv = { level = { disturbance = \"auto\" } }\n", "")
    path = write(tmp_path, limit="0.001", text=text)
    code = main(["run", str(path), "--out", str(tmp_path / "o"), "--no-plots"])
    out, err = capsys.readouterr()
    assert code == 1
    assert "FAIL  pid        iae_below:level" in out and "FAILED: short_tank" in out
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert s["passed"] is False
    crit = {c["name"]: c for c in s["controllers"]["pid"]["criteria"]}
    assert crit["iae_below:level"]["passed"] is False and crit["iae_below:level"]["limit"] == 0.001


def test_run_bad_controller_setting_exit_2(tmp_path, capsys):
    path = write(tmp_path, text=SHORT.replace("horizon = 20", "horizon = 0"))
    code = main(["run", str(path), "--out", str(tmp_path / "o"), "--no-plots"])
    _, err = capsys.readouterr()
    assert code == 2
    assert "short.toml" in err and "controllers.mpc.horizon" in err and "Traceback" not in err


def test_run_case_records_errors_as_data():
    raw = parse_scenario({"scenario": {"sample_time": 10.0, "duration": 100.0},
                          "plant": {"model": "blending_tank"}}, file="x.toml")
    rec = run_case(raw)
    assert rec["status"] == "error" and rec["passed"] is False
    assert "controllers" in rec["message"] and rec["caution"] == CAUTION


def test_swept_plant_parameter_is_a_mismatch(tmp_path):
    # a study on plant.parameters.area changes the plant only; the controller keeps the file value
    text = SHORT.replace("LEVEL_LIMIT", "100.0") + (
        '\n[study]\n[[study.sweep]]\nkey = "plant.parameters.area"\nvalues = [0.9, 1.3]\n')
    p = tmp_path / "sw.toml"
    p.write_text(text.replace('model = "blending_tank"',
                              'model = "blending_tank"\nparameters = { area = 1.1 }'))
    cases = expand(load_scenario(p))
    from mpcproto.scenario import case_scenario

    c = cases[1]
    prep = prepare(case_scenario(c), base_parameters={"area": 1.1})
    assert prep.plant.parameters["area"] == 1.3
    assert prep.model.parameters["area"] == 1.1


def test_run_one_case_of_a_study(tmp_path, capsys):
    text = SHORT.replace("[controllers.mpc]\nhorizon = 20\ncontrol_horizon = 4\nsteady_target = false\n"
                         "cv = { level = { disturbance = \"auto\" } }\n", "")
    text += '\n[study]\n[[study.sweep]]\nkey = "disturbances.draw_off.size"\nvalues = [0.3]\nfull_values = [0.1, 0.3]\n'
    path = write(tmp_path, text=text)
    code = main(["run", str(path), "--out", str(tmp_path / "o"), "--no-plots", "--case", "short_tank-s000"])
    capsys.readouterr()
    assert code == 0
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    # the same case as in a batch: its id, its study value, its seed
    (case,) = [c for c in expand(load_scenario(path), full=True) if c.case_id == "short_tank-s000"]
    assert s["case_id"] == "short_tank-s000" and s["params"] == {"disturbances.draw_off.size": 0.1}
    assert s["seed"] == case.seed


def test_nominal_run_equals_the_batch_case_of_a_studyless_scenario(tmp_path):
    text = SHORT.replace("[controllers.mpc]\nhorizon = 20\ncontrol_horizon = 4\nsteady_target = false\n"
                         "cv = { level = { disturbance = \"auto\" } }\n", "")
    scn = load_scenario(write(tmp_path, text=text))
    (case,) = expand(scn)
    a, b = run_case(scn), run_case(case)
    assert a["case_id"] == b["case_id"] and a["seed"] == b["seed"]
    assert a["controllers"]["pid"]["kpi"] == b["controllers"]["pid"]["kpi"]


def test_a_cached_predictive_controller_repeats_a_fresh_one_exactly(tmp_path):
    # The runner keeps one compiled controller per worker process and the simulator resets it at
    # the start of every run; reset() restarts the solvers and the estimator, so a case run with
    # the reused controller must give the very numbers of a freshly built one (reproducibility of
    # a seeded run: common practice, no source).
    from mpcproto.scenario import runner

    scn = load_scenario(write(tmp_path, text=SHORT))
    (case,) = expand(scn)
    runner._CONTROLLER_CACHE.clear()
    fresh = run_case(case)
    cached = [c for c in runner._CONTROLLER_CACHE.values()
              if isinstance(c, mp.PredictiveController)]
    assert len(cached) == 1, "the predictive controller is kept for the next case"
    again = run_case(case)
    assert [c for c in runner._CONTROLLER_CACHE.values()
            if isinstance(c, mp.PredictiveController)] == cached, "and reused, not rebuilt"
    for label in ("mpc", "pid"):
        assert again["controllers"][label]["kpi"] == fresh["controllers"][label]["kpi"]
        assert again["controllers"][label]["violations"] == fresh["controllers"][label]["violations"]
