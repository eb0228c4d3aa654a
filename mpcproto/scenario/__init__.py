"""Scenario files, studies and single-case runs.

Load and validate
    :func:`load_scenario`, :func:`parse_scenario` -> :class:`Scenario` (plain data)
Set up
    :func:`plant_model`, :func:`controller_model`, :func:`operating_point`, :func:`linear_report`
Studies
    :func:`expand` -> list of :class:`Case` (sweeps x Monte Carlo draws, stable ids, per-case seeds)
Run
    :func:`run_case` (one case -> a JSON-able result dict), :func:`run_scenario` (the nominal case,
    written to a directory as summary.json, CSV trajectories and PNG plots)

The scenario keys are documented in ``docs/scenario-format.md``.
"""

from .schema import Scenario, load_scenario, parse_scenario, get_path, set_path
from .build import plant_model, controller_model, operating_point, linear_report, get_model
from .study import Case, expand, iter_cases, count_cases, case_scenario, draw_values
from .runner import run_case, run_scenario, check_scenario, prepare, find_case, CAUTION

__all__ = [
    "Scenario", "load_scenario", "parse_scenario", "get_path", "set_path",
    "plant_model", "controller_model", "operating_point", "linear_report", "get_model",
    "Case", "expand", "iter_cases", "count_cases", "case_scenario", "draw_values",
    "run_case", "run_scenario", "check_scenario", "prepare", "find_case", "CAUTION",
]
