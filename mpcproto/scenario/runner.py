"""Run one case of a scenario end to end, in whatever process it lands in.

:func:`run_case` takes a plain :class:`~mpcproto.scenario.study.Case` (or a
:class:`~mpcproto.scenario.schema.Scenario`), builds the plant and the controller's model in *this*
process (compiled models are cached per process, see :mod:`mpcproto.scenario.build`), finds the
operating point, linearizes and discretizes the controller's model, builds each controller of the
scenario, runs the closed loop for each, and returns a JSON-able result::

    {"case_id", "scenario", "file", "params", "seed", "grid_index", "draw_index",
     "status": "ok" | "error", "message",
     "controllers": {label: {"kpi", "violations", "solver", "run", "criteria"}},
     "comparisons": [...better_than verdicts...],
     "passed": bool, "elapsed_s": float, "warnings": [str], "caution": str}

Warnings raised while the case runs (a dead time rounded to whole samples, ...) are collected,
de-duplicated, into ``warnings`` instead of being printed by each worker.

Bad input (:class:`~mpcproto.exceptions.MpcprotoError`) becomes ``status == "error"`` with its
message; anything else is a bug and propagates (the batch runner records it as an error too).

:func:`run_scenario` runs a scenario's nominal case and writes ``summary.json``, one CSV trajectory
per controller and PNG plots to a directory: the ``mpcproto run`` command.
"""

from __future__ import annotations

import json
import math
import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..exceptions import MpcprotoError, ScenarioError, SettingsError
from ..model import suggest
from .build import check_names, controller_model, discretize, operating_point, plant_model
from ..analysis.criteria import evaluate_comparisons, evaluate_controller
from .schema import Scenario, load_scenario
from .checks import (_check_criteria_names, _check_event_times, _check_history, _check_mpc_size,
                     _check_run_size, _check_solver_options, _check_specs, _warn_ci_dropped,
                     _warn_events_cut, _warn_outside_limits, settings_error)
from .study import Case, case_scenario

__all__ = ["run_case", "run_scenario", "check_scenario", "check_study", "prepare", "Prepared",
           "CAUTION", "find_case"]

#: Carried by every summary and report.
CAUTION = ("Simulation only. These results come from models and do not show that a controller is "
           "safe on a real unit: the plant needs its own independent safety systems (trips, relief, "
           "interlocks), management of change, compliance with local codes, and the judgement of "
           "licensed engineers before anything is commissioned.")


# ----------------------------------------------------------------------------------------- errors
@dataclass
class Prepared:
    """Everything a case needs before the closed loops run (built in the worker process)."""

    scenario: Scenario
    plant: Any
    model: Any                       # the controller's model
    op: Any                          # plant operating point (start of every run)
    model_op: Any                    # the controller's model's operating point
    dmodel: Any                      # discrete linear model of the controller's model
    sim: dict[str, Any] = field(default_factory=dict)   # keyword arguments of simulate()
    duration: float = 0.0


def _duration(scn: Scenario, ci: bool) -> float:
    s = scn.data["scenario"]
    if ci and "duration" in s["ci"]:
        return float(s["ci"]["duration"])
    if s["duration"] is None:
        raise ScenarioError("expected a run length 'duration' (model time unit) to run the scenario; "
                            "found none.", file=scn.file, key="scenario.duration")
    return float(s["duration"])


def prepare(scn: Scenario, *, base_parameters: Mapping[str, float] | None = None,
            ci: bool = False) -> Prepared:
    """Build models, operating points, the discrete linear model and the simulator's arguments.

    Every name and spec of the scenario is checked here against the model and the simulator's
    factories; errors name the file and the key path.

    Parameters
    ----------
    scn : Scenario
    base_parameters : mapping, optional
        The plant parameters the controller's model starts from (default ``plant.parameters`` of
        *scn*); a study passes the file's values so that a swept plant parameter is a mismatch.
    ci : bool
        Use the CI-sized run length (``scenario.ci.duration``) when the scenario gives one.
    """
    from ..linear import linearize

    plant = plant_model(scn)
    model = controller_model(scn, base=base_parameters)
    op = operating_point(scn, plant)
    model_op = op if model is plant else operating_point(scn, model)
    dmodel = discretize(scn, linearize(model, model_op))

    d = scn.data
    check_names(scn, plant, "disturbances", "dv", d["disturbances"])
    check_names(scn, plant, "setpoints", "cv", d["setpoints"])
    check_names(scn, plant, "instruments", "cv", d["instruments"])
    check_names(scn, plant, "actuators", "mv", d["actuators"])
    check_names(scn, plant, "limits", ("cv", "mv"), d["limits"])

    sim = _check_specs(scn, plant)
    _check_criteria_names(scn, plant)
    duration = _duration(scn, ci)
    _check_run_size(scn, plant, duration, ci)
    _warn_events_cut(scn, duration, ci)
    _warn_outside_limits(scn, plant, op, sim, duration)
    return Prepared(scenario=scn, plant=plant, model=model, op=op, model_op=model_op, dmodel=dmodel,
                    sim=sim, duration=duration)


_CONTROLLER_CACHE: dict[str, Any] = {}
_CONTROLLER_CACHE_LIMIT = 16


def _controller_key(label: str, spec: Mapping[str, Any], prep: Prepared) -> str:
    scn = prep.scenario
    model = prep.model
    # the model's full reference (file content hash included) from the resolver, its parameters
    return json.dumps([label, spec, getattr(model, "origin", model.name), model.parameters,
                       [list(map(float, v)) for v in (prep.model_op.x, prep.model_op.u,
                                                      prep.model_op.d)],
                       scn.sample_time, scn.data["scenario"]["dead_time"]],
                      sort_keys=True, default=str)


def build_controller(label: str, spec: Mapping[str, Any], prep: Prepared, *,
                     cache: bool = True) -> Any:
    """The controller *label* of the scenario, built from its ``[controllers.<label>]`` table.

    Controllers are cached per process, keyed by their settings, the controller's model (name,
    options, parameter values), its operating point and the sample time: the cases of a Monte Carlo
    study on the *plant* share one set of tuned PID loops (the step tests run once) and one compiled
    predictive controller.  The simulator resets the controller at the start of every run, and
    ``reset()`` restarts its solvers and estimator, so a reused controller gives the same numbers,
    to the last bit, as a fresh one in any worker.
    """
    key = _controller_key(label, spec, prep) if cache else ""
    if cache and key in _CONTROLLER_CACHE:
        ctl = _CONTROLLER_CACHE[key]
        _check_history(ctl, prep, f"controllers.{label}")   # the instruments may differ
        return ctl
    ctl = _build_controller(label, spec, prep)
    _check_history(ctl, prep, f"controllers.{label}")
    if cache:
        if len(_CONTROLLER_CACHE) >= _CONTROLLER_CACHE_LIMIT:
            _CONTROLLER_CACHE.pop(next(iter(_CONTROLLER_CACHE)))
        _CONTROLLER_CACHE[key] = ctl
    return ctl


def _build_controller(label: str, spec: Mapping[str, Any], prep: Prepared) -> Any:
    scn = prep.scenario
    settings = {k: v for k, v in spec.items() if k != "kind"}
    key = f"controllers.{label}"
    try:
        if spec["kind"] == "mpc" and "bundle" in settings:
            ctl = _mpc_from_bundle(settings, prep, key)
        elif spec["kind"] == "mpc":
            from ..control.mpc import PredictiveController

            _check_mpc_size(scn, settings, prep.dmodel, key)
            _check_solver_options(scn, settings, key)
            ctl = PredictiveController.from_settings(prep.dmodel, settings).build()
        else:
            ctl = _build_pid(settings, prep, key)
    except ScenarioError:
        raise
    except SettingsError as e:
        raise settings_error(e, scn, key) from None
    try:
        ctl.name = label
    except AttributeError:
        pass
    return ctl


def _mpc_from_bundle(settings: Mapping[str, Any], prep: Prepared, key: str) -> Any:
    """``bundle = "DIR"``: the predictive controller of an export bundle (``mpcproto export``),
    rebuilt from the bundle alone; its variables and sample time must be the scenario's."""
    from ..control.mpc import PredictiveController

    scn = prep.scenario
    for k in settings:
        if k != "bundle":
            raise ScenarioError(f"expected only 'bundle' for a controller taken from a bundle (its "
                                f"settings are in the bundle); found '{k}' as well.",
                                file=scn.file, key=f"{key}.{k}")
    path = settings["bundle"]
    if not isinstance(path, str) or not path:
        raise ScenarioError(f"expected the path of a bundle directory (a string); found {path!r}.",
                            file=scn.file, key=f"{key}.bundle")
    p = Path(path)
    if not p.is_absolute() and scn.file and scn.file != "<dict>":
        p = Path(scn.file).parent / p
    try:
        ctl = PredictiveController.from_bundle(p)
    except SettingsError as e:
        # the bundle's own file and key (inside bundle.json) go to the note; the scenario's key
        # is the one that names the bundle
        raise e.referred(None, f"{key}.bundle").in_file(scn.file) from None
    m, b = prep.dmodel, ctl.dmodel
    for role in ("mv", "dv", "cv"):
        ours, theirs = list(getattr(m, f"{role}_names")), list(getattr(b, f"{role}_names"))
        if ours != theirs:
            raise ScenarioError(f"expected a bundle for this scenario's {role.upper()}s {ours}; the "
                                f"bundle {p} has {theirs}.", file=scn.file, key=f"{key}.bundle")
    if b.Ts != m.Ts:
        raise ScenarioError(f"expected a bundle at this scenario's sample time {m.Ts:g}; the bundle "
                            f"{p} was made at {b.Ts:g}.", file=scn.file, key=f"{key}.bundle")
    return ctl


def _build_pid(settings: Mapping[str, Any], prep: Prepared, key: str) -> Any:
    from ..control.pid_settings import pid_from_settings

    return pid_from_settings(prep.model, prep.model_op, prep.scenario.sample_time, settings,
                             what=key)


# ----------------------------------------------------------------------------------------- checks
def check_scenario(scn: Scenario | str | Path, *, build_controllers: bool = True) -> Prepared:
    """Check a scenario as deeply as possible without running it.

    Loads it (for a path), builds the models and the operating point, checks every name against the
    model, every signal/instrument/actuator/fault spec against the simulator's factories and (with
    *build_controllers*) builds every controller.  Raises :class:`ScenarioError` naming the file and
    the key path; returns the prepared setup.
    """
    if not isinstance(scn, Scenario):
        scn = load_scenario(scn)
    _check_event_times(scn)
    prep = prepare(scn)
    _warn_ci_dropped(scn)
    if build_controllers:
        for label, spec in scn.data["controllers"].items():
            build_controller(label, spec, prep)
    check_study(scn)
    return prep


def check_study(scn: Scenario) -> None:
    """Check the cases of a scenario's study (the first 1,001): every value a sweep or a draw
    sets, with the schema, the simulator's factories and, for parameters, the models.  ``check``,
    ``run`` and ``batch`` refuse the same studies."""
    if scn.data["study"]["sweep"] or scn.data["study"]["draw"]:
        from .build import controller_model, plant_model
        from .study import _blame, check_case, iter_cases

        for i, c in enumerate(iter_cases(scn, full=True)):
            sc = check_case(c)
            if any(k.startswith(("plant.parameters.", "controller_model.")) for k in c.params):
                # a swept or drawn parameter must exist and lie within its bounds (the models are
                # cheap to make; the operating point of every case is left to the run; a
                # transfer matrix's elements were checked with the case's table above)
                try:
                    plant_model(sc)
                    controller_model(sc)
                except ScenarioError as e:
                    raise _blame(e, c) from None
            if i >= 1000:
                break


# ----------------------------------------------------------------------------------------- running
def _identity(case: Case | Scenario) -> dict[str, Any]:
    if isinstance(case, Case):
        return {"case_id": case.case_id, "scenario": case.scenario, "file": case.file,
                "params": dict(case.params), "seed": case.seed, "grid_index": case.grid_index,
                "draw_index": case.draw_index}
    # the nominal case: the same id and seed as the single case of a study-less batch
    from .study import _case_seed

    return {"case_id": case.name, "scenario": case.name, "file": case.file, "params": {},
            "seed": _case_seed(case.seed, 0), "grid_index": None, "draw_index": None}


def _run(case: Case | Scenario, *, ci: bool | None = None) -> tuple[dict[str, Any], dict[str, Any]]:
    """One case: (result record, {controller label: Trajectory})."""
    t0 = time.perf_counter()
    rec = _identity(case)
    trajs: dict[str, Any] = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        _run_inner(case, ci, rec, trajs)
    seen: list[str] = []
    for w in caught:
        msg = f"{w.category.__name__}: {w.message}"
        if msg not in seen:
            seen.append(msg)
    rec["warnings"] = seen[:20]
    rec["elapsed_s"] = time.perf_counter() - t0
    rec["caution"] = CAUTION
    return _plain(rec), trajs


def _run_inner(case: Case | Scenario, ci: bool | None, rec: dict[str, Any],
               trajs: dict[str, Any]) -> None:
    from ..analysis import summarize
    from ..compare import describe_controller, fairness_notes
    from ..sim import simulate

    try:
        if isinstance(case, Case):
            scn = case_scenario(case)
            base = dict((case.raw.get("plant") or {}).get("parameters") or {})
            use_ci = case.ci if ci is None else ci
        else:
            scn, base, use_ci = case, None, bool(ci)
        # the models and names first: an unknown model is a more basic error than no controllers
        prep = prepare(scn, base_parameters=base, ci=use_ci)
        if not scn.data["controllers"]:
            raise ScenarioError("expected at least one [controllers.<label>] table to run; found none.",
                                file=scn.file, key="controllers")
        blocks: dict[str, Any] = {}
        for label, spec in scn.data["controllers"].items():
            ctl = build_controller(label, spec, prep)
            try:
                traj = simulate(prep.plant, ctl, op=prep.op, Ts=scn.sample_time,
                                duration=prep.duration, rng=rec["seed"], **prep.sim)
            except SettingsError as e:
                raise simulate_error(e, scn, label) from None
            traj.meta["controller"] = label
            trajs[label] = traj
            compared = {cr[k] for cr in scn.data["criteria"] for k in ("cv", "variable")
                        if k in cr}
            block = summarize(traj, compared=compared if scn.data["criteria"] else None)
            block["inputs"] = _plain(describe_controller(ctl, prep.model))
            block["criteria"] = evaluate_controller(scn.data["criteria"], label, block, traj)
            blocks[label] = block
        comparisons = evaluate_comparisons(scn.data["criteria"], blocks)
        passed = all(cr["passed"] for b in blocks.values() for cr in b["criteria"]) and \
            all(cr["passed"] for cr in comparisons)
        rec.update({"status": "ok", "message": "", "model": prep.plant.name,
                    "time_unit": prep.plant.time_unit, "sample_time": scn.sample_time,
                    "duration": prep.duration, "operating_point": prep.op.as_dict(),
                    "controllers": blocks, "comparisons": comparisons, "passed": bool(passed),
                    "fairness": fairness_notes({lb: b["inputs"] for lb, b in blocks.items()})})
    except MpcprotoError as e:
        rec.update({"status": "error", "message": str(e), "error_type": type(e).__name__,
                    "controllers": {}, "comparisons": [], "passed": False})
        if getattr(e, "detail", ""):  # the traceback of a user's model function (--debug)
            rec["error_detail"] = e.detail


#: the scenario section of each simulate() argument (a ClosedLoop error's key starts with one)
_SIM_SECTIONS = {"dvs": "disturbances", "setpoints": "setpoints", "cv_limits": "limits",
                 "mv_limits": "limits", "instruments": "instruments", "actuators": "actuators"}


def simulate_error(err: SettingsError, scn: Scenario, label: str) -> ScenarioError:
    """A :class:`SettingsError` of ``simulate()`` as the scenario's error: a closed loop's own
    error (owner ``"ClosedLoop"``, key = the argument path ``mv_limits.feed.low``) at the
    scenario key of that argument (``limits.feed.low``); any other at ``controllers.<label>``."""
    head, dot, rest = (err.key or "").partition(".")
    if err.owner == "ClosedLoop" and head in _SIM_SECTIONS:
        return err.replace(key=_SIM_SECTIONS[head] + dot + rest).in_file(scn.file)
    return err.at(f"controllers.{label}").in_file(scn.file)


def run_case(case: Case | Scenario) -> dict[str, Any]:
    """Run one case (all its controllers) and return its JSON-able result (see module docstring).

    A module-level function taking plain data, so a process pool or a Dask worker can call it.
    """
    return _run(case)[0]


def _plain(v: Any) -> Any:
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, bool) or v is None or isinstance(v, str):
        return v
    if isinstance(v, int):
        return v
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    tolist = getattr(v, "tolist", None)
    if callable(tolist):
        return _plain(tolist())
    if isinstance(v, complex):
        return [v.real, v.imag]
    return str(v)


def find_case(scn: Scenario, case_id: str) -> Case:
    """The case of *scn*'s study called *case_id* (CI-sized or full study)."""
    from .study import iter_cases

    ids: list[str] = []
    for full in (False, True):
        for c in iter_cases(scn, full=full):
            if c.case_id == case_id:
                return c
            if c.case_id not in ids:
                ids.append(c.case_id)
    ids.sort()
    shown = ", ".join(ids[:6]) + (f", ... ({len(ids)} in all)" if len(ids) > 6 else "")
    raise ScenarioError(
        f"expected, for --case, the id of a case of this study ({shown}); found {case_id!r}"
        f"{suggest(str(case_id), ids)}.", file=scn.file)


def run_scenario(scn: Scenario | str | Path, out_dir: str | Path, *, plots: bool = True,
                 ci: bool = False, case_id: str | None = None) -> dict[str, Any]:
    """Run a scenario's nominal case and write its results to *out_dir* (created).

    Writes ``summary.json`` (the result record of :func:`run_case`), ``trajectories_<label>.csv``
    per controller and, with *plots*, PNG figures of the CVs and of the MVs with every controller
    overlaid (``plot_cvs.png``, ``plot_mvs.png``).  Sweeps and Monte Carlo draws are ignored (they
    are for ``mpcproto batch``) unless *case_id* names one case of the study: that case is run
    (same values, same seed as in a batch), e.g. to look at a failing Monte Carlo draw.

    Returns
    -------
    dict
        The summary (as written to ``summary.json``).
    """
    if not isinstance(scn, Scenario):
        scn = load_scenario(scn)
    _check_event_times(scn)
    check_study(scn)   # the study's errors are the file's errors, even when one case runs
    target: Case | Scenario = scn if case_id is None else find_case(scn, case_id)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rec, trajs = _run(target, ci=ci)
    files = []
    for label, traj in trajs.items():
        p = out / f"trajectories_{label}.csv"
        traj.to_csv(p)
        files.append(p.name)
    if plots and trajs:
        files += _plots(trajs, out, scn.name)
    rec["files"] = files
    (out / "summary.json").write_text(json.dumps(rec, indent=2) + "\n")
    return rec


def _plots(trajs: Mapping[str, Any], out: Path, title: str) -> list[str]:
    from ..report.plots import plot_comparison

    paths = plot_comparison(dict(trajs), out, stem="plot", title=title)
    return [Path(p).name for p in paths]
