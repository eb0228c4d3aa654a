"""Closed-loop simulation (layer 4): plant, signals, instruments, actuators, faults.

Signals
    Signal, Constant, Step, Ramp, Pulse, Sine, RandomWalk, Table, Sum, signal_from_spec,
    table_from_csv
Instruments, actuators, faults
    Instrument, Actuator, Fault, instrument_from_spec, actuator_from_spec, fault_from_spec
Plant and closed loop
    Plant, ClosedLoop, simulate, OpenLoop
"""

from .signals import (Signal, Constant, Step, Ramp, Pulse, Sine, RandomWalk, Table, Sum,
                      signal_from_spec, table_from_csv, SIGNAL_KINDS)
from .instruments import (Instrument, Actuator, Fault, instrument_from_spec, actuator_from_spec,
                          fault_from_spec, FAULT_KINDS)
from .plant import Plant
from .closed_loop import ClosedLoop, simulate, split_rng
from .open_loop import OpenLoop

__all__ = [
    "Signal", "Constant", "Step", "Ramp", "Pulse", "Sine", "RandomWalk", "Table", "Sum",
    "signal_from_spec", "table_from_csv", "SIGNAL_KINDS",
    "Instrument", "Actuator", "Fault", "instrument_from_spec", "actuator_from_spec",
    "fault_from_spec", "FAULT_KINDS",
    "Plant", "ClosedLoop", "simulate", "split_rng", "OpenLoop",
]
