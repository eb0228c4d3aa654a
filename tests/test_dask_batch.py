"""The same study on a real Dask LocalCluster (2 worker processes) and on the local process pool:
same case ids, same seeds, same numbers."""

from __future__ import annotations

import json

import pytest

from mpcproto.cli import main
from mpcproto.scenario import expand, load_scenario
from mpcproto import dask_executor, load_results, local_pool, run_batch
from mpcproto._deps import dask_executor_client
from mpcproto.scenario.executors import executor_slots
from test_batch_cli import write_study

distributed = pytest.importorskip("distributed")

# measured on the machine, not part of the closed-loop result
TIMING = {"elapsed_s", "worker_pid", "median_solve_ms", "p95_solve_ms", "worst_fraction",
          "median_step_ms", "p95_step_ms", "worst_qp_fraction",
          "slow_steps", "solve_ms", "cpu_s"}


def _without_timing(v):
    if isinstance(v, dict):
        return {k: _without_timing(x) for k, x in v.items() if k not in TIMING}
    if isinstance(v, list):
        return [_without_timing(x) for x in v]
    return v


def test_dask_local_cluster_gives_the_numbers_of_the_local_pool(tmp_path):
    study = write_study(tmp_path)
    cases = expand(load_scenario(study))
    assert len(cases) == 4
    with local_pool(2) as ex:
        run_batch(cases, tmp_path / "pool", executor=ex, progress=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, silence_logs=40) as cluster:
        with dask_executor(cluster.scheduler_address) as ex:
            assert executor_slots(ex) == 2
            out = run_batch(cases, tmp_path / "dask", executor=ex, progress=False)
            pids = {r["worker_pid"] for r in load_results(tmp_path / "dask" / "results.jsonl")}
            worker_pids = set(dask_executor_client(ex).run(lambda: __import__("os").getpid()).values())
        # the CLI's --scheduler path on the same cluster
        rc = main(["batch", str(study), "--out", str(tmp_path / "cli"), "--scheduler",
                   cluster.scheduler_address, "--no-trajectories"])
        assert rc == 0
        cli = {r["case_id"]: r for r in load_results(tmp_path / "cli" / "results.jsonl")}
        assert {r["worker_pid"] for r in cli.values()} <= worker_pids
    assert out.ran == 4 and out.errors == 0
    assert pids <= worker_pids                    # the cases ran in the cluster's processes
    pool = {r["case_id"]: r for r in load_results(tmp_path / "pool" / "results.jsonl")}
    dask = {r["case_id"]: r for r in load_results(tmp_path / "dask" / "results.jsonl")}
    assert sorted(pool) == sorted(dask) == sorted(c.case_id for c in cases)
    for cid in pool:
        a, b = _without_timing(pool[cid]), _without_timing(dask[cid])
        assert a["seed"] == b["seed"] and a["params"] == b["params"]
        # identical floats: same seeds, same integrator, same code path
        assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)
        assert a["controllers"]["pid"]["kpi"]["cv"]["level"]["iae"] > 0
        assert json.dumps(_without_timing(cli[cid]), sort_keys=True) == json.dumps(a, sort_keys=True)


def test_an_unreachable_scheduler_is_a_clear_error():
    from mpcproto import SettingsError

    with pytest.raises(SettingsError, match="dask_executor: key 'address': .*found 'tcp://127.0.0.1:9', "
                                            "which could not be reached"):
        with dask_executor("tcp://127.0.0.1:9", timeout=2):
            pass
