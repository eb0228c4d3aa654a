"""Closed-loop simulator benchmark: stepping cost per sample and integrator accuracy.

Run ``python benchmarks/bench_sim.py``; prints tables and writes
``benchmarks/results/bench_sim.json``.

1. Cost per sample of :class:`mpcproto.sim.ClosedLoop` (plant integrator call, instruments with
   noise, actuators, a DV signal, bookkeeping, and a set of PID loops as the controller, so no QP
   dominates) against a bare Python loop calling the same compiled CasADi integrator on the same
   input sequence (replayed from the closed-loop run, so the integrator does the same work), both
   measured in this run: the two alternate in chunks of 50 samples (so both see the same load on
   a shared machine); the ratio is the median over 5 repeats (the range is printed beside it).
   Target: ratio <= 2.
2. Accuracy of the plant integrator through a transient of the Henson-Seborg CSTR (open loop from
   its unstable middle steady state, coolant step, ignition to the upper steady state) against a
   cvodes reference at tight tolerances (abstol = reltol = 1e-12), for the default cvodes
   settings and for the fixed-step plugins.
3. Which integrator each built-in model uses, and why.
"""

from __future__ import annotations

import json
import platform
import sys
import time
import warnings
from pathlib import Path

import numpy as np

import mpcproto as mp
from mpcproto.sim import ClosedLoop, OpenLoop

RESULTS = Path(__file__).resolve().parent / "results"
REPEATS = 5
CHUNK = 50


def op_of(m, u=None, d=None):
    u = m.nominal("mv") if u is None else u
    return mp.steady_state(m, u, d)


def cases():
    tank = mp.make_model("blending_tank")
    top = op_of(tank)
    tank_loops = [mp.PIDLoop("level", "water_flow", 5.0, 300.0),
                  mp.PIDLoop("concentration", "caustic_flow", 0.1, 600.0),
                  mp.PIDLoop("temperature", "heater_duty", 30.0, 600.0)]
    tank_kw = dict(op=top, Ts=10.0, duration=20000.0,
                   dvs={"draw_off": [{"kind": "random_walk", "step_std": 0.03, "interval": 60.0},
                                     {"kind": "pulse", "at": 3000.0, "duration": 3000.0, "size": 0.4}],
                        "water_temperature": {"kind": "sine", "amplitude": 3.0, "period": 3600.0}},
                   instruments={"level": {"noise_std": 0.002},
                                "concentration": {"noise_std": 0.01, "period": 120.0, "dead_time": 180.0},
                                "temperature": {"noise_std": 0.05, "lag": 20.0}},
                   setpoints={"temperature": {"kind": "step", "at": 10000.0, "size": 3.0}})
    cstr = mp.make_model("henson_seborg_cstr")
    cop = op_of(cstr)
    cstr_loops = [mp.PIDLoop("temperature", "coolant_temperature", 3.0, 1.0)]
    cstr_kw = dict(op=cop, Ts=0.05, duration=100.0,
                   dvs={"feed_temperature": {"kind": "random_walk", "step_std": 0.5, "interval": 1.0},
                        "feed_concentration": {"kind": "step", "at": 20.0, "size": 0.1}},
                   instruments={"temperature": {"noise_std": 0.1},
                                "concentration": {"noise_std": 0.005, "period": 1.0, "dead_time": 0.5}},
                   setpoints={"temperature": {"kind": "step", "at": 50.0, "size": 2.0}})
    return [("blending_tank", tank, tank_loops, tank_kw), ("henson_seborg_cstr", cstr, cstr_loops, cstr_kw)]


def bench_stepping():
    rows = []
    for name, model, loops, kw in cases():
        ctl = mp.PIDController.for_model(model, loops)
        loop = ClosedLoop(model, ctl, rng=1, **kw)
        tr = loop.run()                      # warm-up; also gives the input sequence to replay
        assert tr.success, tr.message
        n = len(tr)
        plant = loop.plant
        F = plant.step_
        # the p vector each sample used: [u; d; z; parameters]
        U = np.column_stack([tr.series("u", v) for v in model.mv_names])
        D = np.column_stack([tr.series("d", v) for v in model.dv_names])
        plant.reset(kw["op"].x, kw["op"].u, kw["op"].d)
        P = []
        for k in range(n):
            P.append(np.concatenate([U[k], D[k], plant.z(U[k], D[k]), plant._p]))
            plant._hist_u.append(U[k])
            plant._hist_d.append(D[k])
            plant.k += 1
        x0 = np.asarray(kw["op"].x, float)
        X = np.column_stack([tr.series("x", v) for v in model.state_names])
        # closed loop and bare integrator alternate in chunks of CHUNK samples, so both see the
        # same load on a shared machine; the bare call starts from the recorded state of that
        # sample, so it does the same integrator work
        closed, bare, ratios = [], [], []
        for _ in range(REPEATS):
            tc = tb = 0.0
            loop.reset()
            for k0 in range(0, n, CHUNK):
                k1 = min(n, k0 + CHUNK)
                t0 = time.perf_counter()
                for _k in range(k0, k1):
                    loop.step()
                tc += time.perf_counter() - t0
                t0 = time.perf_counter()
                for k in range(k0, k1):
                    np.array(F(X[k], P[k]).elements())
                tb += time.perf_counter() - t0
            t0 = time.perf_counter()
            loop.trajectory()                   # bookkeeping: building the Trajectory
            tc += time.perf_counter() - t0
            closed.append(tc / n)
            bare.append(tb / n)
            ratios.append(tc / tb)
        # the replay reproduces the closed-loop states: the bare loop does the same integrator work
        x = x0
        err = 0.0
        for k in range(n - 1):
            x = np.array(F(x, P[k]).elements())
            err = max(err, float(np.max(np.abs(x - X[k + 1]) / (1e-6 + np.abs(X[k + 1])))))
        ctl_ms = float(np.median(tr.series("diag", "step_ms")))
        c, b = float(np.median(closed)), float(np.median(bare))
        ratio = float(np.median(ratios))
        rows.append({"model": name, "samples": n, "integrator": plant.plugin,
                     "closed_loop_us_per_sample": c * 1e6, "bare_integrator_us_per_sample": b * 1e6,
                     "ratio": ratio, "ratio_min": float(np.min(ratios)),
                     "ratio_max": float(np.max(ratios)),
                     "pid_step_us_median": ctl_ms * 1e3,
                     "replay_max_rel_state_error": err, "target_ratio": 2.0, "meets_target": ratio <= 2.0})
    return rows


def bench_accuracy():
    cstr = mp.make_model("henson_seborg_cstr")
    op = op_of(cstr)
    Ts, dur = 0.05, 10.0
    moves = {"coolant_temperature": {"kind": "step", "at": 0.5, "size": 5.0}}

    def run(integrator, options):
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            loop = ClosedLoop(cstr, OpenLoop(cstr.mv_names, moves), op=op, Ts=Ts, duration=dur,
                              integrator=integrator, integrator_options=options)
        tr = loop.run()
        t1 = time.perf_counter()
        loop.run()
        per = (time.perf_counter() - t1) / len(tr)
        return tr, per, t1 - t0

    ref, _, _ = run("cvodes", {"abstol": 1e-12, "reltol": 1e-12, "max_num_steps": 100000})
    T_ref, C_ref = ref.series("x", "T"), ref.series("x", "CA")
    rows = []
    variants = [
        ("cvodes", "cvodes", None),
        ("idas", "idas", None),
        ("rk, 1 step/sample", "rk", {"number_of_finite_elements": 1}),
        ("rk, 4 steps/sample", "rk", {"number_of_finite_elements": 4}),
        ("collocation, 1 element", "collocation", {"number_of_finite_elements": 1}),
        ("collocation, 4 elements", "collocation", {"number_of_finite_elements": 4}),
    ]
    for label, plugin, opts in variants:
        tr, per, _ = run(plugin, opts)
        n = min(len(tr), len(ref))
        rows.append({"variant": label, "plugin": plugin, "options": opts or "defaults (abstol 1e-9, reltol 1e-8)",
                     "status": tr.status,
                     "max_abs_error_T_K": float(np.max(np.abs(tr.series("x", "T")[:n] - T_ref[:n]))),
                     "max_abs_error_CA_mol_per_L": float(np.max(np.abs(tr.series("x", "CA")[:n] - C_ref[:n]))),
                     "us_per_sample": per * 1e6})
    span = {"T_start_K": float(T_ref[0]), "T_end_K": float(T_ref[-1]), "T_peak_K": float(T_ref.max())}
    return rows, span


def integrator_choices():
    out = []
    for info in mp.available_models():
        m = mp.make_model(info["name"])
        out.append({"model": info["name"], "integrator": m.integrator, "time_unit": m.time_unit})
    return out


WHY = ("Every built-in model uses CasADi's cvodes (SUNDIALS adaptive-order, adaptive-step BDF): "
       "the CSTR is stiff and runs away through an ignition transient where fixed-step rk and "
       "collocation with few steps per sample are off by whole kelvins or fail (table above); "
       "cvodes keeps to its tolerances on every model at a cost per call close to the "
       "fixed-step plugins, so it is the one default. Fixed-step plugins may be chosen per run "
       "(ClosedLoop(integrator=..., integrator_options=...)) after this accuracy check.")


def main() -> int:
    step_rows = bench_stepping()
    acc_rows, span = bench_accuracy()
    choices = integrator_choices()
    print("Closed-loop stepping cost per sample (PID controller, instruments, DV signals)")
    print(f"{'model':<20}{'samples':>8}{'closed us':>11}{'bare us':>10}{'ratio':>7}{'range':>13}"
          f"{'PID us':>8}  target<=2")
    for r in step_rows:
        print(f"{r['model']:<20}{r['samples']:>8}{r['closed_loop_us_per_sample']:>11.1f}"
              f"{r['bare_integrator_us_per_sample']:>10.1f}{r['ratio']:>7.2f}"
              f"{r['ratio_min']:>7.2f}-{r['ratio_max']:<5.2f}"
              f"{r['pid_step_us_median']:>8.1f}"
              f"  {'met' if r['meets_target'] else 'MISSED'}")
    print()
    print(f"Integrator accuracy, Henson-Seborg CSTR, coolant +5 K from the middle steady state "
          f"(T {span['T_start_K']:.1f} -> peak {span['T_peak_K']:.1f} -> {span['T_end_K']:.1f} K), "
          f"vs cvodes at 1e-12")
    print(f"{'variant':<26}{'status':>10}{'max|dT| K':>12}{'max|dCA|':>12}{'us/sample':>11}")
    for r in acc_rows:
        print(f"{r['variant']:<26}{r['status']:>10}{r['max_abs_error_T_K']:>12.2e}"
              f"{r['max_abs_error_CA_mol_per_L']:>12.2e}{r['us_per_sample']:>11.1f}")
    print()
    for c in choices:
        print(f"{c['model']:<22} integrator {c['integrator']}  (time unit {c['time_unit']})")
    print(WHY)
    RESULTS.mkdir(parents=True, exist_ok=True)
    out = {"benchmark": "bench_sim", "python": sys.version.split()[0], "machine": platform.machine(),
           "repeats": REPEATS, "stepping": step_rows, "accuracy": {"transient": span, "rows": acc_rows},
           "integrators": choices, "why": WHY}
    (RESULTS / "bench_sim.json").write_text(json.dumps(out, indent=2))
    print(f"\nwritten {RESULTS / 'bench_sim.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
