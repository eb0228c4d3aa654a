"""The shipped user-model examples (a model file beside its scenario; a step-test transfer matrix
as the controller's model of a nonlinear plant), a model registered by an installed package and a
transfer-matrix plant written in TOML,
in a batch on the local process pool and on a real Dask LocalCluster: the workers rebuild every
model from the same plain reference and give the same numbers."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import pytest

from mpcproto import dask_executor, load_results, local_pool, run_batch
from mpcproto.scenario import expand, load_scenario
from test_dask_batch import _without_timing
from test_model_references import install_entry_point, study
from test_transfer_table import TM_SCENARIO

distributed = pytest.importorskip("distributed")

ROOT = Path(__file__).resolve().parents[1]


def test_user_models_give_the_same_numbers_on_the_pool_and_on_dask(tmp_path, monkeypatch):
    install_entry_point(tmp_path, monkeypatch)          # PYTHONPATH: the workers see the package
    (tmp_path / "matrix.toml").write_text(TM_SCENARIO.replace(
        "EDIT", "valve = { gain = 1.0, time_constants = [3.0] }"))
    files = [ROOT / "scenarios" / "syrup_mixer" / "syrup_mixer.toml",
             ROOT / "scenarios" / "caustic_step_test.toml",
             study(tmp_path, "acme_drum", name="registered.toml"), tmp_path / "matrix.toml"]
    # shortened runs (the same for both executors): half of each study's CI length
    short = {"syrup_mixer": 90.0, "caustic_step_test": 1500.0, "registered": 120.0, "matrix": 30.0}
    cases = [replace(c, params={**c.params, "scenario.duration": short[c.scenario]}, ci=False)
             for f in files for c in expand(load_scenario(f))]
    with local_pool(2) as ex:
        run_batch(cases, tmp_path / "pool", executor=ex, progress=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, silence_logs=40) as cluster:
        with dask_executor(cluster.scheduler_address) as ex:
            out = run_batch(cases, tmp_path / "dask", executor=ex, progress=False)
    assert out.errors == 0
    pool = {r["case_id"]: r for r in load_results(tmp_path / "pool" / "results.jsonl")}
    dask = {r["case_id"]: r for r in load_results(tmp_path / "dask" / "results.jsonl")}
    assert sorted(pool) == sorted(dask) == sorted(c.case_id for c in cases)
    assert {pool[c]["model"] for c in pool} == {"syrup_mixer", "blending_tank", "drum", "plant"}
    for cid in pool:
        assert pool[cid]["status"] == "ok" and pool[cid]["passed"], pool[cid]["message"]
        # identical floats: same seeds, same integrator, same models rebuilt from the reference
        assert json.dumps(_numbers(pool[cid]), sort_keys=True) == \
            json.dumps(_numbers(dask[cid]), sort_keys=True)


def _numbers(rec):
    """The record without what the machine measures (wall times, and the solve-time criterion's
    value, a wall time too)."""
    out = _without_timing(rec)
    for block in out["controllers"].values():
        block["criteria"] = [c for c in block["criteria"] if c["check"] != "solve_time_below"]
    return out
