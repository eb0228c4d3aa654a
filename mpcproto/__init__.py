"""mpcproto: prototype a model-predictive controller for a process unit.

Model (layer 1)
    Model, Variable, Delay
Operating points and linear models (layer 2)
    OperatingPoint, LinearModel, DiscreteLinearModel, linearize, rga,
    steady_states, steady_state, solve_targets, TargetResult
Design checks (layer 2)
    gain_matrix_analysis, GainAnalysis, niederlinski_index, rga_at_frequency, sampling_advice,
    steady_state_locus, SteadyStateLocus, loop_margins, LoopMargins, half_rule,
    unconstrained_analysis, UnconstrainedAnalysis, optimal_cost
Open-loop tests and step fits (layer 2)
    open_loop_test, plot_response_test, linearity_sweep, ResponseTest, ProcessFit,
    fit_step_response, step_model_response
Built-in models (layer 1)
    models, make_model, available_models, transfer_matrix_model, TransferElement
Controller protocol (layer 3)
    Controller, Measurement, Targets, ControlOutput, accepts_readback
PID loops and tuning (layer 3)
    PIDLoop, PIDController, pid_loop_from_spec, pid_from_settings, suggest_pairing,
    StepData, step_test, fit_fopdt, fit_sopdt, fit_integrating, fit_step, ultimate_point, simc,
    imc, ziegler_nichols, tune_loop, tune_pid_loops
Regulatory structures of the PID baseline (layer 3)
    RegulatoryController, Feedforward, Ratio, Cascade, Selector, SplitRange, Valve,
    design_feedforward, OverLoops, identify_over_loops
Predictive control (layer 3)
    PredictiveController, DisturbanceEstimator, SteadyTarget
Closed-loop simulation (layer 4)
    simulate, ClosedLoop, Plant, OpenLoop, Signal, signal_from_spec, Instrument, Actuator, Fault,
    instrument_from_spec, actuator_from_spec, fault_from_spec
Trajectory and analysis (layer 5)
    Trajectory, cv_performance, mv_usage, kpis, violations, mv_violations, controller_health,
    summarize, compare, Comparison, describe_controller, fairness_notes, tuning_text
Scenario files and studies (layer 6)
    scenario, Scenario, load_scenario, parse_scenario, check_scenario, Case, expand, run_case,
    run_scenario, linear_report
Batch runs and reports (layer 6)
    run_batch, BatchOutcome, load_results, local_pool, dask_executor, write_summary_csv,
    compare_with_baseline, BaselineComparison, write_junit, write_html_report
Errors
    MpcprotoError and its subclasses
"""

from .exceptions import (
    MpcprotoError, ModelError, NotBuiltError, SettingsError, ScenarioError,
    OperatingPointError, SimulationError,
)
from .model import Model, Variable, Delay
from .operating import OperatingPoint, steady_states, steady_state
from .target_problem import TargetResult, solve_targets
from .linear import LinearModel, DiscreteLinearModel, linearize, rga
from .control.base import Controller, Measurement, Targets, ControlOutput, accepts_readback
from .responses import ResponseTest, open_loop_test, plot_response_test, linearity_sweep
from .step_fit import ProcessFit, fit_step_response, step_model_response
from . import models
from .models import TransferElement, transfer_matrix_model
from .trajectory import Trajectory
from .sim import (Signal, signal_from_spec, Instrument, Actuator, Fault, instrument_from_spec,
                  actuator_from_spec, fault_from_spec, Plant, ClosedLoop, simulate, OpenLoop)
from .analysis import (cv_performance, mv_usage, kpis, violations, mv_violations, controller_health,
                       summarize)
from .control.pid import PIDLoop, PIDController, pid_loop_from_spec, suggest_pairing
from .control.tuning import (StepData, step_test, fit_fopdt, fit_sopdt, fit_integrating,
                             fit_step, ultimate_point, simc, imc, ziegler_nichols, tune_loop,
                             tune_pid_loops)
from .control.pid_settings import pid_from_settings
from .compare import compare, Comparison, describe_controller, fairness_notes, tuning_text
from .control.regulatory import (RegulatoryController, Feedforward, Ratio, Cascade, Selector,
                                 SplitRange, Valve)
from .control.regulatory_settings import design_feedforward
from .control.over_loops import OverLoops, identify_over_loops
from .design import (GainAnalysis, gain_matrix_analysis, niederlinski_index, rga_at_frequency,
                     sampling_advice)
from .continuation import SteadyStateLocus, steady_state_locus
from .control.loop_analysis import LoopMargins, loop_margins, half_rule
from .control.mpc import PredictiveController
from .control.mpc_analysis import UnconstrainedAnalysis, optimal_cost, unconstrained_analysis
from .control.estimator import DisturbanceEstimator
from .control.steady_target import SteadyTarget
from . import scenario
from .scenario import (Scenario, load_scenario, parse_scenario, check_scenario, Case, expand,
                       run_case, run_scenario, linear_report)
from .scenario.batch import run_batch, BatchOutcome, load_results
from .scenario.executors import local_pool, dask_executor
from .report.summary import write_summary_csv
from .report.baseline import compare_with_baseline, BaselineComparison
from .report.junit import write_junit
from .report.html import write_html_report

make_model = models.make
available_models = models.available

from ._version import __version__  # noqa: E402

__all__ = [
    "MpcprotoError", "ModelError", "NotBuiltError", "SettingsError", "ScenarioError",
    "OperatingPointError", "SimulationError",
    "Model", "Variable", "Delay",
    "OperatingPoint", "LinearModel", "DiscreteLinearModel", "linearize", "rga",
    "Controller", "Measurement", "Targets", "ControlOutput", "accepts_readback",
    "TargetResult", "steady_states", "steady_state", "solve_targets",
    "ResponseTest", "open_loop_test", "plot_response_test", "linearity_sweep",
    "ProcessFit", "fit_step_response", "step_model_response",
    "models", "make_model", "available_models", "transfer_matrix_model", "TransferElement",
    "Trajectory", "Signal", "signal_from_spec", "Instrument", "Actuator", "Fault",
    "instrument_from_spec", "actuator_from_spec", "fault_from_spec", "Plant", "ClosedLoop",
    "simulate", "OpenLoop",
    "cv_performance", "mv_usage", "kpis", "violations", "mv_violations", "controller_health",
    "summarize",
    "PIDLoop", "PIDController", "pid_loop_from_spec", "pid_from_settings", "suggest_pairing",
    "StepData", "step_test", "fit_fopdt", "fit_sopdt", "fit_integrating", "fit_step",
    "ultimate_point", "simc", "imc", "ziegler_nichols", "tune_loop", "tune_pid_loops",
    "compare", "Comparison", "describe_controller", "fairness_notes", "tuning_text",
    "RegulatoryController", "Feedforward", "Ratio", "Cascade", "Selector", "SplitRange", "Valve",
    "design_feedforward", "OverLoops", "identify_over_loops",
    "GainAnalysis", "gain_matrix_analysis", "niederlinski_index", "rga_at_frequency",
    "sampling_advice", "SteadyStateLocus", "steady_state_locus", "LoopMargins", "loop_margins",
    "half_rule", "unconstrained_analysis", "UnconstrainedAnalysis", "optimal_cost",
    "PredictiveController", "DisturbanceEstimator", "SteadyTarget",
    "scenario", "Scenario", "load_scenario", "parse_scenario", "check_scenario", "Case", "expand",
    "run_case", "run_scenario", "linear_report",
    "run_batch", "BatchOutcome", "load_results", "local_pool", "dask_executor", "write_summary_csv",
    "compare_with_baseline", "BaselineComparison", "write_junit", "write_html_report",
]
