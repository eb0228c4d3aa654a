"""Property: every factory that takes a user spec either succeeds or raises SettingsError -- never
TypeError, KeyError, OverflowError... (junk: numbers, strings, lists, dicts, None, bools, NaN)."""

from __future__ import annotations

import math

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

import mpcproto as mp
from mpcproto.sim import SIGNAL_KINDS, FAULT_KINDS, actuator_from_spec, fault_from_spec, \
    instrument_from_spec, signal_from_spec

SCALAR = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=True, allow_infinity=True),
                   st.just(math.nan), st.text(max_size=6), st.just(10 ** 400), st.just(-(10 ** 400)))
JUNK = st.recursive(SCALAR, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=6), inner, max_size=3),
    st.dictionaries(st.one_of(st.integers(), st.booleans(), st.none()), inner, max_size=2)),
    max_leaves=6)

SIGNAL_KEYS = ["kind", "value", "at", "size", "start", "duration", "amplitude", "period",
               "phase_deg", "step_std", "interval", "low", "high", "seed", "times", "values",
               "interpolation", "path", "time_column", "value_column", "max_gap", "base"]
FAULT_KEYS = ["kind", "variable", "at", "until", "rate", "size", "position", "low", "high"]
INSTRUMENT_KEYS = ["noise_std", "bias", "lag", "dead_time", "period"]
ACTUATOR_KEYS = ["low", "high", "rate"]
LOOP_KEYS = ["cv", "mv", "gain", "integral_time", "derivative_time", "setpoint_weight",
             "derivative_filter", "tracking_time", "on_fresh"]
SETTINGS_KEYS = ["loops", "pairs", "rule", "tau_c", "lam", "mode", "step_fraction", "test_duration",
                 "fit", "extra_dead_time", "setpoint_weight", "derivative_filter", "on_fresh"]


def spec_of(keys, kinds=None, good=None):
    """A dict whose keys are mostly the real ones (so the checks past the key check are reached),
    with a real kind half the time and junk or plausible values."""
    value = st.one_of(JUNK, st.sampled_from(list(good or [0.0, 1.0, -1.0, 5.0])))
    base = st.dictionaries(st.sampled_from(keys), value, max_size=len(keys))
    if kinds is None:
        return base
    return st.tuples(base, st.one_of(st.sampled_from(list(kinds)), JUNK)).map(
        lambda bk: {**bk[0], "kind": bk[1]})


def refused_cleanly(fn, spec, **kw):
    try:
        fn(spec, **kw)
    except mp.SettingsError as exc:
        assert str(exc).startswith(kw.get("what", "")), str(exc)


FUZZ = settings(max_examples=250, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow])


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(SIGNAL_KEYS, SIGNAL_KINDS), st.lists(spec_of(SIGNAL_KEYS, SIGNAL_KINDS), max_size=2)))
def test_signal_from_spec_refuses_junk_cleanly(spec, tmp_path_factory):
    refused_cleanly(signal_from_spec, spec, what="dvs.feed", rng=0,
                    base_dir=tmp_path_factory.getbasetemp())


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(INSTRUMENT_KEYS)))
def test_instrument_from_spec_refuses_junk_cleanly(spec):
    refused_cleanly(instrument_from_spec, spec, what="instruments.level")


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(ACTUATOR_KEYS)))
def test_actuator_from_spec_refuses_junk_cleanly(spec):
    refused_cleanly(actuator_from_spec, spec, what="actuators.valve")


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(FAULT_KEYS, FAULT_KINDS, good=[0.0, 1.0, 5.0, "level"])))
def test_fault_from_spec_refuses_junk_cleanly(spec):
    refused_cleanly(fault_from_spec, spec, what="faults[0]")


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(LOOP_KEYS, good=[0.5, 1.0, 10.0, "y", "u", True])))
def test_pid_loop_from_spec_refuses_junk_cleanly(spec):
    refused_cleanly(mp.pid_loop_from_spec, spec, what="pid.loops[0]")


@pytest.fixture(scope="module")
def lag():
    """A one-lag plant y' = (u - y)/10 with a dead time of 2 (tuning it is quick)."""
    m = mp.Model("lag", time_unit="s")
    x = m.state("x", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-10.0, high=10.0)
    m.derivative(x, (m.delayed(u, 2.0) - x) / 10.0)
    m.cv("y", x)
    m.build()
    return m, mp.OperatingPoint.at(m, m.nominal("state"), m.nominal("mv"))


@settings(max_examples=150, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(spec=st.one_of(JUNK, spec_of(SETTINGS_KEYS, good=["simc", "y", "u", 1.0, 50.0, [["y", "u"]],
                                                         {"y": "u"}, [{"cv": "y", "mv": "u"}]])))
def test_pid_from_settings_refuses_junk_cleanly(lag, spec):
    m, op = lag
    try:
        mp.pid_from_settings(m, op, 1.0, spec, what="controllers.pid")
    except mp.SettingsError as exc:
        assert str(exc).startswith("controllers.pid"), str(exc)


def test_the_reported_cases():
    # the two reported crashes: an unhashable kind and a non-string loop cv
    with pytest.raises(mp.SettingsError, match=r"dvs.feed: key 'kind': expected one of: constant, .*, found a table {}"):
        signal_from_spec({"kind": {}}, what="dvs.feed")
    with pytest.raises(mp.SettingsError, match=r"pid: key 'loops\[0\].cv': expected the name of a CV of this model.*found 3"):
        mp.pid_from_settings(None, None, 1.0, {"loops": [{"cv": 3, "mv": "u"}]}, what="pid")


# model layer: transfer elements and the model registry refuse junk with a ModelError
ELEMENT_KEYS = ["gain", "time_constants", "tau", "lead", "dead_time"]


@FUZZ
@given(spec=st.one_of(JUNK, spec_of(ELEMENT_KEYS, good=[1.0, 2.0, [3.0, 1.0], 0.0]),
                      st.lists(JUNK, min_size=3, max_size=3)))
def test_transfer_element_refuses_junk_cleanly(spec):
    try:
        mp.TransferElement.coerce(spec, "elements['y']['u']")
    except mp.ModelError as exc:
        assert str(exc).startswith("elements['y']['u']"), str(exc)


@settings(max_examples=120, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(name=st.one_of(JUNK, st.sampled_from(["blending_tank", "quadruple_tank"])),
       options=st.one_of(JUNK, st.dictionaries(st.sampled_from(["outflow", "setting", "x"]), JUNK, max_size=2)),
       parameters=st.one_of(JUNK, st.dictionaries(st.sampled_from(["area", "a1", "y"]), JUNK, max_size=2)))
def test_make_model_refuses_junk_cleanly(name, options, parameters):
    try:
        mp.make_model(name, options=options, parameters=parameters)
    except mp.ModelError:
        pass
