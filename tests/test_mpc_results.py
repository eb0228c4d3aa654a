"""The predictive controller's results as small dataclasses read as mappings.

Contract checks of this package (no outside reference): the plan, the step diagnostics and the
resolved settings are dataclasses; the simulator and the reports read them as mappings, so a field
a step did not fill is no key, arrays of the steady target read as lists, an unknown key is
refused, and the simulator's own timing of the step is what the trajectory records.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import mpcproto as mp
from _plants import first_order, op0
from mpcproto.control.mpc_results import ABSENT, PlanResult, StepDiagnostics
from mpcproto.control.mpc_settings import ResolvedSettings


def controller(**kw):
    m = first_order()
    dm = mp.linearize(m, op0(m)).discretize(1.0)
    return m, mp.PredictiveController(dm, horizon=20, mv={"u": {"low": -5.0, "high": 5.0}},
                                      **kw).build()


def targets(sp):
    return mp.Targets(setpoint=np.array([sp]), cv_low=np.array([-np.inf]),
                      cv_high=np.array([np.inf]), mv_low=np.array([-np.inf]),
                      mv_high=np.array([np.inf]))


def test_step_diagnostics_mapping_view_matches_the_fields():
    _m, ctl = controller()
    ctl.reset()
    out = ctl.step(0.0, mp.Measurement.now(ctl.dmodel.op.y, 0.0), [], targets(1.0))
    d = out.diagnostics
    assert isinstance(d, StepDiagnostics) and dataclasses.is_dataclass(d)
    plain = d.to_dict()
    assert list(plain) == list(d) and len(d) == len(plain)
    # the steady target's values are arrays in the fields, lists in the view
    assert isinstance(d.target_u, np.ndarray) and plain["target_u"] == d.target_u.tolist()
    # DAQP's own entries are there (the default solver), a fault entry not filled is no key
    assert d["solver"] == "daqp" and "exit_flag" in d and "first_solver_status" not in d
    assert d.first_solver_status is ABSENT and d.get("mvs_not_following") is None
    with pytest.raises(KeyError, match="no entry"):
        d["no_such_entry"] = 1.0
    assert plain["solve_ms"] == d.solve_ms and plain["counts"]["steps"] == 1


def test_steady_target_entries_absent_without_a_steady_target():
    _m, ctl = controller(steady_target=False)
    ctl.reset()
    d = ctl.step(0.0, mp.Measurement.now(ctl.dmodel.op.y, 0.0), [], targets(1.0)).diagnostics
    assert not any(k.startswith("target_") and k != "target_ms" for k in d)


def test_plan_result_reads_as_mapping_and_by_attribute():
    _m, ctl = controller()
    ctl.reset()
    p = ctl.plan(np.zeros(ctl.dmodel.nx), targets(0.5))
    assert isinstance(p, PlanResult) and p.accepted and p["accepted"] is True
    assert p["u"] is p.u and p.u_plan.shape[0] == 1 and set(p) >= {"u", "u_plan", "y_pred"}
    assert isinstance(p["diagnostics"], StepDiagnostics)


def test_resolved_settings_are_frozen_and_read_as_mapping():
    _m, ctl = controller()
    r = ctl.validate()
    assert isinstance(r, ResolvedSettings) and r["N"] == r.N == 20
    assert set(r) == {f.name for f in dataclasses.fields(r)}
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.N = 3


def test_trajectory_records_the_simulators_step_time_not_the_controllers():
    # A controller claiming 1e9 ms per step: the simulator's own timing of the call is recorded.
    m, ctl = controller()

    class Claims:
        name = "claims"

        def reset(self, op, t0=0.0):
            ctl.reset(op, t0)

        def step(self, t, meas, dv, tg, dv_forecast=None, *, u_applied=None):
            out = ctl.step(t, meas, dv, tg, dv_forecast, u_applied=u_applied)
            out.diagnostics["step_ms"] = 1e9
            return out

    tr = mp.simulate(m, Claims(), op=op0(m), Ts=1.0, duration=20.0,
                     setpoints={"y": {"kind": "step", "at": 5.0, "size": 1.0}})
    assert tr.success
    ms = tr.columns["diag.step_ms"]
    assert np.all(ms > 0) and np.all(ms < 1e9)
    # every other entry of the view is recorded: numbers as diag.KEY, per-MV values per name
    assert "diag.solve_ms" in tr.columns and "diag.target_u.u" in tr.columns
