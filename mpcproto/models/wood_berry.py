r"""The Wood & Berry (1973) methanol-water distillation column ("wood_berry").

R. K. Wood and M. W. Berry, "Terminal composition control of a binary distillation column",
Chemical Engineering Science 28, 1973.  The transfer matrix (time in minutes; values quoted from
memory, as reproduced in many process-control textbooks):

.. math::
    \begin{bmatrix} x_D \\ x_B \end{bmatrix} =
    \begin{bmatrix} \frac{12.8 e^{-s}}{16.7 s + 1} & \frac{-18.9 e^{-3s}}{21 s + 1} \\
                    \frac{6.6 e^{-7s}}{10.9 s + 1} & \frac{-19.4 e^{-3s}}{14.4 s + 1} \end{bmatrix}
    \begin{bmatrix} R \\ S \end{bmatrix} +
    \begin{bmatrix} \frac{3.8 e^{-8.1 s}}{14.9 s + 1} \\ \frac{4.9 e^{-3.4 s}}{13.2 s + 1} \end{bmatrix} F

with reflux :math:`R` and steam :math:`S` (lb/min) as MVs, feed flow :math:`F` (lb/min) as a measured
DV, and the top and bottom methanol compositions :math:`x_D, x_B` (mol%) as CVs.  It is an identified
model (from step tests), so it is "derived" from the column's balances only through the experiment;
:func:`~mpcproto.models.transfer_matrix_model` realizes it as first-order lags with dead times.
Nominal values (from memory): R = 1.95, S = 1.71, F = 2.45 lb/min, x_D = 96.25 mol%,
x_B = 0.5 mol%.
"""

from __future__ import annotations

from typing import Any

from ..model import Model
from .transfer_matrix import transfer_matrix_model

DESCRIPTION = "Wood & Berry (1973) methanol-water column: 2x2 FOPDT transfer matrix plus feed disturbance"
TIME_UNIT = "min"
OPTIONS: dict[str, dict[str, Any]] = {}


def default_parameters(options: dict[str, Any]) -> dict[str, float]:
    """Gains, time constants and dead times of the published matrix (from memory)."""
    p = {}
    table = {  # (cv, input): (gain, tau, dead time)
        ("xD", "R"): (12.8, 16.7, 1.0), ("xD", "S"): (-18.9, 21.0, 3.0),
        ("xB", "R"): (6.6, 10.9, 7.0), ("xB", "S"): (-19.4, 14.4, 3.0),
        ("xD", "F"): (3.8, 14.9, 8.1), ("xB", "F"): (4.9, 13.2, 3.4),
    }
    for (c, i), (k, tau, th) in table.items():
        p[f"K_{c}_{i}"] = k
        p[f"tau_{c}_{i}"] = tau
        p[f"theta_{c}_{i}"] = th
    # every dead time times this factor: a plant slower to answer than its identified model
    # (dead-time mismatch studies; 1 = the published dead times)
    p["dead_time_scale"] = 1.0
    return p


def build(params: dict[str, float], options: dict[str, Any]) -> Model:
    """Realize the matrix with :func:`transfer_matrix_model`.

    The gains, time constants and dead times are structural here (each dead time sets a delay, each
    time constant a state), so they are baked into the model; the registry passes overrides in.
    ``dead_time_scale`` multiplies every dead time (a dead-time mismatch in one number).
    """
    names = {"xD": "top_composition", "xB": "bottom_composition", "R": "reflux", "S": "steam", "F": "feed"}

    def el(c, i):
        return {"gain": params[f"K_{c}_{i}"], "time_constants": [params[f"tau_{c}_{i}"]],
                "dead_time": params[f"theta_{c}_{i}"] * params["dead_time_scale"]}

    return transfer_matrix_model(
        "wood_berry",
        mvs=[{"name": "reflux", "unit": "lb/min", "nominal": 1.95, "low": 0.0, "high": 4.0,
              "description": "reflux flow"},
             {"name": "steam", "unit": "lb/min", "nominal": 1.71, "low": 0.0, "high": 4.0,
              "description": "reboiler steam flow"}],
        cvs=[{"name": "top_composition", "unit": "mol%", "nominal": 96.25, "low": 0.0, "high": 100.0,
              "description": "methanol in the distillate"},
             {"name": "bottom_composition", "unit": "mol%", "nominal": 0.5, "low": 0.0, "high": 100.0,
              "description": "methanol in the bottoms"}],
        elements={names[c]: {names[i]: el(c, i) for i in ("R", "S")} for c in ("xD", "xB")},
        dvs=[{"name": "feed", "unit": "lb/min", "nominal": 2.45, "low": 0.0, "high": 5.0, "measured": True,
              "description": "feed flow"}],
        dv_elements={names[c]: {"feed": el(c, "F")} for c in ("xD", "xB")},
        time_unit=TIME_UNIT,
        description=DESCRIPTION,
    )
