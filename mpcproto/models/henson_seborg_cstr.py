r"""Jacketed exothermic CSTR with a first-order Arrhenius reaction ("henson_seborg_cstr").

The classic non-isothermal continuous stirred-tank reactor A -> B with its published parameter set
(Henson & Seborg, *Nonlinear Process Control*, Prentice Hall 1997; parameter values quoted from
memory): it shows three steady states over a band of coolant temperatures, the middle one unstable.

Variables
---------
=========  ========================  ========  ===========================================
role       name                      unit      meaning
=========  ========================  ========  ===========================================
state      ``CA``                    mol/L     concentration of A in the reactor
state      ``T``                     K         reactor temperature
MV         ``coolant_temperature``   K         jacket coolant temperature :math:`T_c`
DV         ``feed_concentration``    mol/L     :math:`C_{Af}` (unmeasured: no online analyser)
DV         ``feed_temperature``      K         :math:`T_f` (measured)
DV         ``feed_flow``             L/min     :math:`q` (measured)
CV         ``concentration``         mol/L     :math:`C_A`
CV         ``temperature``           K         :math:`T`
=========  ========================  ========  ===========================================

Derivation
----------
Assumptions: constant volume :math:`V` (overflow), perfect mixing, constant density :math:`\rho` and
heat capacity :math:`C_p`, rate :math:`r = k_0 e^{-E/(RT)} C_A` (mol/(L min)), heat transfer to the
jacket :math:`UA (T_c - T)` with a well-mixed coolant at :math:`T_c`.

Component balance on A (volume constant, so :math:`d(VC_A)/dt = V\,dC_A/dt`):

.. math:: V\frac{dC_A}{dt} = q (C_{Af} - C_A) - V k_0 e^{-E/(RT)} C_A.

Energy balance (liquid enthalpy :math:`\rho C_p V (T - T_{ref})`, heat of reaction
:math:`\Delta H < 0` for an exothermic reaction):

.. math:: \rho C_p V\frac{dT}{dt} = \rho C_p q (T_f - T) + (-\Delta H) V k_0 e^{-E/(RT)} C_A
          + UA (T_c - T).

Units: :math:`q` L/min, :math:`V` L, :math:`\rho` g/L, :math:`C_p` J/(g K), :math:`\Delta H` J/mol,
:math:`UA` J/(min K), so time is in minutes.

Default parameters (Henson & Seborg, from memory): :math:`q = 100` L/min, :math:`V = 100` L,
:math:`C_{Af} = 1` mol/L, :math:`T_f = 350` K, :math:`\rho = 1000` g/L, :math:`C_p = 0.239` J/(g K),
:math:`\Delta H = -5\times10^4` J/mol, :math:`E/R = 8750` K, :math:`k_0 = 7.2\times10^{10}` 1/min,
:math:`UA = 5\times10^4` J/(min K); at :math:`T_c = 300` K the steady state
:math:`C_A = 0.5` mol/L, :math:`T = 350` K follows exactly (:math:`k(350) = 7.2\times10^{10}
e^{-25} \approx 1.0` 1/min).

**Caution.**  A runaway reactor can injure people; simulation only -- real reactors need independent
safety systems, management of change and licensed engineers.
"""

from __future__ import annotations

from typing import Any

import casadi as ca

from ..model import Model

DESCRIPTION = ("jacketed exothermic CSTR, first-order Arrhenius reaction, Henson-Seborg parameters; "
               "MV coolant temperature")
TIME_UNIT = "min"
OPTIONS: dict[str, dict[str, Any]] = {}


def default_parameters(options: dict[str, Any]) -> dict[str, float]:
    """The published Henson-Seborg parameter set (from memory)."""
    return {
        "volume": 100.0,              # L
        "density": 1000.0,            # g/L
        "heat_capacity": 0.239,       # J/(g K)
        "heat_of_reaction": -5.0e4,   # J/mol
        "activation_temperature": 8750.0,  # E/R, K
        "rate_constant": 7.2e10,      # k0, 1/min
        "heat_transfer": 5.0e4,       # UA, J/(min K)
    }


def build(params: dict[str, float], options: dict[str, Any]) -> Model:
    """Declare and build the reactor."""
    m = Model("henson_seborg_cstr", time_unit=TIME_UNIT, description=DESCRIPTION)
    V = m.parameter("volume", params["volume"], unit="L", low=1e-6, description="reactor volume")
    rho = m.parameter("density", params["density"], unit="g/L", low=1e-6,
                      description="liquid density")
    Cp = m.parameter("heat_capacity", params["heat_capacity"], unit="J/(g K)", low=1e-6,
                     description="liquid heat capacity")
    dH = m.parameter("heat_of_reaction", params["heat_of_reaction"], unit="J/mol",
                     description="heat of reaction (negative: exothermic)")
    EoR = m.parameter("activation_temperature", params["activation_temperature"], unit="K",
                      low=0.0, description="activation energy over the gas constant, E/R")
    k0 = m.parameter("rate_constant", params["rate_constant"], unit="1/min", low=0.0,
                     description="Arrhenius pre-exponential factor")
    UA = m.parameter("heat_transfer", params["heat_transfer"], unit="J/(min K)", low=0.0,
                     description="jacket heat-transfer coefficient times area")

    CA = m.state("CA", nominal=0.5, unit="mol/L", low=0.0, high=10.0,
                 description="concentration of A in the reactor")
    T = m.state("T", nominal=350.0, unit="K", low=250.0, high=600.0, description="reactor temperature")
    Tc = m.mv("coolant_temperature", nominal=300.0, unit="K", low=250.0, high=350.0,
              description="jacket coolant temperature")
    CAf = m.dv("feed_concentration", nominal=1.0, unit="mol/L", low=0.0, high=10.0, measured=False,
               description="concentration of A in the feed (no online analyser)")
    Tf = m.dv("feed_temperature", nominal=350.0, unit="K", low=250.0, high=450.0, measured=True,
              description="feed temperature")
    q = m.dv("feed_flow", nominal=100.0, unit="L/min", low=0.0, high=300.0, measured=True,
             description="feed flow")

    r = k0 * ca.exp(-EoR / T) * CA
    m.derivative(CA, q / V * (CAf - CA) - r)
    m.derivative(T, q / V * (Tf - T) + (-dH) / (rho * Cp) * r + UA / (V * rho * Cp) * (Tc - T))
    m.cv("concentration", CA, unit="mol/L", low=0.0, high=10.0, description="outlet concentration of A")
    m.cv("temperature", T, unit="K", low=250.0, high=600.0, description="reactor temperature")
    return m.build()
