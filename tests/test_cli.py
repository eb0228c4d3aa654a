"""The ``mpcproto`` command line: models, linearize, exit codes and error messages."""

import json
from pathlib import Path
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


def test_linearize_wood_berry_rga(capsys):
    # Wood & Berry (1973) column: relative gain of the top <- reflux pair 2.01 (widely quoted, e.g.
    # Skogestad & Postlethwaite, Multivariable Feedback Control -- from memory)
    code, out, err = run_cli(capsys, "linearize", "scenarios/wood_berry_column.toml", "--json")
    assert code == 0, err
    rep = json.loads(out)
    assert rep["names"]["cvs"] == ["top_composition", "bottom_composition"]
    assert rep["rga"][0][0] == pytest.approx(2.01, abs=0.01)
    np.testing.assert_allclose(rep["gain"], [[12.8, -18.9], [6.6, -19.4]], rtol=1e-9)  # published
    # dead times are delay states of the discrete model (the fractional feed dead times exact)
    assert any(s.startswith("steam[k-") for s in rep["names"]["discrete_states"])


def test_linearize_quadruple_tank_nmp_zero(capsys):
    # Johansson (2000): in the non-minimum-phase setting one transmission zero is in the right half
    # plane; the relative gain of the diagonal pairing is negative
    code, out, err = run_cli(capsys, "linearize", "scenarios/quadruple_tank_nmp.toml", "--json")
    assert code == 0, err
    rep = json.loads(out)
    zeros = [complex(*z) for z in rep["zeros"]]
    assert sum(z.real > 0 for z in zeros) == 1
    assert rep["rga"][0][0] < 0


def test_linearize_cstr_middle_state_is_unstable(capsys):
    # Henson & Seborg CSTR at Tc = 300 K: the middle steady state (about 0.5 mol/L, 350 K) has one
    # positive eigenvalue
    code, out, err = run_cli(capsys, "linearize", "scenarios/henson_seborg_unstable.toml", "--json")
    assert code == 0, err
    rep = json.loads(out)
    assert rep["open_loop"] == "unstable"
    assert rep["operating_point"]["states"]["CA"] == pytest.approx(0.5, abs=0.01)
    assert rep["operating_point"]["states"]["T"] == pytest.approx(350.0, abs=0.5)
    assert sum(p[0] > 0 for p in rep["poles"]) == 1


@pytest.mark.filterwarnings("ignore:the dead time on 'feed'")
def test_every_shipped_scenario_checks(capsys):

    files = sorted(str(p) for p in Path("scenarios").glob("*.toml"))
    assert len(files) >= 7
    code, out, err = run_cli(capsys, "check", "--no-controllers", *files)
    assert code == 0, err
    assert out.count("ok: ") == len(files)


def test_linearize_controller_model_under_mismatch(capsys, tmp_path):
    text = Path("scenarios/caustic_blending.toml").read_text().replace(
        "[operating_point]", "[controller_model]\nparameters = { area = 1.5 }\n\n[operating_point]")
    p = tmp_path / "mismatch.toml"
    p.write_text(text)
    _, out_p, _ = run_cli(capsys, "linearize", str(p), "--json")
    code, out_c, err = run_cli(capsys, "linearize", str(p), "--json", "--model", "controller")
    assert code == 0, err
    plant, ctl = json.loads(out_p), json.loads(out_c)
    assert plant["which"] == "plant" and ctl["which"] == "controller"
    # dh/dt = (w1 + w2 - w) / (rho A): the level row of B scales with 1/area (balance, by hand)
    area_plant = mp.make_model("blending_tank").parameters["area"]
    ratio = plant["continuous"]["B"][0][1] / ctl["continuous"]["B"][0][1]
    assert ratio == pytest.approx(1.5 / area_plant, rel=1e-9)
