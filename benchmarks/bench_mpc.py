"""Predictive controller benchmark: cost of a whole controller step against an OSQP-only floor.

Run ``python benchmarks/bench_mpc.py``; prints a table and writes
``benchmarks/results/bench_mpc.json``.

Plant and controller: the blending tank (``mpcproto.make_model("blending_tank")``: MVs caustic
flow, water flow, heater duty; measured DV draw-off; unmeasured DVs caustic strength and water
temperature; CVs level, concentration, temperature), linearized at its nominal steady state and
discretized at Ts = 10 s.  The closed loop runs against the same linear model with 15 % larger MV
gains, a random walk on the measured draw-off, an unmeasured step in caustic strength, setpoint
steps and MV rate limits, so limits become active and the estimator has work to do.

For horizons N = 20, 50, 100 (control horizon N/5):

* **controller step**: wall time of ``PredictiveController.step`` -- estimator update, steady
  target QP, parameter map, dynamic QP solve, unpacking, limit projection, diagnostics.
* **floor**: the identical dynamic QP, assembled here independently as ``scipy.sparse`` matrices
  (the same variables, cost and constraints written by hand, no cvxpy), solved by the osqp
  package's own public API (``OSQP.setup`` once, then ``update(q=, l=, u=)`` and ``solve()`` each
  sample, warm started, the same OSQP settings), in the same run: the controller runs the closed
  loop in segments of 25 samples, recording its per-sample data, and after each segment the floor
  solves the same QPs in its own loop (its warm start carried from segment to segment), so both
  see the same spread of machine load; solving them interleaved sample by sample would let each
  evict the other's caches.  Only ``update`` +
  ``solve`` are timed; the floor's vectors are built before its timed loop.  Its solution is
  compared with the controller's plan each sample (``max_plan_diff``).
* **compile**: ``build()`` time (cvxpy canonicalization of both QPs, map extraction, OSQP setup,
  Riccati equations), after one warm-up build so that imports are not counted.
* **memory**: peak Python heap during build + 50 steps (tracemalloc) and growth of the process's
  peak resident set.

Targets (issue 3): step median <= 1.5x floor at N = 50, <= 1.3x at N = 100; compile <= 0.5 s at
N = 100.  Medians AND 95th percentiles are reported (OSQP's tail is several times its median
when it re-factorizes after a rho update).
"""

from __future__ import annotations

import gc
import json
import platform
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import scipy.sparse as sp

import mpcproto as mp
from mpcproto.control._qp import OSQP_DEFAULTS

RESULTS = Path(__file__).resolve().parent / "results"
HORIZONS = (20, 50, 100)
STEPS = 600
SEGMENT = 25
TS = 10.0


def tank_models():
    tank = mp.make_model("blending_tank")
    op = mp.steady_state(tank)
    dm = mp.linearize(tank, op).discretize(TS)
    plant = mp.DiscreteLinearModel(A=dm.A, B=1.15 * dm.B, Bd=dm.Bd, C=dm.C, D=dm.D, Dd=dm.Dd,
                                   Ts=dm.Ts, op=dm.op, state_names=dm.state_names,
                                   n_plant_states=dm.n_plant_states)
    return tank, op, dm, plant


def settings_for(N):
    return {
        "horizon": N, "control_horizon": max(2, N // 5),
        "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5},
               "concentration": {"scale": 0.2}, "temperature": {"scale": 1.0}},
        "mv": {"caustic_flow": {"scale": 0.01, "low": 0.0, "high": 0.2, "max_move": 0.005},
               "water_flow": {"scale": 0.1, "low": 0.0, "high": 3.0, "max_move": 0.1},
               "heater_duty": {"scale": 20.0, "low": 0.0, "high": 600.0, "max_move": 20.0}},
    }


# ------------------------------------------------------------------------------------------------
class Floor:
    """The controller's dynamic QP written by hand with scipy.sparse and solved with osqp.OSQP.

    Variables z = [X (nx*N), U (nu*M), dU (nu*M), E (ny*N), S (ny*N)], each block column-major
    (sample by sample).  Same cost and constraints as PredictiveController's QP (no terminal
    cost, D = 0).
    """

    def __init__(self, ctrl):
        import osqp

        r = ctrl.scaled_                    # the controller's scaled model and weights
        dm = ctrl.dmodel
        A, B, C = r["A"], r["B"], r["C"]
        if np.any(dm.D != 0) or ctrl.terminal_weight_ is not None:
            raise RuntimeError("floor written for D = 0 and no terminal cost")
        N, M = ctrl._N, ctrl._M
        nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
        self.N, self.M, self.nx, self.nu, self.ny = N, M, nx, nu, ny
        self.ctrl = ctrl
        nX, nU, nE = nx * N, nu * M, ny * N
        self.off = {"X": 0, "U": nX, "dU": nX + nU, "E": nX + 2 * nU, "S": nX + 2 * nU + nE}
        n = nX + 2 * nU + 2 * nE
        self.n = n
        count = np.array([1.0] * (M - 1) + [N - M + 1.0])
        ws = np.kron(count, r["preferred_weight"])
        self.sc = ctrl.scales_
        self.ws = ws
        P = sp.block_diag([sp.csc_matrix((nX, nX)),
                           sp.diags(2 * ws), sp.diags(2 * np.tile(r["move_weight"], M)),
                           sp.diags(2 * np.tile(r["cv_weight"], N)),
                           sp.diags(2 * np.tile(r["limit_quadratic"], N))], format="csc")
        self.q_S = np.tile(r["limit_linear"], N)
        sel = np.minimum(np.arange(N), M - 1)              # U column used over sample k
        Sel = sp.csr_matrix((np.ones(N), (np.arange(N), sel)), shape=(N, M))
        # dynamics: X_k - A X_{k-1} - B U_sel(k) = W_k (+ A x0 for k = 0)
        shift = sp.eye(N, k=-1)
        dyn = sp.hstack([sp.kron(sp.eye(N), sp.eye(nx)) - sp.kron(shift, A),
                         -sp.kron(Sel, B), sp.csc_matrix((nX, nU + 2 * nE))])
        # moves: dU_j - U_j + U_{j-1} = 0 (j >= 1); dU_0 - U_0 = -u_prev
        mv = sp.hstack([sp.csc_matrix((nU, nX)),
                        -sp.kron(sp.eye(M) - sp.eye(M, k=-1), sp.eye(nu)), sp.eye(nU),
                        sp.csc_matrix((nU, 2 * nE))])
        CX = sp.hstack([sp.kron(sp.eye(N), C), sp.csc_matrix((nE, 2 * nU))])
        I_E = sp.eye(nE)
        Z_E = sp.csc_matrix((nE, nE))
        band = sp.hstack([CX, -I_E, Z_E])
        soft_lo = sp.hstack([CX, Z_E, I_E])
        soft_hi = sp.hstack([CX, Z_E, -I_E])
        s_pos = sp.hstack([sp.csc_matrix((nE, nX + 2 * nU)), Z_E, I_E])
        u_box = sp.hstack([sp.csc_matrix((nU, nX)), sp.eye(nU), sp.csc_matrix((nU, nU + 2 * nE))])
        du_box = sp.hstack([sp.csc_matrix((nU, nX + nU)), sp.eye(nU), sp.csc_matrix((nU, 2 * nE))])
        self.Aq = sp.vstack([dyn, mv, band, soft_lo, soft_hi, s_pos, u_box, du_box], format="csc")
        self.P = P
        self.m = self.Aq.shape[0]
        self.solver = osqp.OSQP()
        opts = dict(OSQP_DEFAULTS)
        opts.update(ctrl._resolved["solver_options"])
        self.solver.setup(P, np.zeros(n), self.Aq, np.full(self.m, -np.inf), np.full(self.m, np.inf),
                          **opts)

    def vectors(self, z):
        """q, l, u from the controller's input vector of this sample (not timed)."""
        c = self.ctrl
        zs = c._zsl
        N, M, nu, ny = self.N, self.M, self.nu, self.ny
        dm = c.dmodel
        sx, su, sy = self.sc["x"], self.sc["u"], self.sc["y"]
        S = c.scaled_
        raw = lambda k: z[zs[k]]                           # noqa: E731
        scale = {"band_lo": sy, "band_hi": sy, "lim_lo": sy, "lim_hi": sy, "rate": su, "pref": su,
                 "u_prev": su, "x0": sx}
        g = lambda k: raw(k) / scale[k] if k in scale else raw(k)    # noqa: E731
        x0, u_prev, w = g("x0"), g("u_prev"), raw("w")
        nd = dm.nd
        D = raw("dtraj").reshape(nd, N + 1, order="F") + raw("d_now")[:, None]
        W = S["Bd"] @ D[:, :N] + (S["Bw"] @ w)[:, None]
        V = S["Dd"] @ D[:, 1:] + (S["Cw"] @ w)[:, None]
        W[:, 0] += S["A"] @ x0
        rep = lambda v, n: np.tile(v, n)                  # noqa: E731
        Vf = V.ravel(order="F")
        inf = np.inf
        q = np.zeros(self.n)
        o = self.off
        q[o["U"]:o["dU"]] = -2 * self.ws * rep(g("pref"), M)
        q[o["S"]:] = self.q_S
        mvrow = np.zeros(nu * M)
        mvrow[:nu] = -u_prev
        rate = g("rate")
        lo = np.concatenate([W.ravel(order="F"), mvrow, rep(g("band_lo"), N) - Vf,
                             rep(g("lim_lo"), N) - Vf, np.full(ny * N, -inf), np.zeros(ny * N),
                             raw("u_lo") / np.tile(su, M), -rep(rate, M)])
        hi = np.concatenate([W.ravel(order="F"), mvrow, rep(g("band_hi"), N) - Vf,
                             np.full(ny * N, inf), rep(g("lim_hi"), N) - Vf, np.full(ny * N, inf),
                             raw("u_hi") / np.tile(su, M), rep(rate, M)])
        return q, np.nan_to_num(lo, neginf=-1e30, posinf=1e30), \
            np.nan_to_num(hi, neginf=-1e30, posinf=1e30)

    def solve(self, q, l, u):
        t0 = time.perf_counter()
        self.solver.update(q=q, l=l, u=u)
        res = self.solver.solve(raise_error=False)
        dt = time.perf_counter() - t0
        U = res.x[self.off["U"]:self.off["dU"]].reshape(self.nu, self.M, order="F") \
            * self.sc["u"][:, None]
        return dt, res, U


# ------------------------------------------------------------------------------------------------
class Loop:
    """The closed loop against the linear plant, run in segments (state kept between calls)."""

    def __init__(self, ctrl, plant, seed=1):
        self.ctrl, self.plant = ctrl, plant
        self.rng = np.random.default_rng(seed)
        self.x = np.zeros(plant.nx)
        self.draw = 0.0
        self.k = 0
        ctrl.reset(plant.op)

    def run(self, steps, record=False):
        """Advance *steps* samples; time every controller step (wall and CPU)."""
        ctrl, plant, rng = self.ctrl, self.plant, self.rng
        op = plant.op
        ny = plant.ny
        lo = np.array([0.0, 0.0, 0.0])
        hi = np.array([0.2, 3.0, 600.0])
        t_step, c_step, t_solve, t_target, iters, statuses, inputs, plans = ([] for _ in range(8))
        for _ in range(steps):
            k = self.k
            t = k * plant.Ts
            self.draw = float(np.clip(self.draw + rng.normal(scale=0.01), -0.3, 0.3))
            d = np.array([self.draw, 0.03 if k >= 150 else 0.0, 0.0])   # deviation DVs, plant
            y = plant.C @ self.x + plant.Dd @ d + op.y + rng.normal(scale=[0.002, 0.01, 0.05])
            sp_ = op.y + np.array([0.0, 0.3 if k >= 50 else 0.0, -2.0 if k >= 250 else 0.0])
            tg = mp.Targets(setpoint=sp_, cv_low=np.full(ny, -np.inf),
                            cv_high=np.full(ny, np.inf), mv_low=lo, mv_high=hi)
            dv = np.array([op.d[0] + self.draw, np.nan, np.nan])
            meas = mp.Measurement.now(y, t)
            c0 = time.thread_time()
            t0 = time.perf_counter()
            out = ctrl.step(t, meas, dv, tg)
            t_step.append(time.perf_counter() - t0)
            c_step.append(time.thread_time() - c0)
            iters.append(out.diagnostics.get("iterations") or 0)
            t_solve.append(out.diagnostics.get("solve_ms", 0.0) / 1e3)
            t_target.append(out.diagnostics.get("target_ms", 0.0) / 1e3)
            statuses.append(out.status)
            if record:
                inputs.append(ctrl._last_inputs.copy())
                plans.append(ctrl.last_plan() if out.status == "ok" else None)
            self.x = plant.A @ self.x + plant.B @ (out.u - op.u) + plant.Bd @ d
            self.k += 1
        return {"step": np.array(t_step), "cpu_step": np.array(c_step),
                "solve": np.array(t_solve), "target": np.array(t_target),
                "iters": np.array(iters), "statuses": statuses, "inputs": inputs, "plans": plans}


def closed_loop(ctrl, plant, steps=STEPS, seed=1, record=False):
    """A whole closed-loop run from the operating point."""
    return Loop(ctrl, plant, seed).run(steps, record)


def replay_floor(floor, inputs, plans, op):
    """Solve the recorded per-sample QPs with the floor, in the same order (warm starts alike)."""
    data = [floor.vectors(z) for z in inputs]            # built before timing starts
    t_floor, c_floor, t_c, f_iters, diffs = [], [], [], [], []
    su = floor.sc["u"][:, None]
    for (q, l, u), plan in zip(data, plans):
        c0 = time.thread_time()
        dt, res, U = floor.solve(q, l, u)
        c_floor.append(time.thread_time() - c0)
        t_floor.append(dt)
        t_c.append(res.info.solve_time + res.info.update_time)
        f_iters.append(res.info.iter)
        if plan is not None:
            diffs.append(float(np.max(np.abs((plan - op.u[:, None] - U) / su))))
    return {"floor": np.array(t_floor), "cpu_floor": np.array(c_floor), "floor_c": np.array(t_c),
            "f_iters": np.array(f_iters), "diffs": np.array(diffs)}


def ms(a, q):
    return float(np.percentile(a, q) * 1e3)


def main():
    RESULTS.mkdir(parents=True, exist_ok=True)
    tank, op, dm, plant = tank_models()
    mp.PredictiveController.from_settings(dm, settings_for(10)).build()      # warm-up (imports)
    rows = []
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    for N in HORIZONS:
        gc.collect()
        builds = []
        for _ in range(3):
            t0 = time.perf_counter()
            ctrl = mp.PredictiveController.from_settings(dm, settings_for(N)).build()
            builds.append(time.perf_counter() - t0)
        # memory: Python heap peak during build + 50 steps
        gc.collect()
        tracemalloc.start()
        mctrl = mp.PredictiveController.from_settings(dm, settings_for(N)).build()
        closed_loop(mctrl, plant, steps=50)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        del mctrl
        # the controller runs the closed loop in segments; after each segment the floor solves
        # the same QPs (same order, its warm start carried on), so both run in their own hot
        # loop and both see the same spread of machine load
        closed_loop(ctrl, plant, steps=30, seed=7)                 # warm-up
        loop = Loop(ctrl, plant)
        floor = Floor(ctrl)
        parts = []
        for _ in range(STEPS // SEGMENT):
            run = loop.run(SEGMENT, record=True)
            rep = replay_floor(floor, run["inputs"], run["plans"], plant.op)
            parts.append((run, rep))
        cat = lambda key, i: np.concatenate([p[i][key] for p in parts])   # noqa: E731
        res = {k: cat(k, 0) for k in ("step", "cpu_step", "solve", "target", "iters")}
        res.update({k: cat(k, 1) for k in ("floor", "cpu_floor", "floor_c", "f_iters", "diffs")})
        res["statuses"] = [s_ for p in parts for s_ in p[0]["statuses"]]
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        st, fl = res["step"], res["floor"]
        row = {
            "horizon": N, "control_horizon": ctrl._M,
            "qp_variables": ctrl.qp_.n_variables_, "qp_rows": ctrl.qp_.n_rows_,
            "qp_rows_before_merge": ctrl.qp_.n_rows_cvxpy_,
            "floor_variables": floor.n, "floor_rows": floor.m,
            "cvxpy_constraints": len(ctrl.qp_.problem.constraints),
            "step_median_ms": ms(st, 50), "step_p95_ms": ms(st, 95),
            "floor_median_ms": ms(fl, 50), "floor_p95_ms": ms(fl, 95),
            "floor_c_median_ms": ms(res["floor_c"], 50),
            "ratio_median": float(np.median(st) / np.median(fl)),
            "ratio_p95": float(np.percentile(st, 95) / np.percentile(fl, 95)),
            "cpu_step_median_ms": ms(res["cpu_step"], 50),
            "cpu_floor_median_ms": ms(res["cpu_floor"], 50),
            "cpu_ratio_median": float(np.median(res["cpu_step"]) / np.median(res["cpu_floor"])),
            "load_average_1min": float(__import__("os").getloadavg()[0]),
            "compile_s": float(np.median(builds)), "compile_s_all": [float(b) for b in builds],
            "peak_python_heap_mb": peak / 2**20,
            "peak_rss_growth_mb": (rss - rss0) / 1024.0,
            "max_plan_diff_scaled": float(res["diffs"].max()) if res["diffs"].size else None,
            "median_iterations": float(np.median(res["iters"])),
            "floor_median_iterations": float(np.median(res["f_iters"])),
            "step_qp_solve_median_ms": ms(res["solve"], 50),
            "step_target_median_ms": ms(res["target"], 50),
            "step_other_median_ms": ms(st - res["solve"] - res["target"], 50),
            "non_ok_steps": int(sum(s != "ok" for s in res["statuses"])),
            "backup_solves": int(ctrl.counts["backup_solves"]),
        }
        rows.append(row)
        print(f"N={N:4d}  step {row['step_median_ms']:.3f} ms (p95 {row['step_p95_ms']:.3f})  "
              f"floor {row['floor_median_ms']:.3f} ms (p95 {row['floor_p95_ms']:.3f})  "
              f"ratio {row['ratio_median']:.2f} (p95 {row['ratio_p95']:.2f})  "
              f"compile {row['compile_s']:.3f} s  heap {row['peak_python_heap_mb']:.1f} MB  "
              f"[in step: qp {row['step_qp_solve_median_ms']:.3f}, target "
              f"{row['step_target_median_ms']:.3f}, rest {row['step_other_median_ms']:.3f} ms; "
              f"iters {row['median_iterations']:.0f} vs floor {row['floor_median_iterations']:.0f}; "
              f"non-ok {row['non_ok_steps']}, backup {row['backup_solves']}; "
              f"CPU-time ratio {row['cpu_ratio_median']:.2f}; load {row['load_average_1min']:.1f}]",
              flush=True)
    targets = {"ratio_median_at_50": 1.5, "ratio_median_at_100": 1.3, "compile_s_at_100": 0.5}
    by_n = {r["horizon"]: r for r in rows}
    verdict = {
        "ratio_median_at_50": by_n[50]["ratio_median"] <= 1.5,
        "ratio_median_at_100": by_n[100]["ratio_median"] <= 1.3,
        "compile_s_at_100": by_n[100]["compile_s"] <= 0.5,
    }
    print()
    hdr = (f"{'N':>4} {'M':>3} {'vars':>5} {'rows':>5} {'step med':>9} {'step p95':>9} "
           f"{'floor med':>9} {'floor p95':>9} {'ratio':>6} {'r p95':>6} {'compile s':>9} "
           f"{'heap MB':>8} {'iters':>5} {'plan diff':>9}")
    print(hdr)
    for r in rows:
        print(f"{r['horizon']:>4} {r['control_horizon']:>3} {r['qp_variables']:>5} {r['qp_rows']:>5} "
              f"{r['step_median_ms']:>9.3f} {r['step_p95_ms']:>9.3f} {r['floor_median_ms']:>9.3f} "
              f"{r['floor_p95_ms']:>9.3f} {r['ratio_median']:>6.2f} {r['ratio_p95']:>6.2f} "
              f"{r['compile_s']:>9.3f} {r['peak_python_heap_mb']:>8.1f} {r['median_iterations']:>5.0f} "
              f"{r['max_plan_diff_scaled']:>9.2e}")
    print("targets:", targets, "met:", verdict)
    out = {"benchmark": "bench_mpc", "python": sys.version.split()[0],
           "machine": platform.platform(), "processor": platform.processor(),
           "steps_per_horizon": STEPS, "sample_time_s": TS, "rows": rows,
           "targets": targets, "targets_met": verdict}
    path = RESULTS / "bench_mpc.json"
    path.write_text(json.dumps(out, indent=2))
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
