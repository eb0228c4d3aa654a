"""Command-line output a first-time user reads: valid JSON, messages that say what they refer to.

Checked against outside references where there are any: the JSON grammar of RFC 8259 (no NaN or
Infinity tokens) via Python's json module in strict mode.
"""

import json
from pathlib import Path

import mpcproto as mp
from mpcproto.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _no_constants(token):
    raise ValueError(f"not standard JSON (RFC 8259): {token}")


def run_cli(capsys, *args):
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


def test_models_json_is_standard_json(capsys):
    code, out, _ = run_cli(capsys, "models", "--json")
    assert code == 0
    data = json.loads(out, parse_constant=_no_constants)   # RFC 8259 has no NaN / Infinity
    cvs = [v for m in data for v in m["variables"] if v["role"] == "cv"]
    assert cvs and all(v["nominal"] is None for v in cvs)  # a CV has no nominal value of its own


def test_linearize_json_is_standard_json_for_an_integrating_plant(capsys):
    # the blending tank's level integrates: its gains are infinite and must come out as null
    code, out, _ = run_cli(capsys, "linearize", str(ROOT / "scenarios" / "caustic_blending.toml"), "--json")
    assert code == 0
    rep = json.loads(out, parse_constant=_no_constants)
    assert rep["gain"][0][0] is None and rep["rga"] is None and "not defined" in rep["rga_note"]


def test_linearize_text_names_integrating_entries(capsys):
    code, out, _ = run_cli(capsys, "linearize", str(ROOT / "scenarios" / "caustic_blending.toml"))
    assert code == 0
    level_row = next(ln for ln in out.splitlines() if ln.strip().startswith("level ") and "integ" in ln)
    assert "inf" not in level_row
    assert "integrating (ramp rate" in out


def test_check_warnings_name_their_file(capsys, tmp_path):
    f = tmp_path / "wb_round.toml"              # asks the controllers to round its dead times
    text = (ROOT / "scenarios" / "wood_berry_column.toml").read_text()
    f.write_text(text.replace("[scenario]\n", '[scenario]\ndead_time = "round"\n', 1))
    code, _, err = run_cli(capsys, "check", "--no-controllers", str(f))
    assert code == 0
    warns = [ln for ln in err.splitlines() if "warning" in ln]
    assert warns and all(str(f) in ln for ln in warns)


def test_a_file_that_is_not_results_is_refused_as_baseline(capsys, tmp_path):
    code, _, err = run_cli(capsys, "batch", str(ROOT / "scenarios" / "caustic_faults.toml"),
                           "--out", str(tmp_path / "out"), "--workers", "1",
                           "--baseline", str(ROOT / "README.md"))
    assert code == 2
    assert "README.md" in err and "no such record" in err and "Traceback" not in err
    assert not (tmp_path / "out" / "results.jsonl").exists()   # refused before anything ran


def test_run_says_what_each_verdict_number_is(capsys, tmp_path):
    f = ROOT / "scenarios" / "caustic_faults.toml"
    code, out, _ = run_cli(capsys, "run", str(f), "--out", str(tmp_path / "o"), "--no-plots", "--ci")
    verdicts = [ln for ln in out.splitlines() if ln.startswith(("pass", "FAIL"))]
    assert verdicts
    assert all("(limit " in ln and "; " in ln.split("(limit ", 1)[1] for ln in verdicts)
    assert "Simulation only" in out
    assert code in (0, 1)


def test_recorded_warnings_reach_the_caller_and_the_format_is_restored(capsys, tmp_path):
    import warnings

    before = warnings.formatwarning
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        text = (ROOT / "scenarios" / "wood_berry_column.toml").read_text()
        path = tmp_path / "wb_round.toml"        # asks the controllers to round its dead times
        path.write_text(text.replace("[scenario]\n", '[scenario]\ndead_time = "round"\n', 1))
        main(["linearize", str(path)])
    capsys.readouterr()
    assert any("8.1" in str(w.message) for w in rec)
    assert warnings.formatwarning is before
    assert mp.__version__
