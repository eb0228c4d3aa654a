"""Checks of a scenario that need the models or the simulator's factories, kept apart from the
runner: signal, instrument, actuator and fault specs (:func:`check_specs`), CSV paths, event times,
sizes estimated before anything is allocated (runs, signals, predictive controllers), solver options
and the estimator history against the instruments.  Every error names the file and the key path.

The study expansion (:mod:`.study`) and the runner (:mod:`.runner`) both use these checks; this
module imports neither.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .._specs import shown as _shown
from ..exceptions import ScenarioError, SettingsError
from ..model import suggest
from .schema import Scenario


def settings_error(err: SettingsError, scn: Scenario, base_key: str) -> ScenarioError:
    """A :class:`SettingsError` raised for the entry at *base_key* as the scenario's error: its
    key path placed below *base_key*, its file the scenario's."""
    return err.at(base_key).in_file(scn.file)


# ----------------------------------------------------------------------------------------- setup


#: Most values the closed loops of one case may record (samples x controllers x recorded series).
#: A recorded value costs up to about 64 bytes with its per-sample diagnostics (measured: 40-62 on
#: the blending tank), so this keeps the trajectories of one case under about 1 GB.
MAX_RUN_VALUES = 16_000_000
_BYTES_PER_VALUE = 64


def _check_run_size(scn: Scenario, plant: Any, duration: float, ci: bool) -> None:
    """Estimate what the runs of a case record, before any is simulated: samples x controllers x
    series (states, 4 per MV, DVs, 6 per CV and about 20 diagnostics per controller)."""
    n_ctl = max(1, len(scn.data["controllers"]))
    series = (len(plant.state_names) + 4 * len(plant.mv_names) + len(plant.dv_names)
              + 6 * len(plant.cv_names) + 20)
    samples = int(round(duration / scn.sample_time))
    values = samples * n_ctl * series
    if values > MAX_RUN_VALUES:
        key = "scenario.ci.duration" if ci and "duration" in scn.data["scenario"]["ci"] else \
            "scenario.duration"
        raise ScenarioError(
            f"expected runs that record at most {MAX_RUN_VALUES:,} values per case (samples x "
            f"controllers x recorded series; about {MAX_RUN_VALUES * _BYTES_PER_VALUE / 1e9:.1f} "
            f"GB); found {samples:,} samples x {n_ctl} controller(s) x {series} series = "
            f"{values:.3g} values (about {values * _BYTES_PER_VALUE / 1e9:.3g} GB). Shorten the "
            f"duration or lengthen the sample time.", file=scn.file, key=key)


def _event_times(spec: Any, key: str) -> list[tuple[str, float]]:
    """(key path, time) of every event of a signal spec: a step, a pulse, the start of a ramp, a
    sine or a random walk."""
    if isinstance(spec, list):
        return [e for i, part in enumerate(spec) for e in _event_times(part, f"{key}[{i}]")]
    if not isinstance(spec, Mapping):
        return []
    k = _EVENT_KEY.get(spec.get("kind"))
    v = spec.get(k) if k else None
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return []
    return [(f"{key}.{k}", float(v))]


_EVENT_KEY = {"step": "at", "pulse": "at", "ramp": "start", "sine": "start", "random_walk": "start"}


def _events(scn: Scenario) -> list[tuple[str, float]]:
    d = scn.data
    out = [e for section in ("disturbances", "setpoints") for k, spec in d[section].items()
           for e in _event_times(spec, f"{section}.{k}")]
    out += [(f"faults.{k}.at", float(f["at"])) for k, f in d["faults"].items()
            if isinstance(f.get("at"), (int, float)) and not isinstance(f.get("at"), bool)]
    return out


def _warn_events_cut(scn: Scenario, duration: float, ci: bool) -> None:
    """Warn about every event this run ends before: the CI-sized run length, or a run length a
    study or a shortened case sets (the file's own duration is checked by check_scenario)."""
    if ci and "duration" in scn.data["scenario"]["ci"]:
        _warn_ci_dropped(scn)
        return
    for key, t in _events(scn):
        if t >= duration:
            warnings.warn(f"key '{key}': the event at {t:g} is dropped in this run (it ends at "
                          f"{duration:g}).", UserWarning, stacklevel=2)


def _warn_ci_dropped(scn: Scenario) -> None:
    """Warn about every event the CI-sized run length cuts off (it happens in full runs only)."""
    s = scn.data["scenario"]
    ci = s["ci"].get("duration")
    if ci is None:
        return
    for key, t in _events(scn):
        if t >= ci and (s["duration"] is None or t < s["duration"]):
            warnings.warn(f"key '{key}': the event at {t:g} is dropped in CI-sized runs "
                          f"(scenario.ci.duration = {ci:g}; mpcproto run --ci, mpcproto batch "
                          f"without --full): only a full run reaches it.", UserWarning,
                          stacklevel=2)


def _warn_outside_limits(scn: Scenario, plant: Any, op: Any, sim: Mapping[str, Any],
                         duration: float) -> None:
    """Warn when the run starts outside an operating limit or a setpoint leaves its CV's limits.

    Both are legitimate set-ups (the controller has to bring the unit back; a setpoint the
    limits forbid shows what the limits cost) but are often a slip, so they are said."""
    from ..sim import signal_from_spec

    lims = scn.data["limits"]
    for role, names, values in (("mv", plant.mv_names, op.u), ("cv", plant.cv_names, op.y)):
        for j, n in enumerate(names):
            v = float(values[j])
            for side in ("low", "high"):
                lim = lims.get(n, {}).get(side)
                if lim is not None and (v < lim if side == "low" else v > lim):
                    warnings.warn(
                        f"key 'limits.{n}.{side}': the operating point's {n} = {v:.6g} "
                        f"{plant.variable(n).unit} is {'below' if side == 'low' else 'above'} this "
                        f"limit ({lim:g}): the run starts outside it.", UserWarning, stacklevel=2)
    n_steps = max(1, int(round(duration / scn.sample_time)))
    if n_steps > 1_000_000:
        return
    times = scn.sample_time * np.arange(n_steps)
    lo, hi = plant.bounds("cv")
    for j, n in enumerate(plant.cv_names):
        spec = sim["setpoints"].get(n)
        if spec is None:
            continue
        sig = signal_from_spec(spec, what=f"setpoints.{n}", rng=0)
        sp = np.asarray(sig.value(times), float) + sig.resolve(op.y[j])
        given = lims.get(n, {})
        zone = {"low": given.get("low", lo[j]), "high": given.get("high", hi[j])}
        for side, bad in (("low", sp < zone["low"]), ("high", sp > zone["high"])):
            if np.any(bad):
                i = int(np.argmax(bad))
                src = f"limits.{n}.{side}" if side in given else \
                    f"the physical {side} bound of '{n}'"
                warnings.warn(
                    f"key 'setpoints.{n}': the setpoint reaches {sp[i]:.6g} "
                    f"{plant.variable(n).unit} at t = {times[i]:g}, "
                    f"{'below' if side == 'low' else 'above'} the CV's {side} limit "
                    f"{zone[side]:g} {plant.variable(n).unit} ({src}): the controller cannot "
                    f"follow it inside its limits.",
                    UserWarning, stacklevel=2)


def _check_specs(scn: Scenario, plant: Any = None) -> dict[str, Any]:
    """Check the simulator specs of a scenario with the simulator's factories; return simulate()'s
    keyword arguments.  Without *plant* the names are not checked against the model."""
    from ..sim import actuator_from_spec, fault_from_spec, instrument_from_spec, signal_from_spec

    d = scn.data
    base_dir = Path(scn.file).parent if scn.file and scn.file != "<dict>" else None

    def made(factory, key: str, spec: Any, **kw: Any) -> Any:
        """factory(spec, what=key) with its SettingsError turned into the scenario's error."""
        try:
            return factory(spec, what=key, **kw)
        except SettingsError as e:
            raise settings_error(e, scn, key) from None

    signals: dict[str, dict[str, Any]] = {"disturbances": {}, "setpoints": {}}
    for section, out in signals.items():
        for k, spec in d[section].items():
            if section == "setpoints" and spec == "none":
                out[k] = None
                continue
            spec = _csv_paths(spec, base_dir, scn, f"{section}.{k}")
            sig = made(signal_from_spec, f"{section}.{k}", spec, rng=0)  # checked, built per run
            _check_signal_size(scn, sig, spec, f"{section}.{k}")
            out[k] = spec
    dvs, setpoints = signals["disturbances"], signals["setpoints"]
    cv_limits: dict[str, Any] = {}
    mv_limits: dict[str, Any] = {}
    for k, lim in d["limits"].items():
        if (plant is not None and k in plant.cv_names) or (plant is None and "rate" not in lim):
            if "rate" in lim:
                raise ScenarioError("expected 'low' and/or 'high' for a CV (a rate limit applies to "
                                    "MVs only); found 'rate'.", file=scn.file, key=f"limits.{k}.rate")
            cv_limits[k] = {s: lim[s] for s in ("low", "high") if s in lim}
        else:
            entry = {s: lim[s] for s in ("low", "high") if s in lim}
            if "rate" in lim:
                entry["rate"] = lim["rate"]
            mv_limits[k] = entry
    instruments = {k: made(instrument_from_spec, f"instruments.{k}", spec)
                   for k, spec in d["instruments"].items()}
    actuators = {k: made(actuator_from_spec, f"actuators.{k}", spec)
                 for k, spec in d["actuators"].items()}
    if plant is not None:
        # an MV limit or a valve's travel beyond the MV's physical range cannot be met
        for section, entries in (("limits", mv_limits), ("actuators", d["actuators"])):
            for k, entry in entries.items():
                if k in plant.mv_names:
                    _within_range(scn, plant, k, entry, section)
    faults = []
    for k, spec in d["faults"].items():
        f = made(fault_from_spec, f"faults.{k}", spec)
        if plant is None:
            faults.append(f)
            continue
        role, names = ("cv", plant.cv_names) if f.on_sensor else ("mv", plant.mv_names)
        if f.variable not in names:
            raise ScenarioError(
                f"expected {'an' if role == 'mv' else 'a'} {role.upper()} of model '{plant.name}' for a {f.kind} fault "
                f"({', '.join(names)}); found '{f.variable}'{suggest(f.variable, names)}.",
                file=scn.file, key=f"faults.{k}.variable")
        pos = getattr(f, "position", None)
        if f.kind == "valve_stuck" and pos is not None:
            lo, hi = plant.bounds("mv")
            j = list(plant.mv_names).index(f.variable)
            if (math.isfinite(lo[j]) and pos < lo[j]) or (math.isfinite(hi[j]) and pos > hi[j]):
                unit = plant.variables("mv")[j].unit
                raise ScenarioError(
                    f"expected a stuck position within the physical range of '{f.variable}' "
                    f"[{lo[j]:g}, {hi[j]:g}] {unit} (a valve cannot stick beyond its travel); "
                    f"found {pos:g}.", file=scn.file, key=f"faults.{k}.position")
        faults.append(f)
    return {"dvs": dvs, "setpoints": setpoints, "cv_limits": cv_limits, "mv_limits": mv_limits,
            "instruments": instruments, "actuators": actuators, "faults": faults}


def _within_range(scn: Scenario, plant: Any, name: str, entry: Mapping[str, Any],
                  section: str) -> None:
    v = plant.variable(name)
    lo = -math.inf if v.low is None else float(v.low)
    hi = math.inf if v.high is None else float(v.high)
    for side in ("low", "high"):
        x = entry.get(side)
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
            continue
        if x < lo or x > hi:
            what = "an MV limit" if section == "limits" else "a travel limit of the valve"
            raise ScenarioError(
                f"expected {what} within the physical range of '{name}' [{lo:g}, {hi:g}] "
                f"{v.unit} (mpcproto models lists it); found {x:g}.",
                file=scn.file, key=f"{section}.{name}.{side}")


def _check_signal_size(scn: Scenario, sig: Any, spec: Any, key: str) -> None:
    """Refuse a signal that would keep more values in memory than a run has samples (a random
    walk with a tiny interval), before any of them is drawn."""
    from .schema import MAX_SAMPLES

    dur = scn.data["scenario"]["duration"]
    dur = max([x for x in (dur, scn.data["scenario"]["ci"].get("duration")) if x is not None],
              default=None)
    if dur is None:
        return
    parts = getattr(sig, "parts", [sig]) if isinstance(spec, list) and len(spec) > 1 else [sig]
    for i, part in enumerate(parts):
        n = part.stored_values(dur)
        if n > MAX_SAMPLES:
            where = f"{key}[{i}]" if isinstance(spec, list) else key
            raise ScenarioError(
                f"expected a signal that keeps at most {MAX_SAMPLES:,} values over the run (a "
                f"random walk keeps one per interval: duration {dur:g} / interval "
                f"{part.interval:g}); found {n:.3g} values (about {n * 8 / 1e9:.3g} GB). Is the "
                f"interval in the model's time unit?", file=scn.file, key=f"{where}.interval")


def _check_event_times(scn: Scenario) -> None:
    """An event at or after the end of the file's run never happens: refuse it naming its key.
    (A case that shortens the run only warns, see _warn_events_cut.)"""
    dur = scn.data["scenario"]["duration"]
    if dur is None:
        return
    for key, t in _events(scn):
        if t >= dur:
            raise ScenarioError(
                f"expected a time before the end of the run (scenario.duration = {dur:g}); found "
                f"{t:g}: the event would never happen. Is the time in the model's time unit?",
                file=scn.file, key=key)


def _csv_paths(spec: Any, base_dir: Path | None, scn: Scenario | None = None,
               key: str = "") -> Any:
    """A copy of a signal spec whose relative ``csv`` paths are resolved against the scenario's
    directory (a scenario and its tables travel together).

    A path that leads out of that folder (``..``, an absolute path elsewhere, a link pointing
    out) is refused before the file is opened: a scenario reads only its own tables, and no
    part of an unrelated file can appear in a message."""
    if base_dir is None:
        return spec
    if isinstance(spec, list):
        return [_csv_paths(s, base_dir, scn, f"{key}[{i}]") for i, s in enumerate(spec)]
    if isinstance(spec, Mapping) and spec.get("kind") == "csv" and isinstance(spec.get("path"), str):
        p = Path(spec["path"])
        full = p if p.is_absolute() else base_dir / p
        root = base_dir.resolve()
        real = full.resolve()
        if scn is not None and real != root and root not in real.parents:
            raise ScenarioError(
                f"expected a CSV file in the scenario's folder or below it ({root}); found "
                f"{spec['path']!r}, which leads out of it (to {real.parent}). Copy the table next "
                f"to the scenario.", file=scn.file, key=f"{key}.path")
        if not p.is_absolute():
            return {**spec, "path": str(full)}
    return spec


def _check_criteria_names(scn: Scenario, plant: Any) -> None:
    labels = list(scn.data["controllers"])
    for i, cr in enumerate(scn.data["criteria"]):
        key = f"criteria[{i}]"
        for k, roles in (("cv", ("cv",)), ("mv", ("mv",)), ("variable", ("cv", "mv", "state", "dv"))):
            if k in cr:
                names = [n for r in roles for n in plant.names(r)]
                if cr[k] not in names:
                    raise ScenarioError(
                        f"expected a {'/'.join(r.upper() for r in roles)} of model '{plant.name}' "
                        f"({', '.join(names)}); found '{cr[k]}'{suggest(cr[k], names)}.",
                        file=scn.file, key=f"{key}.{k}")
        for k in ("controller", "than"):
            if k in cr and cr[k] not in labels:
                raise ScenarioError(
                    f"expected the label of a controller of this scenario "
                    f"({', '.join(labels) or 'none: add a [controllers.<label>] table'}); found "
                    f"'{cr[k]}'{suggest(cr[k], labels)}.", file=scn.file, key=f"{key}.{k}")


# ----------------------------------------------------------------------------------------- controllers


#: Largest predictive controller a scenario may ask for: horizon x (horizon x CVs +
#: control_horizon x MVs) prediction entries.  Building one takes up to about 530 bytes per entry
#: (measured on the shipped models: 230-530), so this limit keeps a build under about 1 GB; the
#: shipped studies need at most 14,000.
MAX_MPC_ENTRIES = 2_000_000
_BYTES_PER_ENTRY = 530


def _check_mpc_size(scn: Scenario, settings: Mapping[str, Any], dmodel: Any, key: str) -> None:
    """Estimate the predictive controller's size before it is built and refuse an oversized one."""
    N = settings.get("horizon", 30)
    M = settings.get("control_horizon", None)
    if isinstance(N, bool) or not isinstance(N, int) or N < 1:
        return                       # the controller's own check names the wrong value
    if M is None:
        M = N
    if isinstance(M, bool) or not isinstance(M, int) or M < 1:
        return
    ny, nu = len(dmodel.cv_names), len(dmodel.mv_names)
    entries = N * (N * ny + min(M, N) * nu)
    if entries > MAX_MPC_ENTRIES:
        which = "control_horizon" if N * N * ny <= MAX_MPC_ENTRIES // 2 else "horizon"
        raise ScenarioError(
            f"expected a predictive controller of at most {MAX_MPC_ENTRIES:,} prediction entries "
            f"(horizon x (horizon x CVs + control_horizon x MVs), about "
            f"{MAX_MPC_ENTRIES * _BYTES_PER_ENTRY / 1e9:.1f} GB to build); found horizon {N:,}, "
            f"control_horizon {M:,}, {ny} CV(s), {nu} MV(s): {entries:.3g} entries (about "
            f"{entries * _BYTES_PER_ENTRY / 1e9:.3g} GB). The horizon counts samples, not time "
            f"units.", file=scn.file, key=f"{key}.{which}")


#: What each QP solver's options may be (checked before the solver sees them): a type and a range.
_INT, _NUM, _BOOL = "an integer", "a number", "true or false"
OSQP_OPTION_TYPES: dict[str, tuple[str, float, float, bool]] = {
    # name: (type, low, high, low excluded)
    "eps_abs": (_NUM, 0, math.inf, False), "eps_rel": (_NUM, 0, math.inf, False),
    "eps_prim_inf": (_NUM, 0, math.inf, True), "eps_dual_inf": (_NUM, 0, math.inf, True),
    "max_iter": (_INT, 1, math.inf, False), "polishing": (_BOOL, 0, 1, False),
    "polish_refine_iter": (_INT, 0, math.inf, False), "warm_starting": (_BOOL, 0, 1, False),
    "adaptive_rho": (_INT, 0, 3, False), "adaptive_rho_interval": (_INT, 0, math.inf, False),
    "adaptive_rho_tolerance": (_NUM, 1, math.inf, False),
    "adaptive_rho_fraction": (_NUM, 0, math.inf, True), "rho": (_NUM, 0, math.inf, True),
    "sigma": (_NUM, 0, math.inf, True), "alpha": (_NUM, 0, math.nextafter(2, 0), True),
    "scaling": (_INT, 0, math.inf, False), "time_limit": (_NUM, 0, math.inf, False),
    "check_termination": (_INT, 0, math.inf, False), "scaled_termination": (_BOOL, 0, 1, False),
    "delta": (_NUM, 0, math.inf, True), "verbose": (_BOOL, 0, 1, False),
    "check_dualgap": (_BOOL, 0, 1, False),
}


def _clarabel_option_types() -> dict[str, tuple[str, float, float, bool]]:
    """Clarabel's options typed after its defaults (numbers >= 0; counts >= 0, max_iter >= 1)."""
    import clarabel

    out: dict[str, tuple[str, float, float, bool]] = {}
    dflt = clarabel.DefaultSettings()
    for k in dir(dflt):
        v = getattr(dflt, k)
        if k.startswith("_") or callable(v):
            continue
        if isinstance(v, bool):
            out[k] = (_BOOL, 0, 1, False)
        elif isinstance(v, int):
            out[k] = (_INT, 1 if k == "max_iter" else 0, math.inf, False)
        elif isinstance(v, float):
            out[k] = (_NUM, 0, math.inf, False)
        elif isinstance(v, str):
            out[k] = ("a string", 0, 0, False)
    return out


def _clarabel_accepts(name: str, value: str) -> bool:
    """Whether Clarabel takes *value* for its text option *name* (it says so only when a solver is
    made: try one on a one-variable problem)."""
    import clarabel
    import scipy.sparse as sps

    st = clarabel.DefaultSettings()
    st.verbose = False
    setattr(st, name, value)
    try:
        clarabel.DefaultSolver(sps.csc_matrix(np.eye(1)), np.zeros(1), sps.csc_matrix(-np.eye(1)),
                               np.zeros(1), [clarabel.NonnegativeConeT(1)], st)
    except Exception:  # noqa: BLE001 - Clarabel raises a plain Exception for a bad setting
        return False
    return True


#: DAQP's settings (tolerances > 0, an iteration limit, a time limit in seconds)
DAQP_OPTION_TYPES: dict[str, tuple[str, float, float, bool]] = {
    **{k: (_NUM, 0, math.inf, True) for k in ("primal_tol", "dual_tol", "zero_tol", "pivot_tol",
                                               "progress_tol", "eps_prox", "eta_prox", "sing_tol",
                                               "refactor_tol", "time_limit")},
    "cycle_tol": (_INT, 0, math.inf, False), "iter_limit": (_INT, 1, math.inf, False),
}


def _check_solver_options(scn: Scenario, settings: Mapping[str, Any], key: str) -> None:
    opts = settings.get("solver_options")
    solver = settings.get("solver", "auto")
    if solver == "auto":
        # the controller takes DAQP unless the QP is large; its own check names option names that
        # belong to another solver, so the types checked here are DAQP's
        solver = "daqp"
    if not isinstance(opts, Mapping) or solver not in ("osqp", "clarabel", "daqp"):
        return                       # the controller's own check names the wrong value
    types = (OSQP_OPTION_TYPES if solver == "osqp" else DAQP_OPTION_TYPES if solver == "daqp"
             else _clarabel_option_types())
    for name, v in opts.items():
        if name not in types:
            continue                 # unknown names: the controller's check lists the known ones
        kind, low, high, low_open = types[name]
        where = f"{key}.solver_options.{name}"
        if kind == "a string":
            if not isinstance(v, str) or not _clarabel_accepts(name, v):
                import clarabel

                default = getattr(clarabel.DefaultSettings(), name)
                raise ScenarioError(f"expected a value Clarabel accepts for its option '{name}' "
                                    f"(its default is {default!r}); found {_shown(v)}.",
                                    file=scn.file, key=where)
            continue
        if kind == _BOOL:
            ok = isinstance(v, bool)
        elif kind == _INT:
            ok = isinstance(v, int) and not isinstance(v, bool)
        else:
            ok = isinstance(v, (int, float)) and not isinstance(v, bool) and \
                (math.isfinite(v) or (v == math.inf and name == "time_limit"))
        in_range = ok and (kind == _BOOL or ((v > low if low_open else v >= low) and v <= high))
        if not ok or not in_range:
            rng = ("" if kind == _BOOL else
                   f" {'>' if low_open else '>='} {low:g}" + (
                       "" if high == math.inf else f" and <= {high:g}" if high == int(high)
                       else f" and < {math.ceil(high):g}"))
            found = (f"a string {v!r}" if isinstance(v, str) else str(v).lower()
                     if isinstance(v, bool) else _shown(v))
            raise ScenarioError(f"expected {kind}{rng} for the {solver} option '{name}'; found "
                                f"{found}.", file=scn.file, key=where)


def _check_history(ctl: Any, prep: Any, key: str) -> None:
    """Refuse an estimator history shorter than an instrument's dead time (in samples): every
    reading of that instrument would arrive too old and be dropped, silently."""
    history = getattr(ctl, "history", None)
    if not isinstance(history, int) or isinstance(history, bool):
        return
    from ..linear import delay_samples

    Ts = prep.scenario.sample_time
    for cv, ins in (prep.sim.get("instruments") or {}).items():
        dead = float(getattr(ins, "dead_time", 0.0) or 0.0)
        if dead <= 0:
            continue
        nd = delay_samples(dead, Ts, what=f"instrument dead time on '{cv}'")
        if nd > history:
            raise ScenarioError(
                f"expected an estimator history of at least {nd} samples (the dead time "
                f"{dead:g} of the instrument on '{cv}' is {nd} samples of {Ts:g}): with a shorter "
                f"history every reading of '{cv}' arrives too old and is dropped; found "
                f"history = {history}.", file=prep.scenario.file, key=f"{key}.history")
