r"""A two-feed heated syrup mixing tank: a user's own model, kept beside the study that uses it.

This file is what a user writes for a unit of their own; the scenario names it as
``model = "mixer.py:syrup_mixer"`` (relative to the scenario's folder).  Our own invented unit and
numbers.

The unit
--------
A stirred tank of cross-section :math:`A` is fed with sugar concentrate (sugar mass fraction
:math:`w_1`, temperature :math:`T_1`, mass flow :math:`F_1`) and with water (:math:`w = 0`,
temperature :math:`T_2`, mass flow :math:`F_2`).  A steam coil puts the duty :math:`Q` into the
liquid; the tank loses heat to the room (:math:`UA`, room at :math:`T_a`).  The product leaves by
gravity through a fixed outlet restriction, :math:`F_o = k_o\sqrt{h}` (option ``outlet =
"gravity"``), or is taken by a pump at the flow the downstream line asks for (``outlet =
"pumped"``: :math:`F_o` is then a measured DV and the level integrates).

States: the liquid mass :math:`M` (kg), the sugar mass fraction :math:`w` and the temperature
:math:`T` (well mixed: the outflow has the tank's composition and temperature).

Balances (time in minutes)
--------------------------
Total mass:

.. math:: \frac{dM}{dt} = F_1 + F_2 - F_o

Sugar: :math:`d(Mw)/dt = F_1 w_1 - F_o w`.  Expanding :math:`d(Mw)/dt = M\,dw/dt + w\,dM/dt` and
using the mass balance,

.. math:: M\frac{dw}{dt} = F_1 (w_1 - w) - F_2\,w

Energy, with one constant heat capacity :math:`c_p` for every stream (an assumption: a 40 wt% syrup
has a lower :math:`c_p` than water; the error is a few per cent of the heater duty) and the enthalpy
:math:`c_p (T - T_\text{ref})`: :math:`d(M c_p T)/dt = F_1 c_p T_1 + F_2 c_p T_2 - F_o c_p T + 60 Q
- 60\,UA (T - T_a)` (the factor 60 turns kW into kJ/min).  With the mass balance,

.. math:: M c_p \frac{dT}{dt} = F_1 c_p (T_1 - T) + F_2 c_p (T_2 - T) + 60\,Q - 60\,UA\,(T - T_a)

Level: the density of the syrup rises with its sugar content, :math:`\rho(w) = \rho_w + \beta w`
(linear fit, our own numbers), so :math:`h = M / (\rho(w) A)`; the gravity outflow depends on the
level, which makes the mass balance nonlinear and couples it to the composition.

CVs: ``level`` (m), ``brix`` (the sugar content in wt%, :math:`100 w`, from a refractometer) and
``temperature`` (degC).  MVs: ``syrup_flow``, ``water_flow`` (kg/min), ``steam_duty`` (kW).  DVs:
``water_temperature`` (measured) and ``syrup_strength`` (the concentrate's sugar fraction,
unmeasured: a new delivery is weaker or stronger).

Nominal point (our own numbers): product 60 kg/min at 40 wt% and 70 degC, level 1.2 m; then
:math:`F_1 = 60 \cdot 0.40/0.65 = 36.9`, :math:`F_2 = 23.1` kg/min, and the energy balance gives
:math:`Q \approx 122` kW.
"""

from __future__ import annotations

from typing import Literal

import casadi as ca

import mpcproto as mp


def syrup_mixer(outlet: Literal["gravity", "pumped"] = "gravity") -> mp.Model:
    """The mixing tank; *outlet* chooses a gravity outlet (self-regulating level) or a pump."""
    m = mp.Model("syrup_mixer", time_unit="min",
                 description="two-feed heated syrup mixing tank (a user's model beside its study)")
    area = m.parameter("area", 1.5, unit="m2", low=0.01, description="tank cross-section")
    rho_w = m.parameter("water_density", 1000.0, unit="kg/m3", low=500.0, high=1500.0,
                        description="density of water")
    beta = m.parameter("density_slope", 450.0, unit="kg/m3", low=0.0, high=1000.0,
                       description="density rise per unit sugar mass fraction")
    cp = m.parameter("heat_capacity", 3.2, unit="kJ/(kg K)", low=0.5, high=10.0,
                     description="heat capacity of every stream")
    t_syrup = m.parameter("syrup_temperature", 55.0, unit="degC", low=0.0, high=100.0,
                          description="temperature of the concentrate")
    ua = m.parameter("loss_coefficient", 0.5, unit="kW/K", low=0.0,
                     description="heat-loss coefficient to the room")
    t_room = m.parameter("room_temperature", 20.0, unit="degC", low=-20.0, high=50.0,
                         description="room temperature")
    k_out = m.parameter("outlet_coefficient", 54.77, unit="kg/(min m^0.5)", low=0.0,
                        description="gravity outlet: outflow per square root of the level")

    mass = m.state("mass", nominal=2124.0, unit="kg", low=0.0, high=5000.0,
                   description="liquid mass in the tank")
    w = m.state("sugar_fraction", nominal=0.40, unit="kg/kg", low=0.0, high=1.0,
                description="sugar mass fraction of the liquid")
    temp = m.state("liquid_temperature", nominal=70.0, unit="degC", low=0.0, high=100.0,
                   description="liquid temperature")

    f1 = m.mv("syrup_flow", nominal=36.9, unit="kg/min", low=0.0, high=80.0,
              description="sugar concentrate feed")
    f2 = m.mv("water_flow", nominal=23.1, unit="kg/min", low=0.0, high=80.0,
              description="water feed")
    q = m.mv("steam_duty", nominal=122.0, unit="kW", low=0.0, high=250.0,
             description="heat from the steam coil")
    t_water = m.dv("water_temperature", nominal=15.0, unit="degC", low=1.0, high=40.0,
                   measured=True, description="water feed temperature")
    w1 = m.dv("syrup_strength", nominal=0.65, unit="kg/kg", low=0.5, high=0.75, measured=False,
              description="sugar mass fraction of the concentrate (no analyser)")

    level = mass / ((rho_w + beta * w) * area)
    if outlet == "pumped":
        f_out = m.dv("draw_off", nominal=60.0, unit="kg/min", low=0.0, high=120.0, measured=True,
                     description="product taken by the transfer pump (flow meter)")
    else:
        f_out = k_out * ca.sqrt(ca.fmax(level, 0.0))

    m.derivative(mass, f1 + f2 - f_out)
    m.derivative(w, (f1 * (w1 - w) - f2 * w) / mass)
    m.derivative(temp, (f1 * cp * (t_syrup - temp) + f2 * cp * (t_water - temp)
                        + 60.0 * q - 60.0 * ua * (temp - t_room)) / (mass * cp))

    m.cv("level", level, unit="m", low=0.0, high=2.0, description="level transmitter")
    m.cv("brix", 100.0 * w, unit="wt%", low=0.0, high=80.0, description="refractometer")
    m.cv("temperature", temp, unit="degC", low=0.0, high=100.0, description="temperature probe")
    return m
