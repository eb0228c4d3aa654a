"""Transfer-function matrices written in TOML: the plant's step responses against the analytic
FOPDT / SOPDT-with-lead / integrating responses, and the table's checks (exit 2, the key named)."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
import scipy.signal as sig

from mpcproto.cli import main
from mpcproto.exceptions import ModelError
from mpcproto.models import resolve_model, transfer_table_model
from mpcproto.sim.plant import Plant

VARS = '''
time_unit = "min"
[mvs.valve]
unit = "%"
nominal = 50.0
low = 0.0
high = 100.0
[cvs.y]
unit = "degC"
nominal = 80.0
low = 0.0
high = 200.0
'''


def one_element(element: str):
    return transfer_table_model(tomllib.loads(VARS + f"[elements.y]\nvalve = {element}\n"),
                                what="test")


def plant_step(model, size: float, Ts: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """The simulated plant's CV after a step of *size* in the first MV at t = 0."""
    p = Plant(model, Ts)
    u0, d0 = model.nominal("mv"), model.nominal("dv")
    p.reset(model.nominal("state"), u0, d0)
    u = u0.copy()
    u[0] += size
    y = []
    for _ in range(n):
        p.advance(u.copy(), d0.copy())
        y.append(p.y_next[0])
    t = Ts * np.arange(1, n + 1)
    return t, np.array(y) - model.output(model.nominal("state"), u0, d0)[0]


def fopdt(t, K, tau, theta):
    # K (1 - exp(-(t - theta)/tau)) after the dead time: the FOPDT step response of any process
    # control text (e.g. Seborg, Edgar & Mellichamp, Process Dynamics and Control, ch. 5; from memory)
    s = np.maximum(t - theta, 0.0)
    return K * (1.0 - np.exp(-s / tau))


def test_first_order_plus_dead_time_matches_the_analytic_response():
    m = one_element("{ gain = 2.0, time_constants = [5.0], dead_time = 3.0 }")
    t, y = plant_step(m, 4.0, 1.0, 40)
    np.testing.assert_allclose(y, 4.0 * fopdt(t, 2.0, 5.0, 3.0), atol=1e-6)


def test_second_order_with_lead_matches_the_analytic_and_scipy_responses():
    K, t1, t2, ta, th = -1.5, 6.0, 2.0, 1.0, 2.0
    m = one_element(f"{{ gain = {K}, time_constants = [{t1}, {t2}], lead = {ta}, dead_time = {th} }}")
    t, y = plant_step(m, 1.0, 0.5, 80)
    s = np.maximum(t - th, 0.0)
    # K [1 + (ta - t1)/(t1 - t2) e^(-s/t1) + (t2 - ta)/(t1 - t2) e^(-s/t2)]: partial fractions of
    # K (ta s + 1) / (s (t1 s + 1)(t2 s + 1)) (closed form, derived by hand)
    exact = K * (1 + (ta - t1) / (t1 - t2) * np.exp(-s / t1) + (t2 - ta) / (t1 - t2) * np.exp(-s / t2))
    np.testing.assert_allclose(y, exact, atol=1e-6)
    # the same element by scipy.signal (reference library), shifted by the dead time
    after = s[s > 0]
    _, ref = sig.step(sig.lti([K * ta, K], np.polymul([t1, 1.0], [t2, 1.0])),
                      T=np.concatenate([[0.0], after]))
    np.testing.assert_allclose(y[s > 0], ref[1:], atol=1e-6)


@pytest.mark.parametrize("taus", ["", ", time_constants = [4.0]"])
def test_an_integrating_element_ramps_at_its_rate(taus):
    K, th, tau = 0.3, 2.0, 4.0
    m = one_element(f"{{ gain = {K}, integrating = true, dead_time = {th}{taus} }}")
    t, y = plant_step(m, 2.0, 1.0, 30)
    s = np.maximum(t - th, 0.0)
    # K/s e^(-theta s): a ramp K (t - theta); with a lag, K [(t - theta) - tau (1 - e^(-(t-theta)/tau))]
    # (inverse Laplace transform of K / (s^2 (tau s + 1)); closed form, derived by hand)
    exact = K * s if not taus else K * (s - tau * (1 - np.exp(-s / tau)))
    np.testing.assert_allclose(y, 2.0 * exact, atol=1e-6)


def test_a_fractional_dead_time_stays_exact_in_the_plant():
    m = one_element("{ gain = 2.0, time_constants = [5.0], dead_time = 2.5 }")
    t, y = plant_step(m, 1.0, 1.0, 20)
    np.testing.assert_allclose(y, fopdt(t, 2.0, 5.0, 2.5), atol=1e-6)


def test_a_matrix_of_pure_gain_and_dead_time_elements():
    m = one_element("{ gain = 0.5, dead_time = 3.0 }")
    t, y = plant_step(m, 2.0, 1.0, 8)
    np.testing.assert_allclose(y, np.where(t >= 3.0 - 1e-9, 1.0, 0.0), atol=1e-9)


def test_a_dv_element_and_a_file_reference(tmp_path):
    text = VARS + '''
[dvs.inflow]
unit = "m3/h"
nominal = 10.0
low = 0.0
high = 30.0
measured = false
[elements.y]
valve = { gain = 1.0, time_constants = [3.0] }
inflow = { gain = -0.5, time_constants = [2.0] }
'''
    (tmp_path / "steps.toml").write_text(text)
    m = resolve_model("steps.toml", base_dir=tmp_path)
    assert m.name == "steps" and m.dv_names == ("inflow",) and not m.variables("dv")[0].measured
    # steady-state gains: K from the elements
    x0 = m.nominal("state")
    lin_gain = m.output(x0, [51.0], [10.0])[0] - 80.0
    assert lin_gain == pytest.approx(0.0)        # states still at 0: no feedthrough
    with pytest.raises(ModelError, match="no options or parameters"):
        resolve_model("steps.toml", base_dir=tmp_path, parameters={"gain": 1.0})


@pytest.mark.parametrize("edit, key, fragment", [
    ("valve = { gain = 1.0, time_constants = [3.0] }",
     "controller_model.elements.y.valve.time_constants", None),
    ("valve = { gain = 1.0, time_constant = [3.0] }", "controller_model.elements.y.valve.time_constant",
     "did you mean 'time_constants'"),
    ("valve = { gain = 1.0, time_constants = [3.0, -1.0] }", "controller_model.elements.y.valve",
     "a time constant must be a finite number > 0"),
    ("valve = { gain = 1.0, time_constants = [1.0, 2.0, 3.0] }", "controller_model.elements.y.valve",
     "at most two time constants"),
    ("valve = { gain = 1.0, lead = 2.0 }", "controller_model.elements.y.valve",
     "a lead needs at least one time constant"),
    ("valve = { gain = 1.0, integrating = 1 }", "controller_model.elements.y.valve",
     "'integrating' must be true or false"),
    ("valv = { gain = 1.0 }", "controller_model.elements.y.valv", "did you mean 'valve'"),
    ("valve = { time_constants = [1.0] }", "controller_model.elements.y.valve.gain", "the key 'gain'"),
])
def test_a_bad_element_in_a_scenario_names_its_key(edit, key, fragment, tmp_path, capsys):
    p = tmp_path / "s.toml"
    p.write_text(TM_SCENARIO.replace("EDIT", edit))
    rc = main(["check", str(p)])
    err = capsys.readouterr().err
    if fragment is None:       # the valid file: a TOML plant and a TOML controller's model
        assert rc == 0, err
        assert main(["run", str(p), "--out", str(tmp_path / "o"), "--no-plots"]) == 0
        return
    assert rc == 2
    assert f"key '{key}'" in err and fragment in err, err
    assert "Traceback" not in err


TM_SCENARIO = '''
[scenario]
sample_time = 1.0
duration = 30.0
[plant]
kind = "transfer_matrix"
time_unit = "min"
[plant.mvs]
valve = { unit = "%", nominal = 50.0, low = 0.0, high = 100.0 }
[plant.cvs]
y = { unit = "degC", nominal = 80.0, low = 0.0, high = 200.0 }
[plant.elements.y]
valve = { gain = 1.0, time_constants = [3.0], dead_time = 1.0 }
[controller_model]
kind = "transfer_matrix"
time_unit = "min"
[controller_model.mvs]
valve = { unit = "%", nominal = 50.0, low = 0.0, high = 100.0 }
[controller_model.cvs]
y = { unit = "degC", nominal = 80.0, low = 0.0, high = 200.0 }
[controller_model.elements.y]
EDIT
[setpoints]
y = { kind = "step", at = 2.0, size = 1.0 }
[controllers.mpc]
horizon = 20
[[criteria]]
check = "no_solver_failure"
controller = "mpc"
'''


def test_missing_and_unknown_variables_are_named(tmp_path):
    t = tomllib.loads(VARS + "[elements.y]\nvalve = { gain = 1.0 }\n")
    t["mvs"]["valve"].pop("high")
    with pytest.raises(ModelError, match=r"key 'test\.mvs\.valve\.high': expected the key 'high'"):
        transfer_table_model(t, what="test")
    t = tomllib.loads(VARS + "[elements.z]\nvalve = { gain = 1.0 }\n")
    with pytest.raises(ModelError, match=r"key 'test\.elements\.z': expected the name of a CV \(y\)"):
        transfer_table_model(t, what="test")
    t = tomllib.loads(VARS + "[elements.y]\n")
    with pytest.raises(ModelError, match="at least one element moving the CV 'y'"):
        transfer_table_model(t, what="test")
    assert math.isfinite(one_element("{ gain = 1.0, time_constants = [2.0] }").nominal("cv")[0])


# the plant of TM_SCENARIO (gain 1, 3 min lag, 1 min dead time) with no [controller_model]
STUDY_SCENARIO = TM_SCENARIO.split("[controller_model]")[0] + '''
[controllers.mpc]
horizon = 20
[study]
draws = 2
[[study.sweep]]
key = "plant.elements.y.valve.dead_time"
values = [2.0, 4.0]
[[study.draw]]
key = "plant.elements.y.valve.gain"
distribution = "uniform"
low = 0.8
high = 1.25
relative = true
[[study.draw]]
key = "plant.elements.y.valve.time_constants[0]"
distribution = "choice"
values = [2.0, 5.0]
'''


def test_a_study_of_the_plant_elements_moves_the_plant_only(tmp_path):
    from mpcproto.scenario import case_scenario, expand, load_scenario
    from mpcproto.scenario.build import controller_model, plant_model

    p = tmp_path / "s.toml"
    p.write_text(STUDY_SCENARIO)
    cases = expand(load_scenario(p))
    assert len(cases) == 4
    for c in cases:
        K = c.params["plant.elements.y.valve.gain"]
        tau = c.params["plant.elements.y.valve.time_constants[0]"]
        theta = c.params["plant.elements.y.valve.dead_time"]
        assert 0.8 <= K <= 1.25 and tau in (2.0, 5.0)     # relative to the file's gain 1.0
        sc = case_scenario(c)
        # the plant: the analytic FOPDT step response with the case's numbers (fopdt above)
        t, y = plant_step(plant_model(sc), 2.0, 0.5, 40)
        np.testing.assert_allclose(y, fopdt(t, 2.0 * K, tau, theta), atol=1e-9)
        # the controllers' model: the file's matrix (gain 1, 3 min, 1 min): model mismatch
        t, y = plant_step(controller_model(sc), 2.0, 0.5, 40)
        np.testing.assert_allclose(y, fopdt(t, 2.0, 3.0, 1.0), atol=1e-9)


@pytest.mark.parametrize("key, fragment", [
    ("plant.elements.y.pump.gain", "('pump' is not there)"),
    ("plant.elements.y.valve.gian", "plant.elements.<CV>.<MV or DV>.<gain|time_constants[i]"),
    ("plant.elements.y.valve", "plant.elements.<CV>.<MV or DV>.<gain|time_constants[i]"),
])
def test_a_study_key_into_the_elements_must_name_an_element_key(key, fragment, tmp_path, capsys):
    p = tmp_path / "s.toml"
    p.write_text(STUDY_SCENARIO.replace('"plant.elements.y.valve.dead_time"', repr(key)
                                        .replace("'", '"')))
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "key 'study.sweep[0].key'" in err and fragment in err, err
    assert "Traceback" not in err


def test_the_8x12_benchmark_study_checks(capsys):
    # benchmarks/studies/unit8x12.toml is kept out of scenarios/ (the CI study set): checked here,
    # its 200 cases included (the drawn plant elements exist in its matrix)
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "benchmarks" / "studies" / "unit8x12.toml"
    rc = main(["check", "--no-controllers", str(path)])
    out, err = capsys.readouterr()
    assert rc == 0, err
    assert "model transfer matrix 'unit8x12'" in out and "200 with --full" in out, out
