"""A user's own model in a scenario: every reference form of the one model resolver
(mpcproto.models.resolve), its errors (exit 2, the key named, the user's exception only as the last
line), a controller's model of another structure, and the same numbers in pool workers."""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.exceptions import ModelError, ScenarioError
from mpcproto.models import resolve_model
from mpcproto.models.resolve import clear_cache, registered
from mpcproto.scenario import check_scenario, expand, load_scenario, run_case

ROOT = Path(__file__).resolve().parents[1]

# A user's model file: a drained tank, dh/dt = (q_in - k h) / A -- the linear tank of any process
# dynamics text (time constant A/k, gain 1/k; common practice, no source).
UNITS = '''
import mpcproto as mp
from typing import Literal

def drum(outlet: Literal["linear", "fixed"] = "linear", area: float = 2.0):
    m = mp.Model("drum", time_unit="s", description="a user's drum")
    a = m.parameter("area", area, unit="m2", low=0.1)
    k = m.parameter("outflow_coefficient", 0.1, unit="m2/s", low=0.0)
    h = m.state("level", nominal=1.0, unit="m", low=0.0, high=3.0)
    q = m.mv("inflow", nominal=0.1, unit="m3/s", low=0.0, high=0.5)
    d = m.dv("spill", nominal=0.0, unit="m3/s", low=0.0, high=0.2)
    out = k * h if outlet == "linear" else 0.1
    m.derivative(h, (q - d - out) / a)
    m.cv("level_meas", h, unit="m", low=0.0, high=3.0)
    return m

def drum_unbuilt():
    m = mp.Model("drum2", time_unit="s")
    h = m.state("level", nominal=1.0, unit="m", low=0.0, high=3.0)
    q = m.mv("inflow", nominal=0.1, unit="m3/s", low=0.0, high=0.5)
    m.derivative(h, (q - 0.1 * h) / 2.0)
    m.cv("level_meas", h, unit="m", low=0.0, high=3.0)
    return m                                   # not built: the resolver builds it

def raises():
    return {}["no such key"]

def not_a_model():
    return [1, 2, 3]

NOT_CALLABLE = 42
'''

SCENARIO = '''
[scenario]
sample_time = 2.0
duration = 120.0
seed = 3

[plant]
model = "{model}"
{extra}

[setpoints]
level_meas = {{ kind = "step", at = 10.0, size = 0.2 }}

[controllers.mpc]
horizon = 30
mv = {{ inflow = {{ scale = 0.02 }} }}

[controllers.pid]
rule = "simc"
pairs = {{ level_meas = "inflow" }}

[[criteria]]
check = "no_solver_failure"
controller = "mpc"
'''


def study(tmp: Path, model: str, extra: str = "", name: str = "s.toml", tail: str = "") -> Path:
    (tmp / "units.py").write_text(UNITS)
    p = tmp / name
    p.write_text(SCENARIO.format(model=model, extra=extra) + tail)
    return p


@pytest.fixture(autouse=True)
def _fresh_cache():
    clear_cache()
    yield
    clear_cache()


def test_a_model_file_beside_the_scenario_runs_from_any_working_directory(tmp_path, monkeypatch):
    folder = tmp_path / "study"
    folder.mkdir()
    p = study(folder, "units.py:drum", 'options = { outlet = "linear" }\n'
                                       "parameters = { outflow_coefficient = 0.125 }")
    monkeypatch.chdir(tmp_path)                # the reference is relative to the scenario's folder
    prep = check_scenario(p)
    assert prep.plant.name == "drum" and prep.plant.parameters["outflow_coefficient"] == 0.125
    # the operating point at inflow 0.1 m3/s: h = q / k = 0.8 m (closed form of the balance)
    assert prep.op.y[0] == pytest.approx(0.1 / 0.125, rel=1e-9)
    rec = run_case(load_scenario(p))
    assert rec["status"] == "ok" and rec["passed"], rec["message"]
    assert main(["run", str(p), "--out", str(tmp_path / "out"), "--no-plots"]) == 0


def test_an_option_is_a_keyword_argument_and_an_unknown_one_names_the_accepted_ones(tmp_path, capsys):
    p = study(tmp_path, "units.py:drum", 'options = { outlet = "fixed", area = 4.0 }')
    assert check_scenario(p, build_controllers=False).plant.parameters["area"] == 4.0
    p = study(tmp_path, "units.py:drum", 'options = { outlett = "fixed" }')
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "key 'plant.model'" in err and "outlet, area" in err and "outlett" in err
    assert "did you mean 'outlet'" in err


def test_an_unbuilt_model_is_built_and_parameters_are_checked(tmp_path, capsys):
    p = study(tmp_path, "units.py:drum_unbuilt")
    assert check_scenario(p, build_controllers=False).plant.is_built
    p = study(tmp_path, "units.py:drum", "parameters = { are = 3.0 }")
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "key 'plant.parameters.are'" in err and "did you mean 'area'" in err


@pytest.mark.parametrize("model, fragments", [
    ("missing.py:drum", ["key 'plant.model'", "missing.py", "no such file",
                         "relative to the scenario's folder"]),
    ("units.py:drumm", ["key 'plant.model'", "function 'drumm' of units.py", "no such name",
                        "did you mean 'drum'", "its functions: drum, drum_unbuilt, not_a_model, raises"]),
    ("units.py:raises", ["key 'plant.model'", "function 'raises' of units.py", "raised an error",
                         "Its last line:\nKeyError: 'no such key'"]),
    ("units.py:not_a_model", ["key 'plant.model'", "to return an mpcproto Model",
                              "returned a list ([1, 2, 3])"]),
    ("units.py:NOT_CALLABLE", ["key 'plant.model'", "to be a function returning a Model", "int (42)"]),
    ("no_such_package.units:drum", ["key 'plant.model'", "no module 'no_such_package'"]),
    ("units.py:", ["key 'plant.model'", "function name after the colon"]),
    ("syrup_tank", ["key 'plant.model'", "unknown model 'syrup_tank'", "built-in models are",
                    '"file.py:function"']),
])
def test_each_bad_reference_is_exit_2_naming_the_key_and_what_was_found(model, fragments, tmp_path,
                                                                        capsys):
    p = study(tmp_path, model)
    for cmd in (["check", str(p)], ["run", str(p), "--out", str(tmp_path / "o"), "--no-plots"]):
        assert main(cmd) == 2
        err = capsys.readouterr().err
        for f in fragments:
            assert f in err, (f, err)
        assert "Traceback" not in err                     # never a bare Python traceback


def test_debug_adds_the_traceback_of_the_users_function(tmp_path, capsys):
    p = study(tmp_path, "units.py:raises")
    assert main(["check", str(p), "--debug"]) == 2
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err and 'units.py", line' in err
    assert err.rstrip().splitlines()[-1] == "KeyError: 'no such key'"
    assert main(["run", str(p), "--out", str(tmp_path / "o"), "--no-plots", "--debug"]) == 2
    assert "Traceback (most recent call last)" in capsys.readouterr().err


def test_the_cache_keys_on_the_file_content(tmp_path):
    p = study(tmp_path, "units.py:drum")
    m1 = resolve_model("units.py:drum", base_dir=tmp_path)
    assert resolve_model("units.py:drum", base_dir=tmp_path) is m1       # built once per process
    (tmp_path / "units.py").write_text(UNITS.replace('0.1, unit="m2/s"', '0.2, unit="m2/s"'))
    m2 = resolve_model("units.py:drum", base_dir=tmp_path)
    assert m2 is not m1 and m2.parameters["outflow_coefficient"] == 0.2
    assert p.exists()


def test_a_package_module_function(tmp_path, monkeypatch):
    pkg = tmp_path / "acme_units"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "drums.py").write_text(UNITS)
    monkeypatch.syspath_prepend(str(tmp_path))
    m = resolve_model("acme_units.drums:drum", options={"outlet": "fixed"})
    # fixed outflow 0.1 m3/s: dh/dt = (q - d - 0.1)/A, zero at the nominal inflow
    assert m.rhs(m.nominal("state"), m.nominal("mv"), m.nominal("dv"))[0] == pytest.approx(0.0)
    scn = study(tmp_path, "acme_units.drums:drum", name="pkg.toml")
    assert check_scenario(scn, build_controllers=False).plant.name == "drum"


def install_entry_point(tmp: Path, monkeypatch) -> None:
    """Install a package the way pip leaves it on disk: a module and a .dist-info folder whose
    entry_points.txt registers two models (a function and a module written like a built-in)."""
    site = tmp / "site"
    site.mkdir()
    (site / "plantlib_demo.py").write_text(UNITS + textwrap.dedent('''
        import types as _types
        library = _types.ModuleType("plantlib_demo.library")
        library.DESCRIPTION = "registered module-style drum"
        library.TIME_UNIT = "s"
        library.OPTIONS = {"outlet": {"default": "linear", "allowed": ("linear", "fixed"),
                                      "description": "outlet law"}}
        library.default_parameters = lambda options: {"area": 2.0, "outflow_coefficient": 0.1}

        def _library_build(p, o):
            m = drum(o["outlet"], p["area"]).build()
            return m.with_parameters({"outflow_coefficient": p["outflow_coefficient"]})

        library.build = _library_build
        '''))
    dist = site / "plantlib_demo-1.2.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: plantlib-demo\nVersion: 1.2\n")
    (dist / "entry_points.txt").write_text(
        "[mpcproto.models]\nacme_drum = plantlib_demo:drum\nacme_library = plantlib_demo:library\n"
        "acme_broken = plantlib_demo_missing:drum\n")
    monkeypatch.syspath_prepend(str(site))
    monkeypatch.setenv("PYTHONPATH", str(site))   # worker processes find it too


def test_a_model_registered_by_an_installed_package(tmp_path, monkeypatch, capsys):
    install_entry_point(tmp_path, monkeypatch)
    assert {"acme_drum", "acme_library", "acme_broken"} <= set(registered())
    m = resolve_model("acme_drum", parameters={"area": 3.0})
    assert m.parameters["area"] == 3.0
    # a module written like a built-in: options and parameters checked as for a built-in
    lib = resolve_model("acme_library", options={"outlet": "fixed"}, parameters={"area": 5.0})
    assert lib.parameters["area"] == 5.0
    with pytest.raises(ModelError, match="has no option 'outflow'"):
        resolve_model("acme_library", options={"outflow": "fixed"})
    with pytest.raises(ModelError, match="(?s)acme_broken.*plantlib-demo 1.2.*No module named"):
        resolve_model("acme_broken", what="plant.model")
    assert main(["models"]) == 0
    out = capsys.readouterr().out
    assert "acme_drum" in out and "[registered: plantlib_demo:drum]" in out
    assert "acme_broken" in out and "cannot be built" in out
    # a study on the registered model in pool workers
    p = study(tmp_path, "acme_drum", name="ep.toml")
    assert main(["batch", str(p), "--out", str(tmp_path / "b"), "--workers", "2",
                 "--no-trajectories"]) == 0
    rec = [json.loads(x) for x in (tmp_path / "b" / "results.jsonl").read_text().splitlines()]
    assert rec[0]["status"] == "ok" and rec[0]["model"] == "drum"


# ------------------------------------------------------------------------- controller's own model
TM_CONTROLLER = '''
[controller_model]
kind = "transfer_matrix"
time_unit = "s"
[controller_model.mvs]
inflow = {{ unit = "m3/s", nominal = 0.1, low = 0.0, high = 0.5 }}
[controller_model.dvs]
spill = {{ unit = "m3/s", nominal = 0.0, low = 0.0, high = 0.2 }}
[controller_model.cvs]
{cv} = {{ unit = "{unit}", nominal = 1.0, low = 0.0, high = 3.0 }}
[controller_model.elements.{cv}]
inflow = {{ gain = 10.0, time_constants = [20.0] }}
spill = {{ gain = -10.0, time_constants = [20.0] }}
'''


def test_a_step_test_matrix_as_the_controllers_model_of_a_nonlinear_plant(tmp_path):
    # the drum's step response: gain 1/k = 10 s/m2, time constant A/k = 20 s -- the same element
    p = study(tmp_path, "units.py:drum", tail=TM_CONTROLLER.format(cv="level_meas", unit="m"))
    prep = check_scenario(p)
    assert prep.model is not prep.plant and prep.model.name == "controller_model"
    assert prep.plant.state_names == ("level",)
    assert prep.model.state_names == ("level_meas__inflow_1", "level_meas__spill_1")
    rec = run_case(load_scenario(p))
    assert rec["status"] == "ok" and rec["passed"], rec["message"]


@pytest.mark.parametrize("cv, unit, fragments", [
    ("level", "m", ["key 'controller_model.model'", "plant's CVs", "level_meas",
                    "missing level_meas", "not in the plant: level"]),
    ("level_meas", "cm", ["key 'controller_model.model'", "unit of CV 'level_meas'", "'m'", "'cm'"]),
])
def test_a_controllers_model_with_other_variables_is_refused(cv, unit, fragments, tmp_path, capsys):
    p = study(tmp_path, "units.py:drum", tail=TM_CONTROLLER.format(cv=cv, unit=unit))
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    for f in fragments:
        assert f in err, (f, err)


def test_a_controllers_model_of_another_built_in_structure_is_refused_by_names(tmp_path, capsys):
    p = study(tmp_path, "units.py:drum", tail='[controller_model]\nmodel = "wood_berry"\n')
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "controller_model.model" in err and "reflux, steam" in err and "inflow" in err


def test_models_scenario_shows_both_models_and_every_option(tmp_path, capsys):
    p = study(tmp_path, "units.py:drum", tail=TM_CONTROLLER.format(cv="level_meas", unit="m"))
    assert main(["models", "--scenario", str(p)]) == 0
    out = capsys.readouterr().out
    assert "[plant: units.py:drum]" in out and "[controller_model: transfer matrix" in out
    assert "option outlet = 'linear'  (allowed: 'linear', 'fixed')" in out
    assert "with option outlet = 'fixed': the same variables" in out
    assert main(["models", "--scenario", str(ROOT / "scenarios" / "caustic_blending.toml")]) == 0
    out = capsys.readouterr().out
    assert "with option outflow = 'valve': adds parameter valve_coefficient" in out


# ------------------------------------------------------------------------- the shipped examples
def test_the_syrup_mixer_model_file_obeys_its_balances():
    """Steady state of the mixer's balances by hand (its docstring): F1 = Fo w / w1,
    F2 = Fo - F1, Q from the energy balance; Fo = k sqrt(h)."""
    scn = load_scenario(ROOT / "scenarios" / "syrup_mixer" / "syrup_mixer.toml")
    prep = check_scenario(scn, build_controllers=False)
    p = prep.plant.parameters
    h, w, T = 1.2, 0.40, 70.0
    fo = p["outlet_coefficient"] * math.sqrt(h)
    f1 = fo * w / 0.65
    f2 = fo - f1
    cp = p["heat_capacity"]
    q = (-(f1 * cp * (p["syrup_temperature"] - T) + f2 * cp * (15.0 - T))
         + 60 * p["loss_coefficient"] * (T - p["room_temperature"])) / 60.0
    np.testing.assert_allclose(prep.op.u, [f1, f2, q], rtol=1e-6)
    assert prep.op.x[0] == pytest.approx((p["water_density"] + p["density_slope"] * w)
                                         * p["area"] * h, rel=1e-6)
