"""``mpcproto new``: a starter scenario for a built-in model, a user's model file and a TOML
transfer matrix, each of which passes ``mpcproto check`` and ``mpcproto run`` as written."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from mpcproto.cli import main
from test_model_references import UNITS


def _run_new(args, capsys):
    rc = main(["new", *args])
    out = capsys.readouterr()
    assert rc == 0, out.err
    return out.out


def test_a_starter_for_a_built_in_model_checks_and_runs(tmp_path, capsys):
    out = tmp_path / "study.toml"
    _run_new(["blending_tank", "--out", str(out), "--option", "outflow=valve"], capsys)
    data = tomllib.loads(out.read_text())
    assert data["plant"] == {"model": "blending_tank",
                             "options": {"outflow": "valve", "shaft_work": "none"}}
    # scales: 1/20 of each physical range rounded to 1-2-5 (caustic 0.2 kg/s -> 0.01, duty 600 kW -> 20;
    # water 3 kg/s -> 0.15 -> 0.2, the nearer 1-2-5 number on a log scale)
    assert data["controllers"]["mpc"]["mv"]["caustic_flow"]["scale"] == 0.01
    assert data["controllers"]["mpc"]["mv"]["heater_duty"]["scale"] == 20.0
    assert len(data["criteria"]) == 2 and data["setpoints"] and data["disturbances"]
    text = out.read_text()
    for fragment in ("#   MV caustic_flow: kg/s", "#   CV concentration: wt%", "#   option outflow:",
                     "valve_coefficient", "# check = \"better_than\""):
        assert fragment in text
    assert main(["check", str(out)]) == 0
    assert main(["run", str(out), "--out", str(tmp_path / "res"), "--no-plots"]) == 0


def test_a_starter_for_a_users_model_file_refers_to_it_from_its_own_folder(tmp_path, capsys,
                                                                           monkeypatch):
    (tmp_path / "lib").mkdir()
    (tmp_path / "lib" / "units.py").write_text(UNITS)
    (tmp_path / "studies").mkdir()
    monkeypatch.chdir(tmp_path)
    _run_new(["lib/units.py:drum", "--out", "studies/drum.toml"], capsys)
    data = tomllib.loads(Path("studies/drum.toml").read_text())
    assert data["plant"]["model"] == "../lib/units.py:drum"
    assert data["plant"]["options"] == {"outlet": "linear", "area": 2.0}
    monkeypatch.chdir(tmp_path / "lib")        # check and run from anywhere
    assert main(["check", "../studies/drum.toml"]) == 0
    assert main(["run", "../studies/drum.toml", "--out", str(tmp_path / "res"), "--no-plots"]) == 0


def test_a_starter_for_a_transfer_matrix_file(tmp_path, capsys, monkeypatch):
    (tmp_path / "heater.toml").write_text('''
time_unit = "min"
[mvs]
fuel = { unit = "%", nominal = 40.0, low = 0.0, high = 100.0 }
bypass = { unit = "%", nominal = 20.0, low = 0.0, high = 100.0 }
[dvs]
feed = { unit = "t/h", nominal = 50.0, low = 0.0, high = 80.0 }
[cvs]
outlet_temperature = { unit = "degC", nominal = 320.0, low = 0.0, high = 450.0 }
stack_temperature = { unit = "degC", nominal = 180.0, low = 0.0, high = 400.0 }
[elements.outlet_temperature]
fuel = { gain = 2.5, time_constants = [8.0, 2.0], dead_time = 1.0 }
bypass = { gain = -0.8, time_constants = [3.0] }
feed = { gain = -1.2, time_constants = [6.0], dead_time = 2.0 }
[elements.stack_temperature]
fuel = { gain = 1.1, time_constants = [5.0], dead_time = 1.0 }
''')
    monkeypatch.chdir(tmp_path)
    _run_new(["heater.toml", "--out", "heater_study.toml"], capsys)
    data = tomllib.loads(Path("heater_study.toml").read_text())
    assert data["plant"] == {"model": "heater.toml"}
    # greedy pairing on scaled gains (scales 1/20 of the ranges: 5 %, 20 degC): outlet <- fuel
    # (2.5 * 5 / 20) beats the rest; the bypass does not move the stack, so the stack temperature
    # has no loop and no setpoint (zone only)
    assert data["controllers"]["pid"]["pairs"] == {"outlet_temperature": "fuel"}
    assert data["setpoints"]["stack_temperature"] == "none"
    assert main(["check", "heater_study.toml"]) == 0
    assert main(["run", "heater_study.toml", "--out", "res", "--no-plots"]) == 0


@pytest.mark.parametrize("args, fragment", [
    (["no_such_model", "--out", "x.toml"], "unknown model 'no_such_model'"),
    (["blending_tank", "--out", "x.txt"], "ending in .toml"),
    (["blending_tank", "--out", "x.toml", "--option", "outflow"], "NAME=VALUE"),
    (["blending_tank", "--out", "x.toml", "--option", "outflow=pipe"], "option 'outflow' must be one of"),
])
def test_bad_new_arguments_are_exit_2(args, fragment, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["new", *args]) == 2
    assert fragment in capsys.readouterr().err


def test_new_does_not_overwrite_without_force(tmp_path, capsys):
    out = tmp_path / "s.toml"
    out.write_text("# mine\n")
    assert main(["new", "wood_berry", "--out", str(out)]) == 2
    assert "--force" in capsys.readouterr().err and out.read_text() == "# mine\n"
    assert main(["new", "wood_berry", "--out", str(out), "--force"]) == 0
