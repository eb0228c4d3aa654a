"""The ``mpcproto`` command line: models, linearize, exit codes and error messages."""

import json
import subprocess
import sys

import numpy as np
import pytest
import scipy.signal

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.scenario import load_scenario


def run_cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_models_json_lists_every_builtin_with_roles_and_units(capsys):
    code, out, err = run_cli(capsys, "models", "--json")
    assert code == 0, err
    data = json.loads(out)
    names = [d["name"] for d in data]
    assert names == [d["name"] for d in mp.models.available()]
    tank = data[names.index("blending_tank")]
    roles = {v["name"]: v["role"] for v in tank["variables"]}
    assert roles["caustic_flow"] == "mv" and roles["draw_off"] == "dv" and roles["level"] == "cv"
    units = {v["name"]: v["unit"] for v in tank["variables"]}
    assert units["heater_duty"] == "kW"
    measured = {v["name"]: v.get("measured") for v in tank["variables"] if v["role"] == "dv"}
    assert measured == {"draw_off": True, "caustic_strength": False, "water_temperature": False}


def test_models_table(capsys):
    code, out, _ = run_cli(capsys, "models")
    assert code == 0
    assert "henson_seborg_cstr" in out and "dv (unmeasured)" in out


def test_linearize_json_matches_library_and_scipy(capsys):
    code, out, err = run_cli(capsys, "linearize", "scenarios/caustic_blending.toml", "--json")
    assert code == 0, err
    rep = json.loads(out)
    # the same steps through the Python API
    scn = load_scenario("scenarios/caustic_blending.toml")
    model = mp.scenario.plant_model(scn)
    op = mp.scenario.operating_point(scn, model)
    lin = mp.linearize(model, op)
    for k in ("A", "B", "Bd", "C", "D"):
        np.testing.assert_allclose(np.array(rep["continuous"][k], float), getattr(lin, k), atol=1e-12)
    assert rep["operating_point"]["cvs"]["level"] == pytest.approx(1.1, abs=1e-6)
    assert rep["operating_point"]["cvs"]["temperature"] == pytest.approx(72.0, abs=1e-4)
    # zero-order hold against scipy.signal.cont2discrete (general reference library)
    Ad, Bd_, *_ = scipy.signal.cont2discrete((lin.A, lin.B, lin.C, lin.D), 10.0, method="zoh")
    np.testing.assert_allclose(np.array(rep["discrete"]["A"]), Ad, atol=1e-12)
    np.testing.assert_allclose(np.array(rep["discrete"]["B"]), Bd_, atol=1e-12)
    # the level integrates (draw-off is a DV): a pole at 0, gains reported as null (inf)
    assert rep["open_loop"] == "integrating"
    assert min(abs(complex(*p)) for p in rep["poles"]) < 1e-12
    assert rep["gain"][0][0] is None
    assert rep["rga"] is None and "non-finite" in rep["rga_note"]


def test_linearize_table(capsys):
    code, out, _ = run_cli(capsys, "linearize", "scenarios/caustic_blending.toml")
    assert code == 0
    assert "open loop integrating" in out and "A (discrete, Ts=10)" in out


def test_missing_file_exit_2_without_traceback(capsys, tmp_path):
    code, out, err = run_cli(capsys, "linearize", str(tmp_path / "nope.toml"))
    assert code == 2
    assert "nope.toml" in err and "expected a readable scenario file" in err
    assert "Traceback" not in err


def test_toml_syntax_error_exit_2(capsys, tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("[scenario]\nsample_time = = 3\n")
    code, out, err = run_cli(capsys, "linearize", str(p))
    assert code == 2
    assert "broken.toml" in err and "expected valid TOML" in err and "line 2" in err
    assert "Traceback" not in err


def test_real_process_exit_code_and_stderr(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text('[scenario]\nsample_time = 1.0\n[plant]\nmodel = "blending_tnk"\n')
    r = subprocess.run([sys.executable, "-m", "mpcproto.cli", "linearize", str(p)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    assert "bad.toml" in r.stderr and "plant.model" in r.stderr and "did you mean 'blending_tank'" in r.stderr
    assert "Traceback" not in r.stderr
