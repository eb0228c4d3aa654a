"""Model definition errors: each bad definition gives a ModelError that names the culprit.

Reference for what must be refused: the definition rules of issue 2 (a state without a derivative, an
unknown or duplicate name, a wrong shape, a non-finite or out-of-bounds nominal value, an expression
on an undeclared symbol) -- common practice, no source.
"""

import math

import casadi as ca
import pytest

import mpcproto as mp


def _tank(height=3.0, level=1.0):
    m = mp.Model("tank", time_unit="s")
    area = m.parameter("area", 2.0, unit="m2", low=0.0)
    h = m.state("level_state", nominal=level, unit="m", low=0.0, high=height)
    qin = m.mv("inflow", nominal=0.1, unit="m3/s", low=0.0, high=0.5)
    qout = m.dv("draw", nominal=0.1, unit="m3/s", low=0.0, high=0.5)
    return m, area, h, qin, qout


def test_state_without_derivative_is_named():
    m, area, h, qin, qout = _tank()
    m.cv("level", h)
    with pytest.raises(mp.ModelError, match=r"state 'level_state' has no derivative"):
        m.build()


def test_unknown_name_in_derivative_suggests_the_close_one():
    m, area, h, qin, qout = _tank()
    with pytest.raises(mp.ModelError, match=r"'level_stat' is an unknown name \(did you mean 'level_state'\?\)"):
        m.derivative("level_stat", qin - qout)


def test_duplicate_name_is_named_with_both_roles():
    m, *_ = _tank()
    with pytest.raises(mp.ModelError, match=r"'inflow' is declared twice \(first as mv, now as dv\)"):
        m.dv("inflow", nominal=0.0)


def test_non_identifier_name_is_refused():
    m = mp.Model("x")
    with pytest.raises(mp.ModelError, match=r"identifier.*'feed flow'"):
        m.mv("feed flow", nominal=0.0)


def test_wrong_shape_of_a_derivative_names_it_and_the_shape():
    m, area, h, qin, qout = _tank()
    m.derivative(h, ca.vertcat(qin, qout))
    m.cv("level", h)
    with pytest.raises(mp.ModelError, match=r"derivative of 'level_state' must be a scalar.*\(2, 1\)"):
        m.build()


def test_non_finite_nominal_is_named():
    m = mp.Model("x")
    s = m.state("temp", nominal=math.nan, low=0.0, high=100.0)
    m.derivative(s, -s)
    m.cv("t", s)
    with pytest.raises(mp.ModelError, match=r"state 'temp' has a non-finite nominal value nan"):
        m.build()


def test_level_above_the_tank_is_refused():
    m, area, h, qin, qout = _tank(height=2.0, level=2.5)
    m.derivative(h, (qin - qout) / area)
    m.cv("level", h)
    with pytest.raises(mp.ModelError, match=r"state 'level_state' has nominal value 2.5 m outside its physical bounds \[0, 2\]"):
        m.build()


def test_blending_tank_lower_than_its_level_is_refused():
    # the library tank runs at 1.2 m: a 1.0 m wall cannot hold it
    with pytest.raises(mp.ModelError, match=r"state 'h' has nominal value 1.2 m outside .*\[0, 1\]"):
        mp.make_model("blending_tank", parameters={"height": 1.0})


def test_negative_density_is_refused():
    with pytest.raises(mp.ModelError, match=r"parameter 'density' has nominal value -1000 kg/m3 outside"):
        mp.make_model("blending_tank", parameters={"density": -1000.0})


def test_expression_on_an_undeclared_symbol_is_named():
    m, area, h, qin, qout = _tank()
    k = ca.SX.sym("valve_k")
    m.derivative(h, (qin - k * ca.sqrt(h)) / area)
    m.cv("level", h)
    with pytest.raises(mp.ModelError, match=r"derivative of 'level_state' depends on the undeclared symbol 'valve_k'"):
        m.build()


def test_cv_on_an_undeclared_symbol_is_named():
    m, area, h, qin, qout = _tank()
    m.derivative(h, (qin - qout) / area)
    m.cv("level", h + ca.SX.sym("offset"))
    with pytest.raises(mp.ModelError, match=r"CV 'level' depends on the undeclared symbol 'offset'"):
        m.build()


def test_all_errors_are_reported_at_once():
    m = mp.Model("x")
    a = m.state("a", nominal=5.0, low=0.0, high=1.0)
    m.state("b", nominal=0.0)
    m.cv("y", a)
    with pytest.raises(mp.ModelError) as exc:
        m.build()
    msg = str(exc.value)
    assert "state 'a' has no derivative" in msg
    assert "state 'b' has no derivative" in msg
    assert "state 'a' has nominal value 5" in msg


def test_using_a_model_before_build_says_what_to_call():
    m, area, h, qin, qout = _tank()
    m.derivative(h, (qin - qout) / area)
    m.cv("level", h)
    with pytest.raises(mp.NotBuiltError, match=r"call model.build\(\) first"):
        mp.steady_states(m)


# --------------------------------------------------------------------------- model registry


def test_unknown_model_suggests_the_close_one():
    with pytest.raises(mp.ModelError, match=r"unknown model 'blending_tnk' \(did you mean 'blending_tank'\?\).*henson_seborg_cstr"):
        mp.make_model("blending_tnk")


def test_unknown_option_and_value_are_named():
    with pytest.raises(mp.ModelError, match=r"no option 'outlfow' \(did you mean 'outflow'\?\)"):
        mp.make_model("blending_tank", options={"outlfow": "mv"})
    with pytest.raises(mp.ModelError, match=r"option 'outflow' must be one of 'dv', 'mv', 'valve'; got 'vlave' \(did you mean 'valve'\?\)"):
        mp.make_model("blending_tank", options={"outflow": "vlave"})
    with pytest.raises(mp.ModelError, match=r"option 'setting' must be one of"):
        mp.make_model("quadruple_tank", options={"setting": True})


def test_unknown_or_bad_parameter_is_named():
    with pytest.raises(mp.ModelError, match=r"no parameter 'volum' \(did you mean 'volume'\?\)"):
        mp.make_model("henson_seborg_cstr", parameters={"volum": 50.0})
    with pytest.raises(mp.ModelError, match=r"parameter 'volume' must be a finite number; got inf"):
        mp.make_model("henson_seborg_cstr", parameters={"volume": math.inf})
    # the valve coefficient exists only with the valve option
    with pytest.raises(mp.ModelError, match=r"no parameter 'valve_coefficient'"):
        mp.make_model("blending_tank", parameters={"valve_coefficient": 1.0})


# --------------------------------------------------------------------------- transfer-matrix plants


def _tm(elements, **kw):
    return mp.transfer_matrix_model("plant", mvs=["valve"], cvs=["level"], elements=elements, **kw)


@pytest.mark.parametrize("element, pattern", [
    ({"gain": 1.0, "time_constants": [1.0, 2.0, 3.0]}, r"\['level'\]\['valve'\]: at most two time constants"),
    ({"gain": 1.0, "tau": 2.0, "dead_time": -1.0}, r"\['level'\]\['valve'\]: the dead time must be a finite number >= 0; got -1.0"),
    ({"gain": 1.0, "tau": 0.0}, r"a time constant must be a finite number > 0; got 0.0"),
    ({"gain": 1.0, "lead": 2.0}, r"a lead needs at least one time constant"),
    ({"gain": math.nan, "tau": 1.0}, r"the gain must be a finite number; got nan"),
    ({"gian": 1.0, "tau": 1.0}, r"unknown key 'gian' \(did you mean 'gain'\?\)"),
    ("fast", r"expected a TransferElement"),
])
def test_bad_transfer_element_is_named(element, pattern):
    with pytest.raises(mp.ModelError, match=pattern):
        _tm({"level": {"valve": element}})


def test_transfer_matrix_unknown_names_and_shapes():
    with pytest.raises(mp.ModelError, match=r"names the CV 'levle', which is not declared \(did you mean 'level'\?\)"):
        _tm({"levle": {"valve": (1.0, 1.0, 0.0)}})
    with pytest.raises(mp.ModelError, match=r"names the input 'valev', which is not declared \(did you mean 'valve'\?\)"):
        _tm({"level": {"valev": (1.0, 1.0, 0.0)}})
    with pytest.raises(mp.ModelError, match=r"must have 1 rows \(CVs\) of 1 elements \(inputs\); got 1 rows of \[2\]"):
        _tm([[(1.0, 1.0, 0.0), (2.0, 1.0, 0.0)]])
    with pytest.raises(mp.ModelError, match=r"dv_elements given but no DVs declared"):
        _tm([[(1.0, 1.0, 0.0)]], dv_elements=[[(1.0, 1.0, 0.0)]])
