"""Batch scaling: 1 vs 2 local workers vs a Dask LocalCluster of 2 workers, and parent memory.

Run:  python benchmarks/bench_batch.py          (about 3-5 minutes on 2 cores)
      python benchmarks/bench_batch.py --quick  (8 cases instead of 32; a smoke run)

What it measures
----------------
1. Per-worker start-up cost: from creating a pool of one worker to the first answer of a task that
   imports the package's scenario runner (a worker ready to run a case), for each start method
   (fork, forkserver, spawn), and for a Dask LocalCluster of 2 worker processes (cluster start plus
   the same import on both workers).
2. The same 32 real closed-loop cases (our own blending-tank study, below: MPC and PID, 4 draw-off
   surge sizes x 8 Monte Carlo draws of the outlet loss coefficient) on 1 local worker, 2 local
   workers and a Dask LocalCluster of 2 workers.  Workers are started and warmed (one run of the
   nominal case builds the models) before the clock starts, so the wall times compare the batch
   itself; start-up is reported separately and also added in "cold" figures.  The three set-ups
   run interleaved in ``--rounds`` rounds (default 2) and the best round of each is reported.
   Parallel efficiency = T(1 worker) / (2 x T(2 workers)); targets: >= 0.9 local pool, >= 0.85 Dask.
   All three runs must give identical results (same ids, seeds and numbers).
   Two load-independent figures explain an efficiency below target: "slots busy" = time spent
   inside cases / (workers x wall time) -- what the runner itself loses to scheduling, pickling and
   writing is 1 minus it -- and "CPU share" = CPU time / wall time inside cases, below 1 when other
   processes on the machine took the cores.  "CPU eff." = (CPU time of the 1-worker run / CPU
   time of this run) x (slots busy / slots busy of the 1-worker run): the efficiency this run would
   reach with a core per worker, an estimate for a busy machine.
   Baseline in the same run: the same cases split statically over 1 and 2 plain forked processes
   (no executor, no results file, workers warmed the same way): the efficiency the machine itself
   allows (two vCPUs may not be two free physical cores).  "vs bare" = efficiency / that.
3. Peak memory of the parent process for 100, 1,000 and 3,000 cheap cases (a 20-sample CasADi tank
   integration each, cases generated lazily), each in a fresh process: peak RSS (ru_maxrss) and
   tracemalloc's peak of Python allocations during ``run_batch``.  It must not grow with the number
   of cases (the runner keeps a bounded window of cases in flight and streams results to disk).

Figures are ratios or differences measured in the same run (the machine is shared and noisy): the
one-minute load average before each part is recorded beside the figures.

Writes a table to stdout and JSON to benchmarks/results/bench_batch.json.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"

# Our own study on the package's blending tank (numbers of our invention).
STUDY = """
[scenario]
name = "bench_blend"
sample_time = 10.0
duration = {duration}
seed = 4242

[plant]
model = "blending_tank"
options = { outflow = "dv" }
parameters = { loss_coefficient = 0.035 }

[operating_point]
dvs = { draw_off = 1.6 }
targets = { level = 1.1, concentration = 2.5, temperature = 72.0 }

[disturbances]
draw_off = { kind = "pulse", at = 100.0, duration = 300.0, size = 0.4 }

[instruments]
level = { noise_std = 0.002 }
concentration = { noise_std = 0.01, period = 60.0, dead_time = 60.0 }
temperature = { noise_std = 0.05 }

[controllers.mpc]
horizon = 20
control_horizon = 4
steady_target = false
cv = { level = { disturbance = "auto" } }
mv = { caustic_flow = { scale = 0.01 }, water_flow = { scale = 0.1 }, heater_duty = { scale = 20.0 } }

[controllers.pid]
rule = "simc"
pairs = { level = "water_flow", concentration = "caustic_flow", temperature = "heater_duty" }

[[criteria]]
check = "low_above"
variable = "level"
limit = 0.7

[study]
draws = {draws}

[[study.sweep]]
key = "disturbances.draw_off.size"
values = [0.2, 0.4, 0.6, 0.8]

[[study.draw]]
key = "plant.parameters.loss_coefficient"
distribution = "uniform"
low = 0.03
high = 0.04
"""

TIMING_KEYS = {"elapsed_s", "worker_pid", "median_solve_ms", "p95_solve_ms", "worst_fraction",
               "median_step_ms", "p95_step_ms", "worst_qp_fraction",
               "slow_steps", "solve_ms", "cpu_s"}


# ------------------------------------------------------------------------------- worker functions
def _ready() -> int:
    """A worker ready to run a case: the scenario runner imported."""
    import mpcproto.scenario.runner  # noqa: F401, PLC0415

    return os.getpid()


def _ready_and_hold(seconds: float) -> int:
    pid = _ready()
    time.sleep(seconds)
    return pid


def _warm(scenario) -> None:
    """Run the nominal case once: builds and caches the models in this worker."""
    from mpcproto.scenario import run_case  # noqa: PLC0415

    run_case(scenario)


def _bare_worker(cases, scenario, start, queue) -> None:
    """Baseline without any batch runner: warm up, wait for the start signal, run a fixed share."""
    from mpcproto.scenario import run_case  # noqa: PLC0415
    from mpcproto.scenario.executors import limit_blas_threads  # noqa: PLC0415

    limit_blas_threads(1)
    _warm(scenario)
    queue.put("ready")
    start.wait()
    for c in cases:
        run_case(c)
    queue.put("done")


def run_bare(nproc: int, cases, scenario) -> dict:
    """The same cases split statically over *nproc* plain processes (no executor, no results file):
    the parallel speed-up the machine itself allows."""
    import multiprocessing  # noqa: PLC0415

    ctx = multiprocessing.get_context("fork")
    start, queue = ctx.Event(), ctx.Queue()
    procs = [ctx.Process(target=_bare_worker, args=(cases[i::nproc], scenario, start, queue))
             for i in range(nproc)]
    load = _load()
    for p in procs:
        p.start()
    for _ in procs:
        queue.get()
    t0 = time.perf_counter()
    start.set()
    for _ in procs:
        queue.get()
    wall = time.perf_counter() - t0
    for p in procs:
        p.join()
    return {"workers": nproc, "wall_s": wall, "cases": len(cases), "load_before": load}


_TANK: dict = {}


@dataclass(frozen=True)
class CheapCase:
    case_id: str
    seed: int


def cheap_case(case: CheapCase) -> dict:
    """A cheap real case: 20 samples of a CasADi-integrated tank with seeded inflow noise."""
    import casadi as ca  # noqa: PLC0415
    import numpy as np  # noqa: PLC0415

    if "f" not in _TANK:
        h, q = ca.MX.sym("h"), ca.MX.sym("q")
        _TANK["f"] = ca.integrator("tank", "cvodes",
                                   {"x": h, "p": q, "ode": (q - 0.12 * ca.sqrt(ca.fmax(h, 0))) / 1.5},
                                   0.0, 1.0)
    rng = np.random.default_rng(case.seed)
    h, iae = 1.0, 0.0
    for _ in range(20):
        h = float(_TANK["f"](x0=h, p=0.12 + 0.01 * rng.standard_normal())["xf"])
        iae += abs(1.0 - h)
    return {"case_id": case.case_id, "scenario": "cheap", "seed": case.seed, "status": "ok",
            "controllers": {"none": {"kpi": {"cv": {"level": {"iae": iae}}},
                                     "criteria": [{"name": "iae", "value": iae, "limit": 5.0,
                                                   "passed": iae < 5.0}]}},
            "passed": iae < 5.0}


# ------------------------------------------------------------------------------------- helpers
def _load() -> float:
    return round(os.getloadavg()[0], 2)


def _strip(v):
    if isinstance(v, dict):
        return {k: _strip(x) for k, x in v.items() if k not in TIMING_KEYS}
    if isinstance(v, list):
        return [_strip(x) for x in v]
    return v


def _diff(a, b, path=""):
    """Paths where two plain-data trees differ (first few)."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for k in sorted(set(a) | set(b)):
            out += _diff(a.get(k), b.get(k), f"{path}.{k}")
        return out
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        out = []
        for i, (x, y) in enumerate(zip(a, b)):
            out += _diff(x, y, f"{path}[{i}]")
        return out
    return [] if a == b else [f"{path}: {str(a)[:40]} != {str(b)[:40]}"]


def _numbers(path: Path) -> dict:
    from mpcproto import load_results  # noqa: PLC0415

    return {r["case_id"]: json.dumps(_strip(r), sort_keys=True) for r in load_results(path)}


def startup_costs() -> dict:
    from mpcproto import local_pool  # noqa: PLC0415
    from mpcproto.scenario.executors import START_METHODS  # noqa: PLC0415

    out = {}
    for method in START_METHODS:
        t0 = time.perf_counter()
        with local_pool(1, start_method=method) as ex:
            ex.submit(_ready).result()
        out[method] = time.perf_counter() - t0
    return out


def run_local(workers: int, cases, scenario, out_dir: Path) -> dict:
    from mpcproto import local_pool, run_batch  # noqa: PLC0415

    load = _load()
    t0 = time.perf_counter()
    ex = local_pool(workers, initializer=_warm, initargs=(scenario,))
    # every worker starts, warms, and answers one probe (held long enough that each takes one)
    pids = {f.result() for f in [ex.submit(_ready_and_hold, 0.5) for _ in range(workers)]}
    ready = time.perf_counter() - t0
    try:
        out = run_batch(cases, out_dir, executor=ex, progress=False)
    finally:
        ex.shutdown()
    return {"workers": workers, "distinct_warm_workers": len(pids), "startup_and_warm_s": ready,
            "wall_s": out.wall_s, "cold_wall_s": ready + out.wall_s, "cases": out.ran,
            "errors": out.errors, "load_before": load}


def run_dask(cases, scenario, out_dir: Path) -> dict:
    import distributed  # noqa: PLC0415

    from mpcproto import dask_executor, run_batch  # noqa: PLC0415

    load = _load()
    t0 = time.perf_counter()
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=None, silence_logs=40)
    client = distributed.Client(cluster)
    try:
        client.run(_ready)
        startup = time.perf_counter() - t0
        client.run(_warm, scenario)
        ready = time.perf_counter() - t0
        with dask_executor(cluster.scheduler_address) as ex:
            out = run_batch(cases, out_dir, executor=ex, progress=False)
    finally:
        client.close()
        cluster.close()
    return {"workers": 2, "cluster_startup_s": startup, "startup_and_warm_s": ready,
            "wall_s": out.wall_s, "cold_wall_s": ready + out.wall_s, "cases": out.ran,
            "errors": out.errors, "load_before": load}


def memory_child(n: int) -> dict:
    """In a fresh process: parent-side peak memory of a batch of *n* cheap cases."""
    import tracemalloc  # noqa: PLC0415

    from mpcproto import run_batch  # noqa: PLC0415

    def gen():
        for i in range(n):
            yield CheapCase(f"cheap-{i:05d}", 1000 + i)

    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    with tempfile.TemporaryDirectory() as tmp:
        tracemalloc.start()
        t0 = time.perf_counter()
        out = run_batch(gen(), tmp, workers=2, run=cheap_case, progress=False)
        wall = time.perf_counter() - t0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        size = (Path(tmp) / "results.jsonl").stat().st_size
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return {"cases": n, "ran": out.ran, "wall_s": wall, "tracemalloc_peak_kib": peak / 1024,
            "peak_rss_mib": rss_after / 1024, "rss_growth_during_batch_mib": (rss_after - rss_before) / 1024,
            "results_file_kib": size / 1024}


def memory_scaling(sizes) -> list[dict]:
    rows = []
    for n in sizes:
        cp = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--memory-child", str(n)],
                            capture_output=True, text=True, check=True)
        rows.append(json.loads(cp.stdout.strip().splitlines()[-1]))
    return rows


# ----------------------------------------------------------------------------------------- main
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="8 cases instead of 32 (smoke run)")
    ap.add_argument("--memory-child", type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--skip-dask", action="store_true", help="leave out the Dask LocalCluster")
    ap.add_argument("--duration", type=float, default=9000.0,
                    help="simulated seconds per case (Ts = 10 s; default 9000: about 1 s of CPU)")
    ap.add_argument("--rounds", type=int, default=2,
                    help="interleaved repetitions; the best round of each set-up is reported")
    args = ap.parse_args(argv)
    if args.memory_child is not None:
        print(json.dumps(memory_child(args.memory_child)))
        return 0

    from mpcproto.scenario import expand, load_scenario  # noqa: PLC0415

    RESULTS.mkdir(parents=True, exist_ok=True)
    draws = 2 if args.quick else 8
    report: dict = {"machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                                "platform": platform.platform()},
                    "workload": f"real closed-loop cases (MPC + PID on the blending tank, "
                                f"{args.duration:g} s at Ts = 10 s), our own study 'bench_blend'; "
                                "memory part: cheap CasADi tank integrations"}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        study = tmp / "bench_blend.toml"
        study.write_text(STUDY.replace("{draws}", str(draws))
                         .replace("{duration}", f"{float(args.duration):.1f}"))
        scenario = load_scenario(study)
        cases = expand(scenario)
        report["cases"] = len(cases)
        print(f"bench_batch: {len(cases)} cases; load average {_load()}", flush=True)

        report["startup_s"] = startup_costs()
        print("  start-up per worker:", {k: round(v, 2) for k, v in report["startup_s"].items()},
              flush=True)
        from mpcproto import load_results  # noqa: PLC0415

        names = ["local_1", "local_2"] + ([] if args.skip_dask else ["dask_2"])
        bare: dict[str, list[dict]] = {"bare_1": [], "bare_2": []}
        rounds: dict[str, list[dict]] = {n: [] for n in names}
        ref = None
        report["identical_results"] = {n: True for n in names}
        report["differences"] = {}
        for rnd in range(args.rounds):   # interleaved, so that every set-up sees similar load
            for name in names:
                d = tmp / f"{name}_{rnd}"
                r = (run_dask(cases, scenario, d) if name == "dask_2"
                     else run_local(int(name[-1]), cases, scenario, d))
                recs = load_results(d / "results.jsonl")
                in_cases = sum(x["elapsed_s"] for x in recs)
                # share of the worker slots' wall time spent inside cases (the runner's own
                # overhead is the rest), and share of that time the workers actually got a CPU
                # (the rest went to other processes on the machine)
                r["slot_utilisation"] = in_cases / (r["workers"] * r["wall_s"])
                r["cpu_s_total"] = sum(x["cpu_s"] for x in recs)
                r["cpu_share_in_cases"] = r["cpu_s_total"] / in_cases
                nums = _numbers(d / "results.jsonl")
                if ref is None:
                    ref = nums
                elif nums != ref:
                    report["identical_results"][name] = False
                    found = []
                    for cid in sorted(ref):
                        found += [f"{cid}{p}" for p in _diff(json.loads(ref[cid]),
                                                             json.loads(nums.get(cid, "{}")))]
                    report["differences"].setdefault(name, {"count": len(found), "first": found[:8]})
                    print(f"  {name}: {len(found)} numbers differ from the first run, e.g. "
                          f"{found[:2]}", flush=True)
                rounds[name].append(r)
                print(f"  round {rnd + 1} {name}: {r['wall_s']:.1f} s (load {r['load_before']})",
                      flush=True)
            for name in bare:
                r = run_bare(int(name[-1]), cases, scenario)
                bare[name].append(r)
                print(f"  round {rnd + 1} {name}: {r['wall_s']:.1f} s (load {r['load_before']})",
                      flush=True)
        # the best round of each set-up (least disturbed by the other processes on the machine)
        runs = {n: dict(min(rs, key=lambda r: r["wall_s"])) for n, rs in rounds.items()}
        report["rounds"] = rounds
        r1 = runs["local_1"]
        t1 = r1["wall_s"]
        for name, r in runs.items():
            # what the efficiency would be if every worker had a core to itself: the runner's own
            # losses (slots not busy with cases) times the extra CPU a case costs when run in
            # parallel (shared caches, memory bandwidth)
            r["cpu_based_efficiency"] = (r1["cpu_s_total"] / r["cpu_s_total"]) * \
                (r["slot_utilisation"] / r1["slot_utilisation"])
            r["efficiency"] = t1 / (r["workers"] * r["wall_s"])
            r["cold_efficiency"] = r1["cold_wall_s"] / (r["workers"] * r["cold_wall_s"])
            r["per_case_s"] = r["wall_s"] * r["workers"] / max(1, r["cases"])
        report["runs"] = runs
        b1 = min(r["wall_s"] for r in bare["bare_1"])
        b2 = min(r["wall_s"] for r in bare["bare_2"])
        report["bare_processes"] = {"rounds": bare, "wall_1_s": b1, "wall_2_s": b2,
                                    "efficiency": b1 / (2 * b2)}
        for r in runs.values():
            r["relative_to_bare"] = r["efficiency"] / report["bare_processes"]["efficiency"] \
                if r["workers"] == 2 else 1.0
    report["memory"] = memory_scaling([100, 1000, 3000])

    # ------------------------------------------------------------------------------ the table
    print()
    print(f"{'run':<10s}{'wall s':>9s}{'cold s':>9s}{'eff.':>7s}{'cold eff.':>11s}"
          f"{'start+warm s':>14s}{'slots busy':>12s}{'CPU share':>11s}{'CPU eff.':>10s}"
          f"{'vs bare':>9s}{'same numbers':>14s}")
    targets = {"local_1": "", "local_2": ">= 0.90", "dask_2": ">= 0.85"}
    for name, r in report["runs"].items():
        print(f"{name:<10s}{r['wall_s']:9.1f}{r['cold_wall_s']:9.1f}{r['efficiency']:7.2f}"
              f"{r['cold_efficiency']:11.2f}{r['startup_and_warm_s']:14.1f}"
              f"{r['slot_utilisation']:12.2f}{r['cpu_share_in_cases']:11.2f}"
              f"{r['cpu_based_efficiency']:10.2f}{r['relative_to_bare']:9.2f}"
              f"{str(report['identical_results'][name]):>14s}   target {targets[name] or '-'}")
    bp = report["bare_processes"]
    print(f"bare processes (no runner, static split, same cases): 1 process {bp['wall_1_s']:.1f} s, "
          f"2 processes {bp['wall_2_s']:.1f} s: the machine allows an efficiency of "
          f"{bp['efficiency']:.2f}; 'vs bare' = a set-up's efficiency / that")
    busy = report["runs"]["local_1"]["cpu_share_in_cases"] < 0.9
    report["machine_busy"] = busy
    if busy:
        print("NOTE: even the 1-worker run got only "
              f"{report['runs']['local_1']['cpu_share_in_cases']:.0%} of a core: other processes "
              "were using the machine (see the load averages), so the wall-time efficiencies "
              "above measure that contention as much as the batch runner. 'slots busy' shows what "
              "the runner itself loses; 'CPU eff.' (from the CPU time the cases used) estimates "
              "the efficiency with a free core per worker. Re-run on an idle machine.")
    print("start-up of one worker (pool created -> runner imported): " + ", ".join(
        f"{k} {v:.2f} s" for k, v in report["startup_s"].items())
        + (f"; Dask LocalCluster (2 workers) {report['runs']['dask_2']['cluster_startup_s']:.2f} s"
           if "dask_2" in report["runs"] else ""))
    print(f"\n{'cases':>7s}{'peak RSS MiB':>14s}{'RSS growth MiB':>16s}{'tracemalloc KiB':>17s}"
          f"{'results KiB':>13s}{'wall s':>8s}")
    for m in report["memory"]:
        print(f"{m['cases']:7d}{m['peak_rss_mib']:14.1f}{m['rss_growth_during_batch_mib']:16.1f}"
              f"{m['tracemalloc_peak_kib']:17.1f}{m['results_file_kib']:13.1f}{m['wall_s']:8.1f}")
    m0, m1 = report["memory"][0], report["memory"][-1]
    report["memory_ratio_tracemalloc"] = m1["tracemalloc_peak_kib"] / m0["tracemalloc_peak_kib"]
    report["memory_ratio_rss"] = m1["peak_rss_mib"] / m0["peak_rss_mib"]
    print(f"peak-memory ratio {m1['cases']} vs {m0['cases']} cases: RSS {report['memory_ratio_rss']:.3f}, "
          f"tracemalloc {report['memory_ratio_tracemalloc']:.2f} (cases x{m1['cases'] // m0['cases']})")
    path = RESULTS / "bench_batch.json"
    path.write_text(json.dumps(report, indent=2, default=lambda x: None if isinstance(x, float)
                               and not math.isfinite(x) else str(x)))
    print(f"\nJSON: {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
