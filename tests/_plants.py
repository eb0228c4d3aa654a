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
