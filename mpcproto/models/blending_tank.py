r"""Two-feed heated blending tank with level dynamics ("blending_tank").

Demo unit (our own invention, our own numbers): a vertical tank of about 2 m3 that blends
concentrated caustic soda (50 wt% NaOH) with softened water into a dilute cleaning solution
(2 wt% NaOH) and heats it to 75 degC for a cleaning-in-place (CIP) system.  A supply pump draws the
solution to the CIP circuit.

**Caution.**  Hot caustic is corrosive and scalds.  This model is for simulation studies only; a real
unit needs its own independent safety systems (high-level and high-temperature trips, overflow),
management of change, and the judgement of licensed engineers under local codes.

Variables
---------
=========  ======================  ==========  =============================================
role       name                    unit        meaning
=========  ======================  ==========  =============================================
state      ``h``                   m           liquid level
state      ``x_naoh``              kg/kg       NaOH mass fraction in the tank (well mixed)
state      ``T_tank``              degC        liquid temperature
MV         ``caustic_flow``        kg/s        concentrated caustic feed :math:`w_1`
MV         ``water_flow``          kg/s        softened water feed :math:`w_2`
MV         ``heater_duty``         kW          heat to the liquid :math:`Q` (steam coil)
DV / MV    ``draw_off``            kg/s        outflow :math:`w` to the CIP supply pump
DV         ``caustic_strength``    kg/kg       NaOH mass fraction of the caustic feed (unmeasured)
DV         ``water_temperature``   degC        softened water temperature (unmeasured)
CV         ``level``               m           :math:`h`
CV         ``concentration``       **wt%**     :math:`100\,x`  (note: wt%, not a fraction)
CV         ``temperature``         degC        :math:`T`
=========  ======================  ==========  =============================================

Options
-------
``outflow``
    ``"dv"`` (default): the draw-off is a measured disturbance -- the CIP supply pump takes what the
    cleaning circuit needs.  ``"mv"``: the draw-off is an MV (a flow controller on the outlet).
    ``"valve"``: the tank drains through a valve with a fixed opening,
    :math:`w = C_v \sqrt{h}` (parameter ``valve_coefficient``); ``draw_off`` is then not declared.
``shaft_work``
    ``"none"`` (default) or ``"agitator"``: adds the agitator power :math:`W_s` (parameter
    ``agitator_power``, kW) to the energy balance.

Derivation
----------
Assumptions: perfect mixing; constant liquid density :math:`\rho` and heat capacity :math:`c_p` for
every stream (the product is dilute); no heat of dilution (diluting 50 wt% caustic does release heat;
here it appears as a slow, unmeasured disturbance on the temperature loop); vertical tank of
constant cross-section :math:`A`; heat loss to the surroundings :math:`UA\,(T - T_a)`.

Overall mass balance, hold-up :math:`M = \rho A h`:

.. math:: \frac{dM}{dt} = w_1 + w_2 - w
          \quad\Rightarrow\quad \frac{dh}{dt} = \frac{w_1 + w_2 - w}{\rho A}.

NaOH balance, caustic feed strength :math:`x_c`, water free of NaOH:

.. math:: \frac{d(Mx)}{dt} = w_1 x_c - w x.

Product rule, :math:`\frac{d(Mx)}{dt} = M\frac{dx}{dt} + x\frac{dM}{dt}`, and the mass balance give

.. math:: M\frac{dx}{dt} = w_1 x_c - w x - x(w_1 + w_2 - w) = w_1 (x_c - x) - w_2 x.

Energy balance (enthalpy :math:`M c_p (T - T_{ref})`; caustic at :math:`T_1`, water at :math:`T_2`):

.. math:: \frac{d}{dt}\bigl[M c_p (T - T_{ref})\bigr] = w_1 c_p (T_1 - T_{ref}) + w_2 c_p (T_2 - T_{ref})
          - w c_p (T - T_{ref}) + Q + W_s - UA\,(T - T_a),

and with the product rule and the mass balance again (:math:`T_{ref}` drops out):

.. math:: M c_p \frac{dT}{dt} = w_1 c_p (T_1 - T) + w_2 c_p (T_2 - T) + Q + W_s - UA\,(T - T_a).

Units: :math:`w` in kg/s, :math:`c_p` in kJ/(kg K), :math:`Q, W_s` in kW = kJ/s: every term in kW.

Nominal point (computed from the parameters, so it is an exact steady state): level 1.2 m,
2 wt% NaOH, 75 degC, draw-off 1.5 kg/s, caustic 50 wt% at 25 degC, water at 15 degC.  The MVs follow
from the steady-state balances: :math:`w_1 = w x / x_c`, :math:`w_2 = w - w_1`,
:math:`Q = w_1 c_p (T - T_1) + w_2 c_p (T - T_2) + UA (T - T_a) - W_s`.
"""

from __future__ import annotations

import math
from typing import Any

import casadi as ca

from ..model import Model

DESCRIPTION = ("two-feed heated blending tank with level dynamics: caustic + water -> hot dilute "
               "caustic for cleaning-in-place (our demo unit)")
TIME_UNIT = "s"
OPTIONS: dict[str, dict[str, Any]] = {
    "outflow": {"default": "dv", "allowed": ("dv", "mv", "valve"),
                "description": "draw-off as a measured DV, as an MV, or through a valve law on the level"},
    "shaft_work": {"default": "none", "allowed": ("none", "agitator"),
                   "description": "add the agitator power to the energy balance"},
}

# nominal operating point of the demo unit (our own numbers)
NOMINAL_LEVEL = 1.2          # m
NOMINAL_FRACTION = 0.02      # kg NaOH / kg
NOMINAL_TEMPERATURE = 75.0   # degC
NOMINAL_DRAW = 1.5           # kg/s
NOMINAL_STRENGTH = 0.50      # kg NaOH / kg in the caustic feed
NOMINAL_WATER_T = 15.0       # degC


def default_parameters(options: dict[str, Any]) -> dict[str, float]:
    """Default parameter values for the given options."""
    p = {
        "area": 1.13,                 # m2  (1.2 m diameter)
        "height": 1.8,                # m   wall height up to the overflow
        "density": 1015.0,            # kg/m3
        "heat_capacity": 4.0,         # kJ/(kg K)
        "caustic_temperature": 25.0,  # degC
        "ambient_temperature": 20.0,  # degC
        "loss_coefficient": 0.03,     # kW/K
    }
    if options["outflow"] == "valve":
        p["valve_coefficient"] = NOMINAL_DRAW / math.sqrt(NOMINAL_LEVEL)  # kg/s per sqrt(m)
    if options["shaft_work"] == "agitator":
        p["agitator_power"] = 2.0     # kW
    return p


def build(params: dict[str, float], options: dict[str, Any]) -> Model:
    """Declare and build the blending tank with the given parameters and options."""
    m = Model("blending_tank", time_unit=TIME_UNIT, description=DESCRIPTION)
    A = m.parameter("area", params["area"], unit="m2", low=1e-3, description="tank cross-section")
    H = params["height"]
    m.parameter("height", H, unit="m", low=0.1, description="wall height up to the overflow")
    rho = m.parameter("density", params["density"], unit="kg/m3", low=500.0, high=2500.0,
                      description="liquid density (all streams)")
    cp = m.parameter("heat_capacity", params["heat_capacity"], unit="kJ/(kg K)", low=0.5, high=10.0,
                     description="liquid heat capacity (all streams)")
    T1 = m.parameter("caustic_temperature", params["caustic_temperature"], unit="degC",
                     low=-20.0, high=100.0, description="caustic feed temperature")
    Ta = m.parameter("ambient_temperature", params["ambient_temperature"], unit="degC",
                     low=-40.0, high=60.0, description="surroundings temperature")
    UA = m.parameter("loss_coefficient", params["loss_coefficient"], unit="kW/K", low=0.0,
                     description="heat-loss coefficient to the surroundings")

    h = m.state("h", nominal=NOMINAL_LEVEL, unit="m", low=0.0, high=H, description="liquid level")
    x = m.state("x_naoh", nominal=NOMINAL_FRACTION, unit="kg/kg", low=0.0, high=1.0,
                description="NaOH mass fraction in the tank")
    T = m.state("T_tank", nominal=NOMINAL_TEMPERATURE, unit="degC", low=0.0, high=100.0,
                description="liquid temperature")

    # steady-state MVs at the nominal point
    w = NOMINAL_DRAW
    if options["outflow"] == "valve":
        w = params["valve_coefficient"] * math.sqrt(NOMINAL_LEVEL)
    ws_nom = params.get("agitator_power", 0.0)
    w1_n = w * NOMINAL_FRACTION / NOMINAL_STRENGTH
    w2_n = w - w1_n
    q_n = (w1_n * params["heat_capacity"] * (NOMINAL_TEMPERATURE - params["caustic_temperature"])
           + w2_n * params["heat_capacity"] * (NOMINAL_TEMPERATURE - NOMINAL_WATER_T)
           + params["loss_coefficient"] * (NOMINAL_TEMPERATURE - params["ambient_temperature"])
           - ws_nom)

    w1 = m.mv("caustic_flow", nominal=w1_n, unit="kg/s", low=0.0, high=0.2,
              description="concentrated caustic feed")
    w2 = m.mv("water_flow", nominal=w2_n, unit="kg/s", low=0.0, high=3.0,
              description="softened water feed")
    Q = m.mv("heater_duty", nominal=q_n, unit="kW", low=0.0, high=600.0,
             description="heat to the liquid (steam coil)")
    if options["outflow"] == "mv":
        wout = m.mv("draw_off", nominal=w, unit="kg/s", low=0.0, high=3.0,
                    description="outflow to the CIP supply (flow controller)")
    elif options["outflow"] == "dv":
        wout = m.dv("draw_off", nominal=w, unit="kg/s", low=0.0, high=3.0, measured=True,
                    description="outflow taken by the CIP supply pump (flow meter)")
    xc = m.dv("caustic_strength", nominal=NOMINAL_STRENGTH, unit="kg/kg", low=0.3, high=0.55,
              measured=False, description="NaOH mass fraction of the caustic feed")
    T2 = m.dv("water_temperature", nominal=NOMINAL_WATER_T, unit="degC", low=1.0, high=40.0,
              measured=False, description="softened water temperature")
    if options["outflow"] == "valve":
        cv_ = m.parameter("valve_coefficient", params["valve_coefficient"], unit="kg/(s m^0.5)",
                          low=0.0, description="outlet valve: draw-off = coefficient * sqrt(level)")
        wout = cv_ * ca.sqrt(ca.fmax(h, 0.0))
    Ws = 0.0
    if options["shaft_work"] == "agitator":
        Ws = m.parameter("agitator_power", params["agitator_power"], unit="kW", low=0.0,
                         description="agitator shaft power dissipated in the liquid")

    M = rho * A * h
    m.derivative(h, (w1 + w2 - wout) / (rho * A))
    m.derivative(x, (w1 * (xc - x) - w2 * x) / M)
    m.derivative(T, (w1 * cp * (T1 - T) + w2 * cp * (T2 - T) + Q + Ws - UA * (T - Ta)) / (M * cp))

    m.cv("level", h, unit="m", low=0.0, high=H, description="level transmitter")
    m.cv("concentration", 100.0 * x, unit="wt%", low=0.0, high=55.0,
         description="NaOH concentration (conductivity analyser), in wt%")
    m.cv("temperature", T, unit="degC", low=0.0, high=100.0, description="tank temperature")
    return m.build()
