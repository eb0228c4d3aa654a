"""Predictive controller benchmark: the whole controller step against DAQP alone on the same QP.

Run ``python benchmarks/bench_mpc.py`` (``--quick``: 100 instead of 400 samples per horizon;
``--only tank`` or ``--only unit8x12``: one unit; ``--budget``: only the per-phase budget
tables, nothing written); prints tables and writes
``benchmarks/results/bench_mpc.json`` (``bench_mpc_<unit>.json`` with ``--only``).  BLAS is capped at one thread (as in the batch workers):
on a shared 2-core machine a multithreaded BLAS spends more time spinning than computing.

Two units, each in closed loop against its own linear model with 10-15 % larger MV gains:

* **blending tank** (``mpcproto.make_model("blending_tank")``, Ts = 10 s; 3 MVs, 3 CVs, a measured
  draw-off DV with a random walk, an unmeasured step in caustic strength, setpoint steps, MV rate
  limits) at N = 20, 50, 100 (M = N/5);
* **8 x 12 unit**: our own invented plant of FOPDT elements (:func:`unit_model`: the MV part of the
  transfer matrix of ``benchmarks/studies/unit8x12.toml``, the unit of the 200-case study that
  ``benchmarks/bench_study.py`` times: 8 MVs, 12 CVs, each CV driven by its own MV and, with
  probability 0.45, by each other one; gains 0.2-2 either sign, time constants 3-30 min, dead times
  2-10 samples at Ts = 1 min); CVs 1-8 on setpoints (steps), CVs 9-12 in zones,
  6 CVs with soft limits, output disturbances pushing CVs 9-12 to their limits, hard MV limits and
  rate limits; at N = 60, 120, 240 (M = N/5).

Per horizon:

* **step**: wall time of ``PredictiveController.step`` (estimator, steady target, free response,
  DAQP solve, projection, diagnostics);
* **ratio**: medians of wall time, and of CPU time of the thread (``time.thread_time``: less
  sensitive to the load of a shared machine);
* **floor**: the same condensed QPs (recorded from the controller each sample:
  ``CondensedQP.data``) solved by DAQP's own Python API in the same process -- one ``daqp.Model``
  per row structure, ``setup`` on first use, then ``update(f=, bupper=, blower=)`` and ``solve()``
  warm-started, the same settings and soft weights.  The controller runs segments of 25 samples;
  after each the floor replays them, so both see the same machine load.  Variables and rows of the
  QP are printed beside each figure;
* **accuracy**: 8 recorded QPs per horizon (spread over the run) are solved again by Clarabel
  (interior point, its own API, tolerances 1e-12) with explicit slacks; the largest difference of
  the applied (first) move and of the whole plan, in MV scales (the interior-point reference itself
  is good to ~1e-9..1e-7 on the worse-conditioned QPs: a difference at that level does not say
  which of the two is off), with the **cost gap** (DAQP's objective of the controller's plan less
  that of the reference's, relative: <= 0 where the controller's plan is the better one) and the
  largest difference from DAQP's own solve of the same QP (the floor's answer); the applied-move
  target counts a sample as met when its first move is within 1e-8 of the reference's, or when
  the controller's plan costs no more than the reference's (to 1e-12 relative: the QP is then flat
  along the difference and the reference cannot decide); a horizon without reference solves fails;
* **build**: ``build()`` time (median of 3) and **memory**: peak Python heap (tracemalloc) during
  build + 50 steps (DAQP's C workspaces are outside tracemalloc: see the RSS growth);
* **fit**: build time and build heap of the 8 x 12 unit over N = 30..240, exponent of a log-log fit;
* **budget** (8 x 12, N = 120; tank, N = 50): median wall time of each phase of a step, in
  microseconds (:func:`profile_step`): inputs and limits, estimator update, steady target, free
  response + gradient + bounds, DAQP solve, projection, finish, the rest.

Targets (issue 19): 8 x 12, N = 120: step median <= 4x the floor, build <= 0.5 s, memory <= 100 MB;
build and memory growing at most linearly in N; tank: step <= 10x the floor, build <= 0.2 s.
"""

from __future__ import annotations

import os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import gc  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

import mpcproto as mp  # noqa: E402
from mpcproto.models.transfer_table import transfer_table_model  # noqa: E402

RESULTS = Path(__file__).resolve().parent / "results"
UNIT_STUDY = Path(__file__).resolve().parent / "studies" / "unit8x12.toml"
SEGMENT = 25


# ------------------------------------------------------------------------------------------------
# the units
def unit_model():
    """Our invented 8-MV x 12-CV unit of FOPDT elements (time in min): the MVs' part of the
    transfer matrix in ``benchmarks/studies/unit8x12.toml`` (its DVs left out)."""
    import tomllib  # noqa: PLC0415

    table = tomllib.loads(UNIT_STUDY.read_text())["plant"]
    mvs = table["mvs"]
    table = dict(table, dvs={}, elements={cv: {i: e for i, e in row.items() if i in mvs}
                                          for cv, row in table["elements"].items()})
    return transfer_table_model(table)


def mismatched(dm, factor):
    return mp.DiscreteLinearModel(A=dm.A, B=factor * dm.B, Bd=dm.Bd, C=dm.C, D=dm.D, Dd=dm.Dd,
                                  Ts=dm.Ts, op=dm.op, state_names=dm.state_names,
                                  n_plant_states=dm.n_plant_states)


class Tank:
    name = "tank"
    horizons = (20, 50, 100)

    def __init__(self):
        tank = mp.make_model("blending_tank")
        op = mp.steady_state(tank)
        self.dm = mp.linearize(tank, op).discretize(10.0)
        self.plant = mismatched(self.dm, 1.15)

    @staticmethod
    def settings(N):
        return {
            "horizon": N, "control_horizon": max(2, N // 5),
            "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5},
                   "concentration": {"scale": 0.2}, "temperature": {"scale": 1.0}},
            "mv": {"caustic_flow": {"scale": 0.01, "low": 0.0, "high": 0.2, "max_move": 0.005},
                   "water_flow": {"scale": 0.1, "low": 0.0, "high": 3.0, "max_move": 0.1},
                   "heater_duty": {"scale": 20.0, "low": 0.0, "high": 600.0, "max_move": 20.0}},
        }

    def start(self, seed):
        self.rng = np.random.default_rng(seed)
        self.draw = 0.0

    def sample(self, k, x):
        """(measurement, dv, targets, plant disturbance) of sample k."""
        p, op = self.plant, self.plant.op
        self.draw = float(np.clip(self.draw + self.rng.normal(scale=0.01), -0.3, 0.3))
        d = np.array([self.draw, 0.03 if k >= 150 else 0.0, 0.0])
        y = p.C @ x + p.Dd @ d + op.y + self.rng.normal(scale=[0.002, 0.01, 0.05])
        sp_ = op.y + np.array([0.0, 0.3 if k >= 50 else 0.0, -2.0 if k >= 250 else 0.0])
        tg = mp.Targets(setpoint=sp_, cv_low=np.full(3, -np.inf), cv_high=np.full(3, np.inf),
                        mv_low=np.array([0.0, 0.0, 0.0]), mv_high=np.array([0.2, 3.0, 600.0]))
        dv = np.array([op.d[0] + self.draw, np.nan, np.nan])
        return y, dv, tg, p.Bd @ d


class Unit:
    name = "unit8x12"
    horizons = (60, 120, 240)
    limited = (0, 1, 8, 9, 10, 11)

    def __init__(self):
        m = unit_model()
        op = mp.steady_state(m)
        self.dm = mp.linearize(m, op).discretize(1.0)
        self.plant = mismatched(self.dm, 1.1)

    def settings(self, N):
        return {
            "horizon": N, "control_horizon": max(2, N // 5),
            "cv": {f"cv{i + 1}": ({"low": -1.0, "high": 1.0} if i in self.limited else {})
                   for i in range(12)},
            "mv": {f"mv{j + 1}": {"low": -3.0, "high": 3.0, "max_move": 0.3, "move_weight": 0.5}
                   for j in range(8)},
        }

    def start(self, seed):
        self.rng = np.random.default_rng(seed)
        self.sp1 = self.rng.uniform(-0.6, 0.6, 8)
        self.sp2 = self.rng.uniform(-0.6, 0.6, 8)
        self.bias = np.zeros(12)

    def sample(self, k, x):
        p, op = self.plant, self.plant.op
        self.bias += self.rng.normal(scale=0.005, size=12)
        if k == 60:
            self.bias[8:] += np.array([1.2, -1.2, 0.9, -0.9])      # towards the zone limits
        y = p.C @ x + op.y + self.bias + self.rng.normal(scale=0.002, size=12)
        sp_ = np.full(12, np.nan)
        sp_[:8] = op.y[:8] + (self.sp1 if k >= 10 else 0.0) + (self.sp2 if k >= 150 else 0.0)
        tg = mp.Targets(setpoint=sp_, cv_low=np.full(12, -np.inf), cv_high=np.full(12, np.inf),
                        mv_low=np.full(8, -np.inf), mv_high=np.full(8, np.inf))
        return y, np.zeros(0), tg, np.zeros(p.nx)


# ------------------------------------------------------------------------------------------------
class Loop:
    """Closed loop against the unit's linear plant, run in segments; records the QP data."""

    def __init__(self, unit, ctrl, seed=1):
        self.unit, self.ctrl = unit, ctrl
        self.x = np.zeros(unit.plant.nx)
        self.k = 0
        unit.start(seed)
        ctrl.reset(unit.plant.op)

    def run(self, steps, record=False):
        unit, ctrl, p = self.unit, self.ctrl, self.unit.plant
        out_ = {"step": [], "cpu": [], "solve": [], "target": [], "iters": [], "active": [],
                "status": [],
                "qp": [], "u0": [], "plan": []}
        for _ in range(steps):
            k = self.k
            y, dv, tg, wd = unit.sample(k, self.x)
            meas = mp.Measurement.now(y, k * p.Ts)           # the caller's work, not timed
            c0 = time.thread_time()
            t0 = time.perf_counter()
            out = ctrl.step(k * p.Ts, meas, dv, tg)
            out_["step"].append(time.perf_counter() - t0)
            out_["cpu"].append(time.thread_time() - c0)
            dg = out.diagnostics
            out_["solve"].append(dg.get("solve_ms", 0.0) / 1e3)
            out_["target"].append(dg.get("target_ms", 0.0) / 1e3)
            out_["iters"].append(dg.get("iterations") or 0)
            out_["active"].append(dg.get("active_set") or 0)
            out_["status"].append(out.status)
            if record:
                H, f, A, bu, bl, sense, w, _st, key = ctrl.condensed_.data(ctrl._last_inputs)
                out_["qp"].append((key, H, f.copy(), A, bu.copy(), bl.copy(), sense,
                                   tuple(a.copy() for a in w)))
                ok = out.status == "ok"
                out_["plan"].append(((ctrl._plan_scaled.ravel(order="F").copy()) if ok else None))
            self.x = p.A @ self.x + p.B @ (out.u - p.op.u) + wd
            self.k += 1
        return out_


class DaqpFloor:
    """The recorded condensed QPs solved by DAQP's own API (one workspace per row structure)."""

    def __init__(self, options):
        self.options = dict(options)
        self.models = {}
        self.cpu = []                 # CPU time of each solve (less sensitive to machine load)

    def solve(self, rec):
        import daqp

        key, H, f, A, bu, bl, sense, w = rec
        c0 = time.thread_time()
        t0 = time.perf_counter()
        m = self.models.get(key)
        if m is None:
            m = daqp.Model()
            m.setup(H, f, A, bu, bl, sense)
            m.settings = self.options
            m.soft_weights(rho_l=w[0], rho_u=w[1], w_l=w[2], w_u=w[3])
            self.models[key] = m
        else:
            m.update(f=f, bupper=bu, blower=bl)
        x, _fv, flag, info = m.solve()
        dt = time.perf_counter() - t0
        self.cpu.append(time.thread_time() - c0)
        return dt, np.asarray(x), int(flag), int(info["iterations"])


def tight_reference(rec):
    """The same condensed QP with explicit slacks, solved by Clarabel's own API (tight)."""
    import clarabel
    import scipy.sparse as sp

    _key, H, f, A, bu, bl, sense, w = rec
    n = H.shape[0]
    big = 1e29
    soft = sense[n:] == 8
    lo, hi = bl[n:], bu[n:]
    As, Ah = A[soft], A[~soft]
    rho, wl = w[0][n:][soft], w[2][n:][soft]
    fl, fh = lo[soft] > -big, hi[soft] < big
    k1, k2 = int(fl.sum()), int(fh.sum())
    nv = n + k1 + k2
    P = sp.block_diag([sp.csc_matrix(np.triu(H)), sp.diags(1 / rho[fl]), sp.diags(1 / rho[fh])],
                      format="csc")
    q = np.concatenate([f, wl[fl], wl[fh]])
    I_n = sp.identity(n, format="csr")
    zs = lambda r, c: sp.csr_matrix((r, c))          # noqa: E731
    rows, rhs = [], []

    def add(M, b):
        rows.append(sp.csr_matrix(M))
        rhs.append(b)

    lbU, ubU = bl[:n] > -big, bu[:n] < big
    add(sp.hstack([-I_n[lbU], zs(int(lbU.sum()), k1 + k2)]), -bl[:n][lbU])
    add(sp.hstack([I_n[ubU], zs(int(ubU.sum()), k1 + k2)]), bu[:n][ubU])
    hl, hh = lo[~soft] > -big, hi[~soft] < big
    add(sp.hstack([-Ah[hl], zs(int(hl.sum()), k1 + k2)]), -lo[~soft][hl])
    add(sp.hstack([Ah[hh], zs(int(hh.sum()), k1 + k2)]), hi[~soft][hh])
    add(sp.hstack([-As[fl], -sp.identity(k1), zs(k1, k2)]), -lo[soft][fl])
    add(sp.hstack([As[fh], zs(k2, k1), -sp.identity(k2)]), hi[soft][fh])
    add(sp.hstack([zs(k1 + k2, n), -sp.identity(k1 + k2)]), np.zeros(k1 + k2))
    Acl = sp.vstack(rows, format="csc")
    b = np.concatenate(rhs)
    st = clarabel.DefaultSettings()
    st.verbose = False
    st.tol_gap_abs = st.tol_gap_rel = st.tol_feas = 1e-12
    st.max_iter = 400
    cones = [clarabel.NonnegativeConeT(Acl.shape[0])]
    sol = clarabel.DefaultSolver(P, q, Acl, b, cones, st).solve()
    status = str(sol.status)
    x = np.asarray(sol.x)[:n]
    return x, ("optimal" if status == "Solved" else status), nv


def qp_cost(rec, x):
    """DAQP's objective of the recorded QP at *x*: ``0.5 x'Hx + f'x`` plus each soft row's
    ``w s + s^2 / (2 rho)`` for its violation ``s`` (the controller's objective up to a constant)."""
    _key, H, f, A, bu, bl, sense, w = rec
    n = H.shape[0]
    r = A @ x
    soft = sense[n:] == 8
    s = (np.maximum(bl[n:] - r, 0.0) + np.maximum(r - bu[n:], 0.0)) * soft
    return float(0.5 * x @ H @ x + f @ x + np.sum(w[2][n:] * s + s ** 2 / (2 * w[0][n:])))


def _g(v):
    return "none" if v is None else f"{v:.2g}"


def ms(a, q):
    return float(np.percentile(a, q) * 1e3) if len(a) else float("nan")


def build_timed(unit, N, repeats=3):
    times = []
    for _ in range(repeats):
        gc.collect()
        t0 = time.perf_counter()
        ctrl = mp.PredictiveController.from_settings(unit.dm, unit.settings(N)).build()
        times.append(time.perf_counter() - t0)
    return ctrl, float(np.median(times))


def heap_build(unit, N, steps):
    gc.collect()
    tracemalloc.start()
    ctrl = mp.PredictiveController.from_settings(unit.dm, unit.settings(N)).build()
    build_peak = tracemalloc.get_traced_memory()[1]
    if steps:
        Loop(unit, ctrl, seed=3).run(steps)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return build_peak / 2**20, peak / 2**20


def bench_horizon(unit, N, steps):
    ctrl, build_s = build_timed(unit, N)
    _bh, heap = heap_build(unit, N, 50)
    Loop(unit, ctrl, seed=7).run(30)                            # warm-up
    loop = Loop(unit, ctrl, seed=1)
    floor = DaqpFloor(ctrl.condensed_.options)
    st, fl, iters, fiters, active, statuses, u0d, pland, refst, cpu = ([] for _ in range(10))
    gaps, flat_ok, floord = [], [], []
    solve, target, nrows = [], [], []
    su = 1.0                                                    # plans are in scaled units already
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    every = max(1, steps // 8)                     # 8 reference solves per horizon
    for seg in range(steps // SEGMENT):
        run = loop.run(SEGMENT, record=True)
        st += run["step"]
        cpu += run["cpu"]
        solve += run["solve"]
        target += run["target"]
        iters += run["iters"]
        active += run["active"]
        statuses += run["status"]
        for i, rec in enumerate(run["qp"]):
            dt, x, flag, it = floor.solve(rec)
            fl.append(dt)
            fiters.append(it)
            nrows.append(rec[3].shape[0])
            if run["plan"][i] is not None and flag in (1, 2):   # the controller = DAQP's own solve?
                floord.append(float(np.abs(run["plan"][i] - x).max()))
            if (seg * SEGMENT + i) % every == 0 and run["plan"][i] is not None:
                xr, status, _nv = tight_reference(rec)
                refst.append(status)
                if xr is not None and status == "optimal":
                    nu = ctrl.dmodel.nu
                    d = np.abs(run["plan"][i] - xr) / su
                    u0d.append(float(d[:nu].max()))
                    pland.append(float(d.max()))
                    # the cost of the controller's plan over the reference's (relative): where the
                    # plans differ by more than 1e-8 but the controller's costs no more, the QP is
                    # flat to round-off along the difference and the reference cannot decide
                    cr = qp_cost(rec, xr)
                    gap = (qp_cost(rec, run["plan"][i]) - cr) / max(1.0, abs(cr))
                    gaps.append(gap)
                    flat_ok.append(d[:nu].max() <= 1e-8 or gap <= 1e-12)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    st, fl = np.array(st), np.array(fl)
    return {
        "unit": unit.name, "horizon": N, "control_horizon": ctrl._M,
        "qp_variables": ctrl.condensed_.n_variables_,
        "qp_rows_median": float(np.median(nrows)), "qp_rows_max": int(max(nrows)),
        "states": int(ctrl.dmodel.nx),
        "delay_states": int(ctrl.dmodel.nx - ctrl.dmodel.n_plant_states),
        "step_median_ms": ms(st, 50), "step_p95_ms": ms(st, 95),
        "floor_median_ms": ms(fl, 50), "floor_p95_ms": ms(fl, 95),
        "ratio_median": float(np.median(st) / np.median(fl)),
        "cpu_step_median_ms": ms(np.array(cpu), 50),
        "cpu_floor_median_ms": ms(np.array(floor.cpu), 50),
        "cpu_ratio_median": float(np.median(cpu) / np.median(floor.cpu)),
        "step_solve_median_ms": ms(np.array(solve), 50),
        "step_target_median_ms": ms(np.array(target), 50),
        "iterations_median": float(np.median(iters)), "iterations_max": int(max(iters)),
        "floor_iterations_median": float(np.median(fiters)),
        "active_set_median": float(np.median(active)),
        "build_s": build_s, "peak_heap_mb": heap, "rss_growth_mb": (rss - rss0) / 1024.0,
        "applied_move_diff_max": max(u0d) if u0d else None,
        "plan_diff_max": max(pland) if pland else None,
        "reference_solves": len(refst),
        "reference_not_optimal": int(sum(s != "optimal" for s in refst)),
        "reference_cost_gap_max": max(gaps) if gaps else None,
        "applied_move_ok": bool(flat_ok) and all(flat_ok),
        "floor_plan_diff_max": max(floord) if floord else None,
        "non_ok_steps": int(sum(s != "ok" for s in statuses)),
        "load_average_1min": float(os.getloadavg()[0]),
    }


#: the phases of a step (the budget table), in the order they run
PHASES = ("inputs_limits", "estimator", "steady_target", "free_response_gradient", "solve",
          "projection", "finish", "rest")


def profile_step(unit, N, steps):
    """Per-phase wall time of each step (median over *steps*, microseconds): timers around the
    real methods of one controller instance (and around ``project_with_activity`` in the
    runtime module, restored afterwards).  ``inputs_limits``: the step's limits and setpoints
    (``_limits``); ``estimator``: its update; ``steady_target``: both stages; ``free_response_
    gradient``: the condensed QP's data (free response, gradient, bounds); ``solve``: DAQP
    update + solve and the slacks read back; ``projection``: the exact limit projection and
    the limit activity; ``finish``: status, estimator predict, output; ``rest``: the step minus
    these (input checks, filling the QP inputs, diagnostics of the plan).  Each timer costs
    about 0.2 us."""
    from mpcproto.control import mpc_runtime

    ctrl = mp.PredictiveController.from_settings(unit.dm, unit.settings(N)).build()
    cur = {}

    def timed(obj, name, key):
        f = getattr(obj, name)

        def w(*a, **kw):
            t0 = time.perf_counter()
            r = f(*a, **kw)
            cur[key] = cur.get(key, 0.0) + time.perf_counter() - t0
            return r
        setattr(obj, name, w)

    timed(ctrl, "_limits", "inputs_limits")
    timed(ctrl.estimator_, "update", "estimator")
    if ctrl.target_ is not None:
        timed(ctrl.target_, "solve", "steady_target")
    timed(ctrl.condensed_, "data", "free_response_gradient")
    timed(ctrl.condensed_, "solve", "_condensed")
    timed(ctrl, "_finish", "finish")
    saved = mpc_runtime.project_with_activity
    timed(mpc_runtime, "project_with_activity", "projection")
    try:
        loop = Loop(unit, ctrl, seed=1)
        loop.run(30)
        rows = []
        for _ in range(steps):
            cur.clear()
            run = loop.run(1)
            c = dict(cur)
            c["solve"] = c.pop("_condensed", 0.0) - c.get("free_response_gradient", 0.0)
            c["step"] = run["step"][0]
            c["rest"] = c["step"] - sum(c.get(k, 0.0) for k in PHASES[:-1])
            rows.append(c)
    finally:
        mpc_runtime.project_with_activity = saved
    med = {k: float(np.median([r.get(k, 0.0) for r in rows]) * 1e6) for k in PHASES + ("step",)}
    med["sum_of_medians"] = float(sum(med[k] for k in PHASES))
    return med


def print_budget(title, prof):
    print(f"{title}: median us per step")
    for k in PHASES + ("sum_of_medians", "step"):
        print(f"  {k:24s} {prof[k]:8.1f}")


def main(argv=()):
    argv = list(argv)
    known = {"--quick", "--budget", "--only", "tank", "unit8x12"}
    if "-h" in argv or "--help" in argv or any(a not in known for a in argv):
        bad = [a for a in argv if a not in known | {"-h", "--help"}]
        if bad:
            print(f"bench_mpc.py: unknown argument {bad[0]!r}; expected --quick, --budget, "
                  f"--only tank|unit8x12 (see --help)", file=sys.stderr)
            sys.exit(2)
        print(__doc__)
        sys.exit(0)
    quick = "--quick" in argv
    if "--budget" in argv:                # the per-phase budget tables only (no files written)
        units = [u for u in (Tank(), Unit()) if "--only" not in argv or u.name in argv]
        for u, N in ((u, 50 if u.name == "tank" else 120) for u in units):
            mp.PredictiveController.from_settings(u.dm, u.settings(10)).build()
            print_budget(f"{u.name} N={N} step budget", profile_step(u, N, 100 if quick else 300))
        return
    only = None
    if "--only" in argv:                  # --only tank | --only unit8x12
        i = argv.index("--only")
        only = argv[i + 1] if i + 1 < len(argv) else ""
        if only not in ("tank", "unit8x12"):
            sys.exit(f"bench_mpc.py: --only takes 'tank' or 'unit8x12'; got {only!r}")
    RESULTS.mkdir(parents=True, exist_ok=True)
    steps = 100 if quick else 400
    units = tuple(u for u in (Tank(), Unit()) if only in (None, u.name))
    for u in units:
        mp.PredictiveController.from_settings(u.dm, u.settings(10)).build()   # warm-up (imports)
    rows = []
    for u in units:
        for N in u.horizons:
            r = bench_horizon(u, N, steps)
            rows.append(r)
            print(f"{u.name:8s} N={N:4d} M={r['control_horizon']:3d}  vars {r['qp_variables']:4d} "
                  f"rows {r['qp_rows_median']:.0f}  step {r['step_median_ms']:.3f} ms "
                  f"(p95 {r['step_p95_ms']:.3f})  floor {r['floor_median_ms']:.3f} ms "
                  f"(p95 {r['floor_p95_ms']:.3f})  ratio {r['ratio_median']:.2f} "
                  f"(CPU time {r['cpu_ratio_median']:.2f})  "
                  f"build {r['build_s']:.3f} s  heap {r['peak_heap_mb']:.1f} MB  iters "
                  f"{r['iterations_median']:.0f}/{r['floor_iterations_median']:.0f}  active "
                  f"{r['active_set_median']:.0f}  u0 diff {_g(r['applied_move_diff_max'])}  "
                  f"plan diff {_g(r['plan_diff_max'])} (cost gap {_g(r['reference_cost_gap_max'])}; "
                  f"vs DAQP's own solve {_g(r['floor_plan_diff_max'])})  non-ok {r['non_ok_steps']}  load "
                  f"{r['load_average_1min']:.1f}", flush=True)
    by = {(r["unit"], r["horizon"]): r for r in rows}
    out = {"benchmark": "bench_mpc", "python": sys.version.split()[0],
           "machine": platform.platform(), "only": only, "quick": quick, "rows": rows}
    verdict = {}
    if only in (None, "tank"):
        tank = units[0]
        prof = profile_step(tank, 50, 100 if quick else 300)
        print_budget("tank N=50 step budget", prof)
        out["profile_tank_N50_us"] = prof
        verdict.update({
            "tank_step_le_10x_floor": all(by[("tank", N)]["ratio_median"] <= 10.0
                                          for N in (50, 100)),
            "tank_build_le_0.2s": all(by[("tank", N)]["build_s"] <= 0.2 for N in (20, 50, 100)),
        })
    if only in (None, "unit8x12"):
        # growth of build time and memory with N (8 x 12 unit)
        unit = units[-1]
        fitN = (30, 60, 120, 240)
        fit_t, fit_m = [], []
        for N in fitN:
            _c, bt = build_timed(unit, N)
            bh, _p = heap_build(unit, N, 0)
            fit_t.append(bt)
            fit_m.append(bh)
        ex_t = float(np.polyfit(np.log(fitN), np.log(fit_t), 1)[0])
        ex_m = float(np.polyfit(np.log(fitN), np.log(fit_m), 1)[0])
        print(f"8x12 build over N={fitN}: {['%.3f' % t for t in fit_t]} s, exponent {ex_t:.2f}; "
              f"heap {['%.1f' % m for m in fit_m]} MB, exponent {ex_m:.2f}")
        prof = profile_step(unit, 120, 100 if quick else 300)
        print_budget("8x12 N=120 step budget", prof)
        u120 = by[("unit8x12", 120)]
        out["fit"] = {"N": fitN, "build_s": fit_t, "build_heap_mb": fit_m, "exponent_build": ex_t,
                      "exponent_heap": ex_m}
        out["profile_unit_N120_us"] = prof
        verdict.update({
            "unit_N120_step_le_4x_floor": u120["ratio_median"] <= 4.0,
            "unit_N120_p95_le_3ms": u120["step_p95_ms"] <= 3.0,
            "unit_N120_build_le_0.5s": u120["build_s"] <= 0.5,
            "unit_N120_memory_le_100MB": u120["peak_heap_mb"] <= 100.0,
            "unit_build_growth_at_most_linear": ex_t <= 1.1,
            "unit_memory_growth_at_most_linear": ex_m <= 1.1,
        })
    # (a horizon without a reference solve fails: a verdict never passes on missing input)
    verdict["applied_move_within_1e-8"] = all(r["applied_move_ok"] for r in rows)
    print("targets met:", verdict)
    out["targets_met"] = verdict
    name = "bench_mpc.json" if only is None else f"bench_mpc_{only}.json"
    path = RESULTS / name
    path.write_text(json.dumps(out, indent=2))
    print(f"wrote {path}")


if __name__ == "__main__":
    main(sys.argv[1:])
