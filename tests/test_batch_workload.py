"""A small, real closed-loop case for the batch-runner tests (not a mock).

A draining tank (Torricelli outflow, q_out = k*sqrt(h)) with a PI level loop, stepped with a CasADi
``cvodes`` integrator built once per worker process, measurement noise drawn from the case's seed.
It returns a plain result dict of the same shape as the scenario runner's (per-controller ``kpi``,
``criteria``, top-level ``passed``), so the batch runner, the reports and the JUnit writer can be
tested on their own, with cases whose cost and failures the tests control.

The one test here checks the workload itself against an outside reference: the open-loop tank
integrated by CasADi equals scipy's ``solve_ivp`` (reference library) and the analytic solution of
the Torricelli drain (from memory: sqrt(h(t)) = sqrt(h0) - k t / (2 A) with no inflow).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

AREA = 1.5      # m2, our own tank
K_OUT = 0.12    # m^2.5/s outflow coefficient, our own number
_INTEGRATORS: dict[float, object] = {}


@dataclass(frozen=True)
class TankCase:
    """One case of the test study: PI gain, seed, length; ``fail`` makes the runner raise."""

    case_id: str
    gain: float
    seed: int
    steps: int = 120
    dt: float = 1.0
    scenario: str = "tank-test"
    iae_limit: float = 40.0
    params: dict = field(default_factory=dict)

    def __hash__(self):  # params is a dict; hash by id only
        return hash(self.case_id)


def _integrator(dt: float):
    """CasADi cvodes integrator of the tank over one sample, built once per process."""
    if dt not in _INTEGRATORS:
        import casadi as ca

        h = ca.MX.sym("h")
        q = ca.MX.sym("q")
        ode = (q - K_OUT * ca.sqrt(ca.fmax(h, 0.0))) / AREA
        _INTEGRATORS[dt] = ca.integrator("tank", "cvodes", {"x": h, "p": q, "ode": ode}, 0.0, dt,
                                         {"abstol": 1e-10, "reltol": 1e-10})
    return _INTEGRATORS[dt]


def simulate_open_loop(h0: float, q: float, t_end: float, dt: float = 1.0) -> np.ndarray:
    """Levels at t = 0, dt, ..., t_end with a constant inflow *q*."""
    f = _integrator(dt)
    n = int(round(t_end / dt))
    out = [h0]
    h = h0
    for _ in range(n):
        h = float(f(x0=h, p=q)["xf"])
        out.append(h)
    return np.array(out)


def run_tank_case(case: TankCase) -> dict:
    """Closed loop: PI on the level, setpoint step 1.0 -> 1.3 m at t = 10 s, noisy level sensor."""
    if case.gain <= 0:
        raise ValueError(f"case {case.case_id}: the PI gain must be positive, got {case.gain}")
    f = _integrator(case.dt)
    rng = np.random.default_rng(case.seed)
    h = 1.0
    q_ss = K_OUT * math.sqrt(h)
    integral = 0.0
    ti = 20.0
    iae = 0.0
    max_err = 0.0
    travel = 0.0
    q_prev = q_ss
    for k in range(case.steps):
        t = k * case.dt
        sp = 1.3 if t >= 10.0 else 1.0
        y = h + 0.002 * rng.standard_normal()
        e = sp - y
        integral += e * case.dt
        q = min(max(q_ss + case.gain * (e + integral / ti), 0.0), 0.5)
        travel += abs(q - q_prev)
        q_prev = q
        h = float(f(x0=h, p=q)["xf"])
        iae += abs(sp - h) * case.dt
        max_err = max(max_err, abs(sp - h))
    crit = {"name": "iae_below level", "value": iae, "limit": case.iae_limit,
            "passed": iae < case.iae_limit}
    return {
        "case_id": case.case_id, "scenario": case.scenario,
        "params": {"gain": case.gain, **case.params}, "seed": case.seed, "status": "ok",
        "controllers": {
            "pi": {"kpi": {"level": {"iae": iae, "max_abs_error": max_err},
                           "inflow": {"total_travel": travel}},
                   "violations": [],
                   "solver": {"steps": case.steps, "failures": 0},
                   "criteria": [crit]},
        },
        "passed": crit["passed"],
    }


def make_cases(n: int, *, seed: int = 7, steps: int = 120, bad: tuple[int, ...] = (),
               prefix: str = "tank") -> list[TankCase]:
    """*n* cases with per-case seeds from SeedSequence.spawn; indices in *bad* get a negative gain."""
    seqs = np.random.SeedSequence(seed).spawn(n)
    gains = np.linspace(0.05, 0.6, n) if n > 1 else np.array([0.3])
    return [TankCase(case_id=f"{prefix}-{i:04d}", gain=(-1.0 if i in bad else float(gains[i])),
                     seed=int(s.generate_state(1)[0]), steps=steps) for i, s in enumerate(seqs)]


def test_workload_integrator_matches_scipy_and_torricelli():
    # Reference: scipy.integrate.solve_ivp (reference library) and the analytic Torricelli drain
    # sqrt(h) = sqrt(h0) - k t / (2 A) for zero inflow (from memory, follows from dh/dt = -k sqrt(h)/A).
    from scipy.integrate import solve_ivp

    h0, t_end = 1.0, 20.0
    ours = simulate_open_loop(h0, 0.0, t_end)
    ref = solve_ivp(lambda t, h: [-K_OUT * math.sqrt(max(h[0], 0.0)) / AREA], (0, t_end), [h0],
                    t_eval=np.arange(0, t_end + 0.5, 1.0), rtol=1e-10, atol=1e-12).y[0]
    analytic = (math.sqrt(h0) - K_OUT * np.arange(0, t_end + 0.5, 1.0) / (2 * AREA)) ** 2
    np.testing.assert_allclose(ours, ref, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(ours, analytic, rtol=1e-6, atol=1e-8)
    # the closed loop reaches the new setpoint: same seed -> same numbers
    r1 = run_tank_case(TankCase("a", gain=0.3, seed=1, steps=200))
    r2 = run_tank_case(TankCase("a", gain=0.3, seed=1, steps=200))
    assert r1 == r2
    assert r1["controllers"]["pi"]["kpi"]["level"]["iae"] > 0


def batch_records(tmp_path, *, n: int = 6, bad: tuple[int, ...] = (4,), tight: tuple[int, ...] = (1,),
                  steps: int = 100) -> list[dict]:
    """Records of a small real batch (one worker thread: CasADi Functions are not thread-safe):
    cases in *bad* raise, cases in *tight* fail their IAE criterion."""
    from concurrent.futures import ThreadPoolExecutor
    from dataclasses import replace

    from mpcproto import load_results, run_batch

    cases = [replace(c, iae_limit=0.5) if i in tight else c
             for i, c in enumerate(make_cases(n, steps=steps, bad=bad))]
    with ThreadPoolExecutor(1) as ex:
        run_batch(cases, tmp_path, executor=ex, run=run_tank_case, progress=False)
    return load_results(tmp_path / "results.jsonl")


# A study of our own: the package's blending tank under a draw-off step, PID loops tuned by SIMC,
# 2 sweep values x 2 Monte Carlo draws of the outlet loss coefficient = 4 cases.
SMALL_STUDY = """
[scenario]
name = "{name}"
sample_time = 10.0
duration = 200.0
seed = 11

[plant]
model = "blending_tank"
options = {{ outflow = "dv" }}

[operating_point]
dvs = {{ draw_off = 1.6 }}
targets = {{ level = 1.1, concentration = 2.5, temperature = 72.0 }}

[disturbances]
draw_off = {{ kind = "step", at = 50.0, size = 0.3 }}

[instruments]
level = {{ noise_std = 0.002 }}

[controllers.pid]
rule = "simc"
pairs = {{ level = "water_flow", concentration = "caustic_flow", temperature = "heater_duty" }}

[[criteria]]
check = "iae_below"
cv = "level"
limit = {limit}

[study]
draws = 2
full_draws = 3

[[study.sweep]]
key = "disturbances.draw_off.size"
values = [0.2, 0.4]

[[study.draw]]
key = "plant.parameters.loss_coefficient"
distribution = "uniform"
low = 0.03
high = 0.04
"""


def write_study(folder: Path, name: str = "small_tank", limit: float = 1.0e6) -> Path:
    p = folder / f"{name}.toml"
    p.write_text(SMALL_STUDY.format(name=name, limit=limit))
    return p
