"""A study a practitioner really runs: 200 cases x 1,000 samples of the 8 x 12 unit on 2 workers.

Run:  python benchmarks/bench_study.py           (the full study: ~10 min on 2 free cores)
      python benchmarks/bench_study.py --quick   (the CI-sized study: 2 of the 200 cases)
      python benchmarks/bench_study.py --profile-only   (part 1 only, one case in this process)

The study is ``benchmarks/studies/unit8x12.toml`` (our own invented unit: 8 MVs, 12 CVs, FOPDT elements with
time constants 3-30 min and dead times 2-10 samples at Ts = 1 min, 6 CVs with limits, a measured and
an unmeasured DV; one MPC at N = 120, M = 24; 200 Monte Carlo cases of setpoint moves, upsets,
noise and unmodelled sensor dynamics with ``--full``).

1. **Profile of one case** (the first case of the full study, in this process, after one warm-up
   case that builds the models and the controller -- as a batch worker does once): the same closed
   loop as ``run_case`` (``ClosedLoop`` with the scenario's prepared arguments), its wall time split
   into the controller's ``step``, the plant's ``advance`` (stepping), the rest of the sample
   (signals, instruments, actuators, recording the row and the diagnostics), building the
   ``Trajectory``, and the KPIs and verdicts (``summarize`` and the criteria); and ``run_case`` as
   a whole (which adds the scenario's preparation and the result record).  The plant must be
   stepped by its exact discrete map (``integrator = "exact"``, a transfer matrix's default): the
   script checks that it is.  **Floor** of the plant stepping, same run: the same exact map as one
   bare NumPy mat-vec per sample (``x+ = M [x; u; d; z; 1]``, ``y = C x+ + H [u; d; z; 1]``, over
   the inputs the loop applied; the CVs' delayed inputs taken as the sample's own, same size) --
   the leanest honest way to advance this plant; the ratio says what the stepper's bookkeeping
   (delay ring buffer, CVs at the end of the sample, the finiteness check) costs.  The controller's
   own floor (DAQP alone on the same QPs) is ``benchmarks/bench_mpc.py``'s.
2. **The study through the real CLI**: ``mpcproto batch benchmarks/studies/unit8x12.toml --full --workers 2
   --out DIR`` in a subprocess (wall time from start to exit, reports included), then
   ``DIR/results.jsonl``: every case present once, complete (``store.is_complete``) and with status
   ``ok``.  Beside the wall time: the sum of the cases' own time (``elapsed_s``) and CPU time
   (``cpu_s``), "slots busy" (time in cases / (2 x wall)) and "CPU share" (CPU / time in cases:
   below 1 when other processes took the cores), and the wall time the same cases would take on two
   free cores (CPU time / 2 + the runner's own time).  Target (issue 19): <= 10 min, every case
   complete.

The machine is shared: the one-minute load average before and after each part is printed beside
the figures.  Writes a table to stdout and JSON to benchmarks/results/bench_study.json.
"""

from __future__ import annotations

import os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
RESULTS = HERE / "results"
STUDY = HERE / "studies" / "unit8x12.toml"
TARGET_S = 600.0


def _load() -> float:
    return round(os.getloadavg()[0], 2)


class _Timed:
    """Replaces ``owner.name`` (a class's method or a module's function) by a wrapper that
    accumulates its wall time; ``restore()`` puts the original back."""

    def __init__(self, owner, name, record=None):
        self.owner, self.name, self.total, self.calls = owner, name, 0.0, 0
        self.fn = getattr(owner, name)
        fn, me = self.fn, self

        def timed(*a, **kw):
            if record is not None:
                record(*a, **kw)
            t0 = time.perf_counter()
            try:
                return fn(*a, **kw)
            finally:
                me.total += time.perf_counter() - t0
                me.calls += 1

        setattr(owner, name, timed)

    def restore(self):
        setattr(self.owner, self.name, self.fn)


def profile_case(full: bool = True) -> dict:
    """One case through ``run_case`` with its parts timed in the same run (see the docstring)."""
    import mpcproto.analysis as analysis
    import mpcproto.scenario.runner as runner
    from mpcproto.control.mpc import PredictiveController
    from mpcproto.scenario import expand, load_scenario, run_case
    from mpcproto.sim.closed_loop import ClosedLoop
    from mpcproto.stepper import Plant

    scn = load_scenario(STUDY)
    cases = expand(scn, full=full)
    load = _load()
    t0 = time.perf_counter()
    run_case(cases[-1])                          # warm-up: models and controller built and cached
    warm = time.perf_counter() - t0

    applied = []                                 # (state, packed input) of each sample: the floor's

    def keep(plant, u, d, d_next=None):
        plant._put(plant.k, np.asarray(u, float), np.asarray(d, float))
        applied.append((plant.x.copy(), np.concatenate([u, d, plant._z_pair()])))

    plants: list = []
    reset = Plant.reset

    def reset_and_note(self, *a, **kw):
        plants.append(self)
        return reset(self, *a, **kw)

    Plant.reset = reset_and_note
    timers = {"controller": _Timed(PredictiveController, "step"),
              "sample": _Timed(ClosedLoop, "step"),
              "plant": _Timed(Plant, "advance", record=keep),
              "trajectory": _Timed(ClosedLoop, "trajectory"),
              "summarize": _Timed(analysis, "summarize"),
              "verdicts": _Timed(runner, "evaluate_controller")}
    try:
        t0 = time.perf_counter()
        rec = run_case(cases[0])                 # the whole case as a batch worker runs it
        whole = time.perf_counter() - t0
    finally:
        for t in timers.values():
            t.restore()
        Plant.reset = reset
    assert rec["status"] == "ok", rec.get("message")
    plant = plants[-1]
    tm = {k: t.total for k, t in timers.items()}

    # the recording of the inputs (for the floor) ran inside the plant's timer: measured alone
    t0 = time.perf_counter()
    for x, b in applied:
        x.copy()
        np.concatenate([b, ()])
    wrap = time.perf_counter() - t0
    plant_s = max(tm["plant"] - wrap, 0.0)
    # floor: the same exact map as one bare mat-vec per sample, state and CVs at the sample's end
    M, C, H = plant._M, plant._C, plant._H
    nh = H.shape[1] - 1
    t0 = time.perf_counter()
    for x, b in applied:
        C @ (M @ np.concatenate([x, b, (1.0,)])) + H[:, :nh] @ b[:nh] + H[:, nh]
    floor = time.perf_counter() - t0
    n = len(applied)
    parts = {"controller step": tm["controller"], "plant stepping": plant_s,
             "rest of the sample (signals, instruments, actuators, recording)":
                 tm["sample"] - tm["controller"] - tm["plant"],
             "Trajectory": tm["trajectory"], "KPIs (summarize)": tm["summarize"],
             "verdicts (criteria)": tm["verdicts"]}
    parts["preparation, reset, result record (the rest of run_case)"] = \
        whole - sum(parts.values()) - wrap
    return {
        "case": cases[0].case_id, "samples": n, "integrator": plant.plugin, "load_before": load,
        "warm_up_case_s": warm, "run_case_s": whole, "parts_s": parts,
        "plant_floor_s": floor, "plant_vs_floor": plant_s / floor if floor > 0 else None,
        "controller_ms_per_step": 1e3 * tm["controller"] / max(timers["controller"].calls, 1),
        "plant_ms_per_step": 1e3 * plant_s / max(n, 1),
        "states": int(plant.model.nx), "delayed_inputs": int(plant.model.nz),
        "load_after": _load(),
    }


# ------------------------------------------------------------------------------ 2. the study
def run_study(out_dir: Path, full: bool, workers: int = 2) -> dict:
    from mpcproto.scenario import iter_cases, load_scenario
    from mpcproto.store import case_fingerprint, is_complete, load_results

    scn = load_scenario(STUDY)
    expected = {c.case_id: c for c in iter_cases(scn, full=full)}
    cmd = [sys.executable, "-c", "import sys; from mpcproto.cli import main; sys.exit(main())",
           "batch", str(STUDY), "--out", str(out_dir), "--workers", str(workers),
           "--progress-interval", "60"] + (["--full"] if full else [])
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    load = _load()
    t0 = time.perf_counter()
    cp = subprocess.run(cmd, env=env, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    recs = load_results(out_dir / "results.jsonl")
    ids = [r.get("case_id") for r in recs]
    complete = [r for r in recs if r.get("case_id") in expected
                and is_complete(r, case_fingerprint(expected[r["case_id"]]))]
    ok = [r for r in complete if r.get("status") == "ok"]
    in_cases = sum(r.get("elapsed_s", 0.0) for r in recs)
    cpu = sum(r.get("cpu_s", 0.0) for r in recs)
    # the runner's own time (start-up, scheduling, writing, reports): wall time not covered by
    # the busier worker's cases
    per_worker: dict = {}
    for r in recs:
        per_worker[r.get("worker_pid")] = per_worker.get(r.get("worker_pid"), 0.0) + r["elapsed_s"]
    busiest = max(per_worker.values(), default=0.0)
    return {
        "command": "mpcproto batch benchmarks/studies/unit8x12.toml" + (" --full" if full else "")
                   + f" --workers {workers}",
        "exit_code": cp.returncode, "stderr_tail": cp.stderr.strip().splitlines()[-3:],
        "cases_expected": len(expected), "records": len(recs), "distinct_ids": len(set(ids)),
        "complete": len(complete), "status_ok": len(ok),
        "passed": sum(bool(r.get("passed")) for r in recs),
        "all_complete": len(set(ids)) == len(expected) == len(complete) == len(ok) == len(recs),
        "wall_s": wall, "target_s": TARGET_S, "met": wall <= TARGET_S,
        "in_cases_s": in_cases, "cpu_s": cpu, "slots_busy": in_cases / (workers * wall),
        "cpu_share": cpu / in_cases if in_cases else None,
        "runner_own_s": wall - busiest,
        "two_free_cores_estimate_s": cpu / workers + (wall - busiest),
        "median_case_s": float(np.median([r["elapsed_s"] for r in recs])) if recs else None,
        "load_before": load, "load_after": _load(),
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the CI-sized study (2 of the 200 cases)")
    ap.add_argument("--profile-only", action="store_true", help="profile one case, no batch")
    ap.add_argument("--keep", metavar="DIR", help="write the batch's output here (default: a "
                    "temporary folder, removed)")
    args = ap.parse_args(argv)
    full = not args.quick
    report: dict = {"machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                                "platform": platform.platform(), "processor": platform.processor()},
                    "study": str(STUDY.relative_to(ROOT)), "full": full}
    print(f"bench_study: {report['study']} ({'full' if full else 'CI-sized'}); "
          f"load average {_load()}", flush=True)

    p = profile_case(full=full)
    report["profile"] = p
    print(f"\n1. one case ({p['case']}, {p['samples']} samples; plant {p['states']} states, "
          f"{p['delayed_inputs']} delayed inputs, integrator {p['integrator']!r}; load "
          f"{p['load_before']} -> {p['load_after']}):")
    print(f"   run_case {p['run_case_s']:.2f} s (the warm-up case before it, building the models "
          f"and the controller: {p['warm_up_case_s']:.2f} s)")
    for name, v in p["parts_s"].items():
        print(f"   {name:<66s}{v:8.3f} s {100 * v / p['run_case_s']:6.1f} %")
    print(f"   controller {p['controller_ms_per_step']:.2f} ms/step; plant "
          f"{p['plant_ms_per_step']:.3f} ms/step = {p['plant_vs_floor']:.1f} x the bare mat-vec "
          f"of the same exact map ({1e3 * p['plant_floor_s'] / p['samples']:.3f} ms/step)")
    if p["integrator"] != "exact":
        print("   WARNING: the plant is not stepped by its exact discrete map")
    if args.profile_only:
        _write(report)
        return 0

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(args.keep) if args.keep else Path(tmp) / "out"
        s = run_study(out, full)
    report["study_run"] = s
    print(f"\n2. {s['command']}  (load {s['load_before']} -> {s['load_after']}):")
    print(f"   wall {s['wall_s']:.1f} s ({s['wall_s'] / 60:.2f} min; target <= "
          f"{TARGET_S / 60:.0f} min: {'met' if s['met'] else 'NOT met'}); exit code {s['exit_code']}")
    print(f"   {s['records']} records of {s['cases_expected']} cases: {s['complete']} complete, "
          f"{s['status_ok']} status ok, {s['passed']} passed every criterion; every case "
          f"complete: {s['all_complete']}")
    print(f"   time in cases {s['in_cases_s']:.0f} s (median case {s['median_case_s']:.2f} s), "
          f"CPU {s['cpu_s']:.0f} s; slots busy {s['slots_busy']:.2f}, CPU share "
          f"{s['cpu_share']:.2f}; runner's own time {s['runner_own_s']:.1f} s")
    print(f"   on two free cores (CPU / 2 + runner's own time): about "
          f"{s['two_free_cores_estimate_s']:.0f} s ({s['two_free_cores_estimate_s'] / 60:.1f} min)")
    _write(report)
    return 0 if s["all_complete"] else 1


def _write(report: dict) -> None:
    RESULTS.mkdir(parents=True, exist_ok=True)
    path = RESULTS / "bench_study.json"
    path.write_text(json.dumps(report, indent=2, default=str))
    print(f"\nJSON: {path}")


if __name__ == "__main__":
    sys.exit(main())
