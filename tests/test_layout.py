"""The one packer of the model's packed input vector ``p = [u; d; z; parameters]`` and the
by-name calls of the CasADi Functions."""

import math
import re
from pathlib import Path

import casadi as ca
import numpy as np
import pytest

import mpcproto as mp
from mpcproto.exceptions import ModelError
from mpcproto.layout import ParameterLayout, in_order
from mpcproto.stepper import Plant

ROOT = Path(__file__).resolve().parents[1] / "mpcproto"


def lag_model():
    """dx/dt = (K u(t - theta) + b d - x) / tau: a first-order lag with a dead time, a DV and
    parameters, so every block of the packed vector has entries."""
    m = mp.Model("lag", time_unit="s")
    K = m.parameter("K", 2.0)
    tau = m.parameter("tau", 5.0, low=0.1)
    b = m.parameter("b", 0.5)
    x = m.state("x", nominal=0.0, low=-100, high=100)
    u = m.mv("u", nominal=0.0, low=-10, high=10)
    d = m.dv("d", nominal=0.0, low=-10, high=10)
    m.derivative(x, (K * m.delayed(u, 3.0) + b * d - x) / tau)
    m.cv("y", x + 0.1 * d)
    return m.build()


def test_pack_then_unpack_gives_the_parts_back():
    lay = ParameterLayout([("u", 2), ("d", 0), ("z", 1), ("p", 3)])
    parts = {"u": np.array([1.0, 2.0]), "d": np.zeros(0), "z": np.array([3.0]),
             "p": np.array([4.0, 5.0, 6.0])}
    v = lay.pack(**parts)
    assert v.shape == (lay.size,) == (6,)
    back = lay.unpack(v)
    assert list(back) == ["u", "d", "z", "p"]
    for k in parts:
        np.testing.assert_array_equal(back[k], parts[k])
    # lists and scalars are numbers too
    np.testing.assert_array_equal(lay.pack(u=[1, 2], d=[], z=3.0, p=(4, 5, 6)), v)


def test_pack_and_unpack_casadi_expressions():
    lay = ParameterLayout([("h", 1), ("u", 2), ("p", 1)])
    u = ca.MX.sym("u", 2)
    v = lay.pack(h=0.5, u=u, p=ca.MX.sym("q"))
    assert isinstance(v, ca.MX) and v.shape == (4, 1)
    f = ca.Function("f", [u], [lay.unpack(v)["u"] * 3 + lay.unpack(v)["h"]])
    np.testing.assert_allclose(np.asarray(f([1.0, 2.0])).ravel(), [3.5, 6.5])


def test_pack_refuses_missing_unknown_and_wrongly_sized_blocks():
    lay = ParameterLayout([("u", 2), ("d", 1)], owner="test layout")
    with pytest.raises(ModelError, match="test layout.*missing: d.*unknown: q"):
        lay.pack(u=[1, 2], q=[3])
    with pytest.raises(ModelError, match="block 'u' must have 2 entries; got 1"):
        lay.pack(u=np.array([1.0]), d=np.array([2.0, 3.0]))     # same total size, wrong blocks
    with pytest.raises(ModelError, match="block 'd' must have 1 entries; got 2"):
        lay.pack(u=ca.SX.sym("u", 2), d=ca.SX.sym("d", 2))
    with pytest.raises(ModelError, match="expects a vector of 3 entries"):
        lay.unpack(np.zeros(4))
    with pytest.raises(ModelError, match="distinct"):
        ParameterLayout([("u", 1), ("u", 2)])


def test_model_packs_its_integrator_inputs():
    m = lag_model()
    assert m.p_layout_.names == ("u", "d", "z", "p")
    assert m.p_layout_.size == m.nu + m.nd + m.nz + len(m.parameter_names) == 6
    v = m.pack_inputs([1.0], [2.0], [3.0])
    parts = m.unpack_inputs(v)
    np.testing.assert_array_equal(parts["u"], [1.0])
    np.testing.assert_array_equal(parts["d"], [2.0])
    np.testing.assert_array_equal(parts["z"], [3.0])
    np.testing.assert_array_equal(parts["p"], m.p)        # current parameters by default


def test_steady_delayed_inputs_are_the_same_in_numbers_and_in_casadi():
    """``z_of`` (each delayed copy equals its source at steady state) serves the numeric steady
    states and the symbolic target problem and locus alike."""
    m = lag_model()
    u, d = ca.SX.sym("u", 1), ca.SX.sym("d", 1)
    f = ca.Function("z", [u, d], [m.z_of(u, d)])
    assert float(f(4.0, 9.0)) == m.z_of([4.0], [9.0])[0] == 4.0


def test_sampled_integrator_reads_its_packed_inputs_by_name():
    """The integrator's packed inputs land where they belong: against the closed-form step of a
    first-order lag, x(T) = x_inf + (x0 - x_inf) exp(-T/tau), x_inf = K z + b d (closed form)."""
    m = lag_model().with_parameters(K=3.0, tau=4.0, b=-0.5)
    F = m.sampled_integrator(2.0, options={"abstol": 1e-12, "reltol": 1e-12})
    x0, u, d, z = 1.0, 7.0, 2.0, 0.4          # u is not the delayed value that acts: z is
    xf = float(F(x0=x0, p=m.pack_inputs([u], [d], [z]))["xf"])
    x_inf = 3.0 * z - 0.5 * d
    assert xf == pytest.approx(x_inf + (x0 - x_inf) * math.exp(-2.0 / 4.0), rel=1e-9)


def test_plant_step_input_unpacks_into_its_parts():
    """The stepper's packed vectors go through the layouts: its step input ``b`` unpacks into the
    applied u, d, the delayed input before/after its switch and the parameters, and its one-call
    step agrees with the closed form of the lag over a sample split by the dead time."""
    m = lag_model()
    plant = Plant(m, 2.0, tolerances={"abstol": 1e-12, "reltol": 1e-12})   # theta = 3 = 1.5 Ts
    plant.reset([0.0], [0.0], [0.0])
    b = plant.b_layout_.unpack(plant.inputs([1.0], [0.0]))
    np.testing.assert_array_equal(b["u"], [1.0])
    np.testing.assert_array_equal(b["p"], m.p)
    assert plant.w_layout_.names[:6] == ("x0", "u", "d", "z_before", "z_after", "p")
    # u steps 0 -> 1 at t = 0: it acts from t = 3 s, i.e. half-way through the second sample
    x = [plant.advance([1.0], [0.0])[0] for _ in range(3)]
    K, tau = 2.0, 5.0
    exact = [K * (1 - math.exp(-max(t - 3.0, 0.0) / tau)) for t in (2.0, 4.0, 6.0)]
    np.testing.assert_allclose(x, exact, rtol=1e-8, atol=1e-12)


def test_in_order_checks_names_before_a_positional_call():
    m = lag_model()
    assert in_order(m.out_, ("x", "u", "d", "z", "p"), ("y",)) is m.out_
    with pytest.raises(ModelError, match="positional call expects inputs"):
        in_order(m.out_, ("x", "d", "u", "z", "p"), ("y",))


# the modules that used to compute offsets into the packed vectors themselves (the patterns are
# the offset arithmetic and positional calls they held)
USERS = ["model.py", "stepper.py", "operating.py", "continuation.py", "responses.py", "linear.py",
         "sim/closed_loop.py"]
OFFSETS = [r"\b(par|pv|P|b|Q|W)\[(o|nu|nx|i|:nu|:nx)\b", r"\[nu \+ nd \+", r"\bo \+= ",
           r"model\._z_src", r"cut\[", r"np\.concatenate\(\[u, d, z", r"self\._p, u, dn",
           r"\b(jac|ode|out)_\(\*[^*]", r"\b(jac|ode|out)_\((x|op\.x|self\.x|X0)\s*,",
           r"\brf\(x0, ", r"\bF\(x, lam\)"]


def test_no_module_packs_the_vector_by_offset_any_more():
    bad = []
    for rel in USERS:
        for i, line in enumerate((ROOT / rel).read_text(encoding="utf-8").splitlines(), 1):
            for pat in OFFSETS:
                if re.search(pat, line):
                    bad.append(f"{rel}:{i}: {line.strip()}")
    assert not bad, "offset arithmetic on a packed vector:\n" + "\n".join(bad)
