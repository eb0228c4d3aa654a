"""``mpcproto batch`` end to end on a real (short) closed-loop study: files, exit codes, resume,
baseline, summary.csv read back with pandas, JUnit read back with xml.etree."""

from __future__ import annotations

import json
import shutil
import xml.etree.ElementTree as ET

import pytest

from mpcproto.cli import main
from test_batch_workload import SMALL_STUDY, write_study

pd = pytest.importorskip("pandas")


def test_batch_end_to_end_resume_and_baseline(tmp_path, capsys):
    study = write_study(tmp_path)
    out = tmp_path / "out"
    junit = tmp_path / "ci" / "junit.xml"
    rc = main(["batch", str(study), "--out", str(out), "--workers", "2", "--junit", str(junit),
               "--no-trajectories"])
    cap = capsys.readouterr()
    assert rc == 0, cap.err
    assert "4 passed, 0 failed" in cap.out and "licensed engineers" in cap.out
    assert "\r" not in cap.err            # no progress bar when stderr is not a terminal
    recs = [json.loads(x) for x in (out / "results.jsonl").read_text().splitlines()]
    ids = sorted(r["case_id"] for r in recs)
    assert ids == ["small_tank-s000-d0000", "small_tank-s000-d0001",
                   "small_tank-s001-d0000", "small_tank-s001-d0001"]
    assert all(r["status"] == "ok" and r["passed"] for r in recs)

    # summary.csv: one row per case x controller, flat KPI columns, same numbers as results.jsonl
    df = pd.read_csv(out / "summary.csv")
    assert len(df) == 4 and set(df["controller"]) == {"pid"} and set(df["verdict"]) == {"passed"}
    assert {"kpi.cv.level.iae", "kpi.mv.water_flow.total_travel", "violations.count",
            "param.disturbances.draw_off.size", "param.plant.parameters.loss_coefficient",
            "solver.steps"} <= set(df.columns)
    by_id = df.set_index("case_id")
    for r in recs:
        assert by_id.loc[r["case_id"], "kpi.cv.level.iae"] == pytest.approx(
            r["controllers"]["pid"]["kpi"]["cv"]["level"]["iae"], rel=1e-12)
        assert by_id.loc[r["case_id"], "seed"] == r["seed"]
    assert df["kpi.cv.level.iae"].dtype.kind == "f"

    root = ET.parse(junit).getroot()
    assert (root.get("tests"), root.get("failures"), root.get("errors")) == ("4", "0", "0")
    assert (out / "report.html").stat().st_size > 10_000

    # --resume: nothing is run again
    rc = main(["batch", str(study), "--out", str(out), "--workers", "2", "--resume",
               "--no-trajectories"])
    cap = capsys.readouterr()
    assert rc == 0 and "0 run now" in cap.out
    assert len((out / "results.jsonl").read_text().splitlines()) == 4

    # --baseline: a baseline whose level IAE was half of today's -> every case regressed, exit 1
    base = tmp_path / "baseline.jsonl"
    with base.open("w") as fh:
        for r in recs:
            r = json.loads(json.dumps(r))
            r["controllers"]["pid"]["kpi"]["cv"]["level"]["iae"] *= 0.5
            fh.write(json.dumps(r) + "\n")
    rc = main(["batch", str(study), "--out", str(out), "--resume", "--baseline", str(base),
               "--tolerance", "0.1", "--junit", str(junit), "--no-trajectories"])
    cap = capsys.readouterr()
    assert rc == 1
    assert "4 KPI(s) worse than the baseline" in cap.out and "kpi.cv.level.iae" in cap.out
    root = ET.parse(junit).getroot()
    assert root.get("failures") == "4"
    assert "worse than baseline" in (out / "report.html").read_text()


def test_a_failed_criterion_gives_exit_1_and_bad_input_exit_2(tmp_path, capsys):
    tight = write_study(tmp_path, name="tight_tank", limit=1e-6)
    # --full: the study's full sizes (2 sweep values x full_draws = 3 draws)
    rc = main(["batch", str(tight), "--out", str(tmp_path / "o"), "--workers", "1", "--full",
               "--no-trajectories"])
    cap = capsys.readouterr()
    assert rc == 1 and "0 passed, 6 failed a criterion" in cap.out
    assert "tight_tank-s001-d0002" in (tmp_path / "o" / "results.jsonl").read_text()

    cases = {
        "no such file": ["batch", str(tmp_path / "missing.toml"), "--out", str(tmp_path / "x")],
        "workers": ["batch", str(tight), "--out", str(tmp_path / "x"), "--workers", "0"],
        "tolerance": ["batch", str(tight), "--out", str(tmp_path / "x"), "--tolerance", "-1"],
        "baseline": ["batch", str(tight), "--out", str(tmp_path / "x"), "--baseline",
                     str(tmp_path / "nobase.jsonl")],
    }
    expected = {"no such file": "missing.toml: expected a scenario file",
                "workers": "mpcproto batch: error: key '--workers': expected an int in the range [1, inf), found 0",
                "tolerance": "mpcproto batch: error: key '--tolerance': expected a finite number >= 0, found -1",
                "baseline": "nobase.jsonl: expected the results.jsonl of an earlier batch"}
    for what, argv in cases.items():
        assert main(argv) == 2, what
        err = capsys.readouterr().err
        assert expected[what] in err and "Traceback" not in err, (what, err)

    # two files defining the same scenario name would give clashing case ids
    dup = tmp_path / "copy"
    dup.mkdir()
    shutil.copy(tight, dup / "other_name.toml")
    assert main(["batch", str(tight), str(dup), "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err
    assert "case id 'tight_tank-s000-d0000' also comes from" in err and "Traceback" not in err

    bad = tmp_path / "bad.toml"
    bad.write_text(SMALL_STUDY.format(name="bad", limit=1.0).replace("draws = 2", "drawz = 2"))
    assert main(["batch", str(bad), "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err
    assert "bad.toml" in err and "drawz" in err and "Traceback" not in err
