"""The plant stepper as seen from the simulator: :class:`mpcproto.stepper.Plant`.

The one nonlinear stepper lives on layer 2 (:mod:`mpcproto.stepper`) because the open-loop step
tests of that layer use it as well; the closed loop imports it from here.
"""

from ..stepper import DEFAULT_TOLERANCES, Plant

__all__ = ["Plant", "DEFAULT_TOLERANCES"]
