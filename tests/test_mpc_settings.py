"""Bad settings give clear errors naming the parameter, what was expected and what was found."""

from __future__ import annotations

import numpy as np
import pytest

import mpcproto as mp


def small_model(B_shape=None):
    A = np.diag([0.9, 0.8])
    B = np.array([[0.1, 0.0], [0.0, 0.2]]) if B_shape is None else np.ones(B_shape)
    op = mp.OperatingPoint(model="two_tanks", x=np.zeros(2), u=np.zeros(2), d=np.zeros(1),
                           y=np.zeros(2), p=np.zeros(0), state_names=("h1", "h2"),
                           mv_names=("feed", "steam"), dv_names=("load",),
                           cv_names=("level", "temperature"))
    return mp.DiscreteLinearModel(A=A, B=B, Bd=np.ones((2, 1)), C=np.eye(2), D=np.zeros((2, 2)),
                                  Dd=np.zeros((2, 1)), Ts=1.0, op=op, state_names=("h1", "h2"),
                                  n_plant_states=2)


# Reference for every check here: the project's error-message convention (common practice, no
# source): the message names the setting, the expected value and the value found.
@pytest.mark.parametrize("settings, words", [
    ({"horizon": 0}, ["'horizon'", ">= 1", "0"]),
    ({"horizon": 2.5}, ["'horizon'", "int", "2.5"]),
    ({"horizon": 5, "control_horizon": 6}, ["'control_horizon'", "horizon (5)", "6"]),
    ({"cv": {"level": {"weight": -1.0}}}, ["'cv.level.weight'", ">= 0", "found -1"]),
    ({"mv": {"feed": {"move_weight": -0.1}}}, ["'mv.feed.move_weight'", ">= 0", "-0.1"]),
    ({"cv": {"level": {"low": 2.0, "high": 1.0}}}, ["'cv.level.low'", "cv.level.high", "2.0"]),
    ({"mv": {"steam": {"low": 5.0, "high": 1.0}}}, ["'mv.steam.low'", "mv.steam.high", "5.0"]),
    ({"mv": {"steam": {"max_move": 0.0}}}, ["'mv.steam.max_move'", "> 0", "found 0"]),
    ({"cv": {"levle": {"weight": 1.0}}}, ["key 'cv.levle'", "expected the name of a CV of the model", "did you mean 'level'"]),
    ({"cv": {"level": {"wieght": 1.0}}}, ["'cv.level.wieght'", "did you mean 'weight'"]),
    ({"horizn": 5}, ["unknown setting 'horizn'", "did you mean 'horizon'"]),
    ({"solver": "gurobi"}, ["'solver'", "osqp", "gurobi"]),
    ({"cv": {"level": {"disturbance": "state"}}}, ["'cv.level.disturbance'", "output", "state"]),
    ({"cv": {"level": {"scale": 0}}}, ["'cv.level.scale'", "> 0", "0"]),
    ({"cv": {"level": {"priority": 0}}}, ["'cv.level.priority'", ">= 1"]),
    ({"dv": {"load": {"feedforward": "yes"}}}, ["'dv.load.feedforward'", "true or false", "yes"]),
    ({"solver": "osqp", "solver_options": {"eps_abss": 1e-4}}, ["eps_abss", "did you mean 'eps_abs'"]),
    ({"solver_options": {"primal_tl": 1e-9}}, ["daqp option", "did you mean 'primal_tol'"]),
    ({"solver": "clarabel", "solver_options": {"max_iters": 5}},
     ["key 'solver_options.max_iters': expected a clarabel option", "did you mean 'max_iter'"]),
    ({"terminal_cost": True, "steady_target": False}, ["'terminal_cost'", "steady_target"]),
    ({"priority_ratio": 1.0}, ["'priority_ratio'", "> 1"]),
    ({"backup_solver": "ecos"}, ["'backup_solver'", "'none'", "ecos"]),
])
def test_bad_settings_are_named(settings, words):
    with pytest.raises(mp.SettingsError) as exc:
        mp.PredictiveController.from_settings(small_model(), settings)
    msg = str(exc.value)
    for w in words:
        assert w in msg, (w, msg)


def test_constructor_stores_and_build_validates():
    ctrl = mp.PredictiveController(small_model(), horizon=0)     # storing never fails
    with pytest.raises(mp.SettingsError, match="'horizon'"):
        ctrl.build()


def test_wrong_matrix_shape_names_both_shapes():
    with pytest.raises(mp.SettingsError) as exc:
        mp.PredictiveController(small_model(B_shape=(2, 3)), horizon=5).build()
    msg = str(exc.value)
    assert "dmodel.B" in msg and "(2, 2)" in msg and "(2, 3)" in msg


def test_use_before_build_says_what_to_call():
    ctrl = mp.PredictiveController(small_model(), horizon=5)
    with pytest.raises(mp.NotBuiltError, match=r"\.build\(\)"):
        ctrl.reset()
    with pytest.raises(mp.NotBuiltError, match=r"\.build\(\)"):
        ctrl.step(0.0, mp.Measurement.now([0, 0], 0.0), [0.0], None)


def test_bad_run_time_targets_are_named():
    ctrl = mp.PredictiveController(small_model(), horizon=5).build()
    ctrl.reset()
    meas = mp.Measurement.now([0.0, 0.0], 0.0)
    bad_len = mp.Targets(setpoint=np.zeros(3), cv_low=np.full(2, -np.inf),
                         cv_high=np.full(2, np.inf), mv_low=np.zeros(2), mv_high=np.ones(2))
    with pytest.raises(mp.SettingsError, match=r"key 'targets.setpoint': expected 2 entries \(model order\)"):
        ctrl.step(0.0, meas, [0.0], bad_len)
    crossed = mp.Targets(setpoint=np.zeros(2), cv_low=np.full(2, -np.inf),
                         cv_high=np.full(2, np.inf), mv_low=np.array([0.0, 2.0]),
                         mv_high=np.array([1.0, 1.0]))
    with pytest.raises(mp.SettingsError, match="key 'targets.mv_low.steam': expected MV 'steam' with its low limit at or below its high limit 1, found 2"):
        ctrl.step(0.0, meas, [0.0], crossed)


def test_output_disturbance_on_an_integrating_cv_is_refused():
    # Reference: Pannocchia & Rawlings (2003) detectability condition -- a bias on the output of
    # an integrator cannot be told apart from the integrating state.
    m = small_model()
    m.A[0, 0] = 1.0
    with pytest.raises(mp.SettingsError, match="integrates"):
        mp.PredictiveController(m, horizon=5, steady_target=True,
                                cv={"level": {"disturbance": "output"}}).build()
    # 'auto' picks an input disturbance for it and builds
    mp.PredictiveController(m, horizon=5).build()


def test_bad_forecast_is_refused_before_the_estimator_moves():
    ctrl = mp.PredictiveController(small_model(), horizon=5).build()
    ctrl.reset()
    tg = mp.Targets(setpoint=np.zeros(2), cv_low=np.full(2, -np.inf), cv_high=np.full(2, np.inf),
                    mv_low=np.zeros(2), mv_high=np.ones(2))
    meas = mp.Measurement.now([0.0, 0.0], 0.0)
    with pytest.raises(mp.SettingsError, match=r"key 'dv_forecast': expected shape \(n, 1\)"):
        ctrl.step(0.0, meas, [0.0], tg, dv_forecast=np.zeros((4, 3)))
    ctrl.step(0.0, meas, [0.0], tg, dv_forecast=np.zeros((4, 1)))   # same sample, now accepted
