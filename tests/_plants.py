"""Small plants shared by several test files (built with the public Model API)."""

import mpcproto as mp


def first_order(K=1.0, tau=10.0):
    """y = K/(tau s + 1) u, MV limited to [-5, 5]."""
    m = mp.Model("lag1", time_unit="s")
    x = m.state("x", nominal=0.0)
    u = m.mv("u", nominal=0.0, low=-5, high=5)
    m.derivative(x, (K * u - x) / tau)
    m.cv("y", x)
    return m.build()


def op0(m):
    """The nominal point of *m* (a steady state for the plants above)."""
    return mp.OperatingPoint.at(m, m.nominal("state"), m.nominal("mv"), m.nominal("dv"))


def tank_settings(horizon=20, control_horizon=4):
    """The blending tank controller of ``benchmarks/bench_mpc.py`` (our own numbers): CV scales,
    the level's limits, MV limits and rate limits."""
    return {
        "horizon": horizon, "control_horizon": control_horizon,
        "cv": {"level": {"scale": 0.05, "low": 0.3, "high": 2.5},
               "concentration": {"scale": 0.2}, "temperature": {"scale": 1.0}},
        "mv": {"caustic_flow": {"scale": 0.01, "low": 0.0, "high": 0.2, "max_move": 0.005},
               "water_flow": {"scale": 0.1, "low": 0.0, "high": 3.0, "max_move": 0.1},
               "heater_duty": {"scale": 20.0, "low": 0.0, "high": 600.0, "max_move": 20.0}},
    }
