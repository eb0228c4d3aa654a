r"""The quadruple-tank (four-tank) process of Johansson (2000) ("quadruple_tank").

K. H. Johansson, "The quadruple-tank process: a multivariable laboratory process with an adjustable
zero", IEEE Transactions on Control Systems Technology 8(3), 2000.  Parameter values are quoted from
memory.

Four tanks: tanks 3 and 4 sit above tanks 1 and 2 and drain into them.  Pump 1 (voltage
:math:`v_1`) feeds tank 1 and tank 4 through a three-way valve that sends the fraction
:math:`\gamma_1` to tank 1; pump 2 feeds tank 2 (fraction :math:`\gamma_2`) and tank 3.  The
levels of the lower tanks 1 and 2 are controlled.

Variables
---------
=====  ================  ====  =====================================
role   name              unit  meaning
=====  ================  ====  =====================================
state  ``h1`` .. ``h4``  cm    levels of tanks 1..4
MV     ``v1``, ``v2``    V     pump voltages
CV     ``level1``        cm    level of tank 1
CV     ``level2``        cm    level of tank 2
=====  ================  ====  =====================================

Derivation
----------
Mass balance of each tank (constant density, cross-section :math:`A_i`), Torricelli's law for the
outlet of cross-section :math:`a_i`: :math:`q_{out,i} = a_i\sqrt{2 g h_i}`; pump flows
:math:`k_i v_i`:

.. math::
    A_1\dot h_1 = -a_1\sqrt{2gh_1} + a_3\sqrt{2gh_3} + \gamma_1 k_1 v_1

    A_2\dot h_2 = -a_2\sqrt{2gh_2} + a_4\sqrt{2gh_4} + \gamma_2 k_2 v_2

    A_3\dot h_3 = -a_3\sqrt{2gh_3} + (1-\gamma_2) k_2 v_2

    A_4\dot h_4 = -a_4\sqrt{2gh_4} + (1-\gamma_1) k_1 v_1

The linearized MIMO system has a transmission zero in the right half plane (non-minimum phase) iff
:math:`0 < \gamma_1 + \gamma_2 < 1` (Johansson 2000).  The published outputs are sensor voltages
:math:`k_c h_i`; here the CVs are the levels themselves (in cm), which scales rows of the transfer
matrix and moves no zero.

Options
-------
``setting``: ``"minimum_phase"`` (default; Johansson's P-: :math:`k_1 = 3.33`, :math:`k_2 = 3.35`
cm3/(V s), :math:`\gamma_1 = 0.70`, :math:`\gamma_2 = 0.60`) or ``"non_minimum_phase"`` (P+:
:math:`k_1 = 3.14`, :math:`k_2 = 3.29`, :math:`\gamma_1 = 0.43`, :math:`\gamma_2 = 0.34`).
Nominal pump voltages :math:`v_1 = v_2 = 3.00` V (P-) and :math:`3.15` V (P+); :math:`A_1 = A_3 = 28`, :math:`A_2 = A_4 = 32` cm2,
:math:`a_1 = a_3 = 0.071`, :math:`a_2 = a_4 = 0.057` cm2, :math:`g = 981` cm/s2.  The nominal
levels are the steady state at those voltages (computed in closed form from the balances).
"""

from __future__ import annotations

from typing import Any

import casadi as ca

from ..model import Model

DESCRIPTION = "quadruple-tank process of Johansson (2000), minimum- or non-minimum-phase setting"
TIME_UNIT = "s"
OPTIONS: dict[str, dict[str, Any]] = {
    "setting": {"default": "minimum_phase", "allowed": ("minimum_phase", "non_minimum_phase"),
                "description": "Johansson's operating point P- (minimum phase) or P+ (non-minimum phase)"},
}
TANK_HEIGHT = 20.0  # cm, laboratory tanks
NOMINAL_VOLTAGE = {"minimum_phase": 3.0, "non_minimum_phase": 3.15}  # V (from memory)


def default_parameters(options: dict[str, Any]) -> dict[str, float]:
    """Johansson's parameters for the chosen setting (from memory)."""
    p = {"A1": 28.0, "A2": 32.0, "A3": 28.0, "A4": 32.0,
         "a1": 0.071, "a2": 0.057, "a3": 0.071, "a4": 0.057, "g": 981.0}
    if options["setting"] == "minimum_phase":
        p.update(k1=3.33, k2=3.35, gamma1=0.70, gamma2=0.60)
    else:
        p.update(k1=3.14, k2=3.29, gamma1=0.43, gamma2=0.34)
    return p


def build(params: dict[str, float], options: dict[str, Any]) -> Model:
    """Declare and build the four-tank process."""
    m = Model("quadruple_tank", time_unit=TIME_UNIT, description=DESCRIPTION)
    P = {}
    for i in range(1, 5):
        P[f"A{i}"] = m.parameter(f"A{i}", params[f"A{i}"], unit="cm2", low=1e-6,
                                 description=f"cross-section of tank {i}")
    for i in range(1, 5):
        P[f"a{i}"] = m.parameter(f"a{i}", params[f"a{i}"], unit="cm2", low=0.0,
                                 description=f"outlet hole cross-section of tank {i}")
    for i in (1, 2):
        P[f"k{i}"] = m.parameter(f"k{i}", params[f"k{i}"], unit="cm3/(V s)", low=0.0,
                                 description=f"pump {i} flow per volt")
    for i in (1, 2):
        P[f"gamma{i}"] = m.parameter(f"gamma{i}", params[f"gamma{i}"], unit="-", low=0.0, high=1.0,
                                     description=f"fraction of pump {i} flow sent to tank {i}")
    g = m.parameter("g", params["g"], unit="cm/s2", low=0.0, description="gravity")

    # nominal levels: steady state at v1 = v2 = 3 V, closed form (upper tanks first)
    pv = params
    v = NOMINAL_VOLTAGE[options["setting"]]
    q3 = (1 - pv["gamma2"]) * pv["k2"] * v
    q4 = (1 - pv["gamma1"]) * pv["k1"] * v
    q1 = pv["gamma1"] * pv["k1"] * v + q3
    q2 = pv["gamma2"] * pv["k2"] * v + q4

    def level(q, a):
        return (q / a) ** 2 / (2 * pv["g"]) if a > 0 else TANK_HEIGHT

    nominal = [level(q1, pv["a1"]), level(q2, pv["a2"]), level(q3, pv["a3"]), level(q4, pv["a4"])]
    h = [m.state(f"h{i + 1}", nominal=nominal[i], unit="cm", low=0.0, high=TANK_HEIGHT,
                 description=f"level of tank {i + 1}") for i in range(4)]
    v1 = m.mv("v1", nominal=v, unit="V", low=0.0, high=10.0, description="pump 1 voltage")
    v2 = m.mv("v2", nominal=v, unit="V", low=0.0, high=10.0, description="pump 2 voltage")

    def out(i):
        return P[f"a{i}"] * ca.sqrt(2 * g * ca.fmax(h[i - 1], 0.0))

    m.derivative(h[0], (-out(1) + out(3) + P["gamma1"] * P["k1"] * v1) / P["A1"])
    m.derivative(h[1], (-out(2) + out(4) + P["gamma2"] * P["k2"] * v2) / P["A2"])
    m.derivative(h[2], (-out(3) + (1 - P["gamma2"]) * P["k2"] * v2) / P["A3"])
    m.derivative(h[3], (-out(4) + (1 - P["gamma1"]) * P["k1"] * v1) / P["A4"])
    m.cv("level1", h[0], unit="cm", low=0.0, high=TANK_HEIGHT, description="level of tank 1")
    m.cv("level2", h[1], unit="cm", low=0.0, high=TANK_HEIGHT, description="level of tank 2")
    return m.build()
