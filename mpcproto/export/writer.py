"""Write the hand-off bundle of a scenario's predictive controller (``mpcproto export``).

:func:`export_bundle` builds the scenario's models, operating point and controllers exactly as
``mpcproto run`` does (:func:`mpcproto.scenario.runner.prepare`, ``build_controller``), then writes
a directory in a format of our own (plain JSON + CSV + HTML; ``docs/export-bundle.md``)::

    bundle.json               everything a vendor implements from (schema: bundle.schema.json)
    step_response.csv         step-response coefficients, one column per MV/DV -> CV pair
    step_response_matrix.png  the same as a grid of small plots
    replay.json               the recorded closed-loop run: the controller's inputs and moves
    design_sheet.html         one self-contained page for people
    scenario/<file>.toml      the scenario file as it was (its SHA-256 is in bundle.json)
    study/summary.json        the study's KPIs and verdicts (nominal case)

and proves the round trip: the controller is rebuilt from the written bundle alone
(``PredictiveController.from_bundle``) and the recorded run is replayed through it
(:func:`mpcproto.export.bundle.check_bundle`); the result is stored in ``bundle.json`` under
``proof``.
"""

from __future__ import annotations

import json
import shutil
import time
import warnings
from collections.abc import Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import ScenarioError, SettingsError
from ..validation import fail, shown
from .bundle import (BUNDLE_FILE, FORMAT, FORMAT_VERSION, REPLAY_FILE, TOLERANCE, check_bundle,
                     encode_array, settings_to_plain, sha256_of)
from .step_matrix import (fit_pairs, pair_columns, plot_step_matrix, settling_samples,
                          step_coefficients)

__all__ = ["export_bundle", "RecordingController", "STEP_CSV", "MATRIX_PNG", "SHEET_FILE"]

STEP_CSV = "step_response.csv"
MATRIX_PNG = "step_response_matrix.png"
SHEET_FILE = "design_sheet.html"

#: how the PID loops compute their output (mpcproto.control.pid, for the vendor's reader)
PID_STRUCTURE = (
    "Ideal (non-interacting) PID per loop, sampled: u = u0 + Kc [ (b sp - y) + (1/Ti) integral(e dt) "
    "- Td dyf/dt ], with setpoint weight b on the proportional term, derivative on the measurement "
    "filtered with time constant Td/N (N = derivative_filter), integral anti-windup by tracking "
    "the applied MV with tracking time Tt (default sqrt(Ti Td), or Ti without derivative action). "
    "An integral_time of null means no integral action. Loops act only on fresh measurements "
    "when on_fresh is true.")


class RecordingController:
    """Wraps a controller and records every input it is given and every move it answers.

    The simulator sees the wrapped controller's protocol unchanged (``name``, ``reset``, ``step``
    with ``u_applied``); :meth:`replay` is the record as JSON-able data (``replay.json``).
    """

    def __init__(self, inner: Any):
        from ..control.base import accepts_readback

        self.inner = inner
        self.name = getattr(inner, "name", "controller")
        self.readback = accepts_readback(inner)
        self.preview_samples = getattr(inner, "preview_samples", 0)   # setpoint preview asked
        self._reset: dict[str, Any] = {}
        self._steps: dict[str, list] = {}

    def reset(self, op: Any, t0: float = 0.0) -> None:
        self._reset = {"model": str(getattr(op, "model", "")), "t0": float(t0),
                       "state_names": list(getattr(op, "state_names", ())),
                       "x": encode_array(op.x), "u": encode_array(op.u), "d": encode_array(op.d),
                       "y": encode_array(op.y)}
        self._steps = {k: [] for k in ("t", "y", "taken_at", "fresh", "dv", "setpoint", "cv_low",
                                       "cv_high", "mv_low", "mv_high", "mv_rate", "dv_forecast",
                                       "u_applied", "setpoint_program", "u", "status")}
        self.inner.reset(op, t0)

    def step(self, t: float, meas: Any, dv: Any, targets: Any, dv_forecast: Any = None, *,
             u_applied: Any = None, setpoint_program: Any = None) -> Any:
        s = self._steps
        s["t"].append(float(t))
        s["y"].append(encode_array(meas.y))
        s["taken_at"].append(encode_array(meas.taken_at))
        s["fresh"].append([bool(v) for v in np.asarray(meas.fresh).reshape(-1)])
        s["dv"].append(encode_array(dv))
        for k in ("setpoint", "cv_low", "cv_high", "mv_low", "mv_high", "mv_rate"):
            s[k].append(encode_array(getattr(targets, k)))
        s["dv_forecast"].append(encode_array(dv_forecast))
        s["u_applied"].append(encode_array(u_applied))
        s["setpoint_program"].append(encode_array(setpoint_program))
        kw = {} if setpoint_program is None else {"setpoint_program": setpoint_program}
        if self.readback:
            out = self.inner.step(t, meas, dv, targets, dv_forecast, u_applied=u_applied, **kw)
        else:
            out = self.inner.step(t, meas, dv, targets, dv_forecast, **kw)
        s["u"].append(encode_array(out.u))
        s["status"].append(str(out.status))
        return out

    def replay(self) -> dict[str, Any]:
        steps = dict(self._steps)
        for key in ("dv_forecast", "setpoint_program"):
            if not any(v is not None for v in steps.get(key, [])):
                steps[key] = None
        return {"format": FORMAT + "/replay", "format_version": FORMAT_VERSION,
                "readback": self.readback, "reset": self._reset, "steps": steps}


# ------------------------------------------------------------------------------------- helpers
def _finite(v: Any) -> Any:
    """JSON-able copy: numpy to Python, non-finite floats to null (the runner's summary rule)."""
    from ..scenario.runner import _plain

    return _plain(v)


def _write_json(path: Path, doc: Any) -> None:
    path.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n")


def _pick_controller(scn: Any, label: str | None) -> str:
    ctls = scn.data["controllers"]
    mpcs = [k for k, s in ctls.items() if s["kind"] == "mpc"]
    if label is None:
        if len(mpcs) != 1:
            raise ScenarioError(f"expected, for export, exactly one predictive controller "
                                f"([controllers.<label>] with kind = \"mpc\") or --controller LABEL; "
                                f"found {len(mpcs)} ({', '.join(mpcs) or 'none'}).",
                                file=scn.file, key="controllers")
        return mpcs[0]
    if label not in ctls:
        from ..model import suggest

        raise ScenarioError(f"expected, for --controller, the label of a predictive controller of "
                            f"this scenario ({', '.join(mpcs) or 'none'}); found {label!r}"
                            f"{suggest(label, list(ctls))}.", file=scn.file, key="controllers")
    if ctls[label]["kind"] != "mpc":
        raise ScenarioError(f"expected, for --controller, a predictive controller (kind = \"mpc\"); "
                            f"'{label}' is of kind {ctls[label]['kind']!r}. Predictive controllers "
                            f"here: {', '.join(mpcs) or 'none'}.", file=scn.file,
                            key=f"controllers.{label}.kind")
    return label


def _variables(model: Any, dmodel: Any) -> dict[str, list[dict[str, Any]]]:
    op = dmodel.op
    out: dict[str, list[dict[str, Any]]] = {}
    for role, key, vals in (("mv", "mvs", op.u), ("dv", "dvs", op.d), ("cv", "cvs", op.y)):
        rows = []
        for v, val in zip(model.variables(role), vals):
            row = {"name": v.name, "unit": v.unit, "description": v.description,
                   "value": float(val), "physical_low": v.low, "physical_high": v.high}
            if role == "dv":
                row["measured"] = bool(v.measured)
            rows.append(row)
        out[key] = rows
    states = []
    plant = {v.name: v for v in model.variables("state")}
    for i, n in enumerate(dmodel.state_names):
        if i < dmodel.n_plant_states:
            v = plant[n]
            states.append({"name": n, "unit": v.unit, "description": v.description,
                           "value": float(op.x[i]), "kind": "model"})
        else:
            src = n.split("[")[0]
            role = "mv" if src in dmodel.mv_names else "dv"
            v = model.variable(src)
            states.append({"name": n, "unit": v.unit, "kind": "delay",
                           "description": f"{src} delayed by {n[len(src) + 3:-1]} sample(s)",
                           "value": float((op.u if role == "mv" else op.d)[
                               (dmodel.mv_names if role == "mv" else dmodel.dv_names).index(src)])})
    out["states"] = states
    return out


def _operating_limits(scn: Any, dmodel: Any) -> dict[str, Any]:
    """The scenario's ``[limits]`` for the controller's variables: what the operator gave the
    controllers at every sample of the study (MV rates per time unit)."""
    lim = scn.data["limits"]
    return _finite({
        "mvs": {n: {"low": lim.get(n, {}).get("low"), "high": lim.get(n, {}).get("high"),
                    "rate": lim.get(n, {}).get("rate")} for n in dmodel.mv_names},
        "cvs": {n: {"low": lim.get(n, {}).get("low"), "high": lim.get(n, {}).get("high")}
                for n in dmodel.cv_names}})


def _estimator(ctl: Any) -> dict[str, Any]:
    est = getattr(ctl, "estimator_", None)
    cv = settings_to_plain(ctl)["cv"]
    out: dict[str, Any] = {
        "kind": "steady-state Kalman filter on the model augmented with one disturbance state per "
                "CV (offset-free); late analyzer values are fused at the time they were taken",
        "state_noise": float(ctl.state_noise), "history_samples": int(ctl.history),
        "disturbance_models": {}, "measurement_noise": {}, "disturbance_noise": {}}
    kinds = getattr(est, "kinds_", None)
    for i, n in enumerate(ctl.dmodel.cv_names):
        out["disturbance_models"][n] = kinds[i] if kinds is not None else cv[n]["disturbance"]
        out["measurement_noise"][n] = float(cv[n]["measurement_noise"])
        out["disturbance_noise"][n] = float(cv[n]["disturbance_noise"])
    for key, attr in (("disturbance_input_matrix", "Bw_"), ("disturbance_output_matrix", "Cw_"),
                      ("kalman_gain", "gain_")):
        M = getattr(est, attr, None)
        if M is not None:
            out[key] = np.asarray(M, float).tolist()
    return out


def _effective(ctl: Any) -> dict[str, Any]:
    """The weights as the QP uses them (per squared scale, priority factors applied)."""
    m = ctl.dmodel
    try:
        r = ctl.validate()
    except SettingsError:
        return {}
    out: dict[str, Any] = {}
    for key, names in (("cv_weight", m.cv_names), ("lim_lin", m.cv_names), ("lim_quad", m.cv_names),
                       ("move_weight", m.mv_names), ("preferred_weight", m.mv_names),
                       ("preferred_value", m.mv_names)):
        if key in r:
            out[{"lim_lin": "cv_limit_penalty", "lim_quad": "cv_limit_penalty_quadratic"}.get(key, key)] = \
                dict(zip(names, map(float, np.asarray(r[key], float))))
    return out


def _pid_baselines(scn: Any, prep: Any) -> list[dict[str, Any]]:
    from ..scenario.runner import build_controller

    out = []
    for label, spec in scn.data["controllers"].items():
        if spec["kind"] != "pid":
            continue
        ctl = build_controller(label, spec, prep)
        loops = [lp.as_dict() for lp in ctl.loops]
        out.append({"label": label, "structure": PID_STRUCTURE,
                    "pairing": [{"cv": lp["cv"], "mv": lp["mv"]} for lp in loops],
                    "unpaired_mvs": [m for m in ctl.mv_names if m not in {lp["mv"] for lp in loops}],
                    "loops": loops,
                    "settings": {k: v for k, v in spec.items() if k != "kind"}})
    return _finite(out)


def _study(summary: Mapping[str, Any], source: str) -> dict[str, Any]:
    blocks = {}
    for label, b in (summary.get("controllers") or {}).items():
        blocks[label] = {"criteria": b.get("criteria", []), "kpi": b.get("kpi", {}),
                         "solver": b.get("solver", {}),
                         "violations": len(b.get("violations") or []),
                         "run": b.get("run", {})}
    ok = summary.get("status") == "ok"
    return _finite({
        "source": source, "status": summary.get("status", "missing"),
        "message": summary.get("message", ""),
        # a verdict defaults to failure when its input is missing
        "passed": bool(ok and summary.get("passed") is True),
        "case_id": summary.get("case_id"), "seed": summary.get("seed"),
        "duration": summary.get("duration"), "controllers": blocks,
        "comparisons": summary.get("comparisons", []), "warnings": summary.get("warnings", []),
    })


# ------------------------------------------------------------------------------------- export
def export_bundle(scenario: Any, out_dir: str | Path, *, controller: str | None = None,
                  summary: str | Path | Mapping[str, Any] | None = None, ci: bool = False,
                  run_study: bool = True, tolerance: float = TOLERANCE) -> dict[str, Any]:
    """Write the hand-off bundle of one predictive controller of *scenario* to *out_dir*.

    Parameters
    ----------
    scenario : Scenario, str or Path
        The scenario (a path is loaded).
    out_dir : str or Path
        The bundle directory (created; files of an earlier bundle are overwritten).
    controller : str, optional
        The label of the predictive controller; default the scenario's only one.
    summary : path or mapping, optional
        The ``summary.json`` of an earlier ``mpcproto run`` of this scenario (its verdicts and
        KPIs are copied); default: the nominal case is run now.
    ci : bool
        Use the scenario's CI-sized run length for the study and the recorded run.
    run_study : bool
        Without *summary*: run the nominal case for the verdicts (default).  False leaves the
        study out: the bundle then says so and its study verdict is "not passed" (a verdict
        defaults to failure when its input is missing).
    tolerance : float
        Round-trip tolerance as a fraction of each MV's ``scale``.

    Returns
    -------
    dict
        ``bundle`` (the content of ``bundle.json``), ``proof`` (see
        :func:`~mpcproto.export.bundle.check_bundle`), ``dir``.
    """
    from .._version import __version__
    from ..linear import linearize
    from ..scenario import load_scenario, run_scenario
    from ..scenario.runner import CAUTION, build_controller, prepare
    from ..scenario.schema import Scenario
    from ..scenario.study import _case_seed
    from ..sim import simulate

    t_start = time.perf_counter()
    scn = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    label = _pick_controller(scn, controller)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise fail("export_bundle()", "out_dir", "a directory for the bundle (--out; created if missing)",
                   f"a file named {out}")
    out.mkdir(parents=True, exist_ok=True)

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        prep = prepare(scn, ci=ci)
        ctl = build_controller(label, scn.data["controllers"][label], prep, cache=False)
        # the recorded run: the nominal case, same seed as `mpcproto run` / a study-less batch
        rec = RecordingController(ctl)
        traj = simulate(prep.plant, rec, op=prep.op, Ts=scn.sample_time, duration=prep.duration,
                        rng=_case_seed(scn.seed, 0), **prep.sim)
        pids = _pid_baselines(scn, prep)
    notes = sorted({str(w.message) for w in caught})

    # the study's verdicts and KPIs
    study_dir = out / "study"
    study_dir.mkdir(exist_ok=True)
    if summary is None and not run_study:
        summ = {"scenario": scn.name, "status": "not run",
                "message": "the study was not run for this bundle (export without a study)"}
        source = "not run"
    elif summary is None:
        summ = run_scenario(scn, study_dir, plots=False, ci=ci)
        source = "nominal case run at export" + (" (CI-sized run length)" if ci else "")
    else:
        if isinstance(summary, Mapping):
            summ, source = dict(summary), "summary given to export"
        else:
            sp = Path(summary)
            try:
                summ = json.loads(sp.read_text())
            except (OSError, ValueError) as exc:
                raise fail("export_bundle()", "summary",
                           "the summary.json of an 'mpcproto run' of this scenario (--summary)",
                           f"{sp}, which cannot be read ({exc})") from None
            source = f"summary.json of an earlier run ({sp.name})"
        if not isinstance(summ, Mapping) or summ.get("scenario") != scn.name:
            found = summ.get("scenario") if isinstance(summ, Mapping) else type(summ).__name__
            raise fail("export_bundle()", "summary",
                       f"the summary of scenario '{scn.name}' (--summary)", f"one of {found!r}")
        _write_json(study_dir / "summary.json", _finite(summ))

    # the scenario file as it was
    src = Path(scn.file)
    (out / "scenario").mkdir(exist_ok=True)
    scn_copy = out / "scenario" / src.name
    shutil.copyfile(src, scn_copy)

    # the model
    model, dmodel = prep.model, prep.dmodel
    lin = linearize(model, prep.model_op)
    N = int(ctl.horizon)
    sm = _step_model(dmodel, at_least=N)
    n, S, cols, gains, fits = sm["n"], sm["S"], sm["columns"], sm["gains"], sm["fits"]
    t = np.arange(n + 1) * dmodel.Ts
    flat = S.reshape(n + 1, -1)
    head = [f"time_{model.time_unit}"] + [c["column"] for c in cols]
    lines = [",".join(head)] + [",".join([repr(float(t[k]))] + [repr(float(v)) for v in flat[k]])
                                for k in range(n + 1)]
    (out / STEP_CSV).write_text("\n".join(lines) + "\n")
    var = _variables(model, dmodel)
    _plot_model(sm, dmodel, model, out / MATRIX_PNG,
                f"Step-response matrix: {scn.name}, controller '{label}'")
    cont = lin.as_dict()
    cont["delays"] = [{**d, "dead_time": float(d["dead_time"])} for d in cont["delays"]]

    replay = rec.replay()
    _write_json(out / REPLAY_FILE, replay)

    op = dmodel.op
    doc: dict[str, Any] = {
        "format": FORMAT, "format_version": FORMAT_VERSION,
        "created": {"tool": f"mpcproto {__version__}",
                    "utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")},
        "caution": CAUTION,
        "scenario": {"name": scn.name, "file": str(src), "copy": f"scenario/{src.name}",
                     "sha256": sha256_of(src), "seed": int(scn.seed), "model": model.name,
                     "plant_model": prep.plant.name, "model_mismatch": prep.model is not prep.plant},
        "controller": {"label": label, "kind": "mpc"},
        "time_unit": model.time_unit, "sample_time": float(dmodel.Ts),
        "names": {"states": list(op.state_names), "mvs": list(op.mv_names),
                  "dvs": list(op.dv_names), "cvs": list(op.cv_names)},
        "variables": var,
        "operating_point": {"model": op.model,
                            "states": dict(zip(op.state_names, map(float, op.x))),
                            "mvs": dict(zip(op.mv_names, map(float, op.u))),
                            "dvs": dict(zip(op.dv_names, map(float, op.d))),
                            "cvs": dict(zip(op.cv_names, map(float, op.y))),
                            "parameters": dict(zip(model.parameter_names, map(float, op.p))),
                            "residual": float(op.residual), "stable": op.stable},
        "model": {
            "form": "deviation variables around the operating point: x' = x - x0, u' = u - u0, "
                    "d' = d - d0, y' = y - y0",
            "continuous": cont,
            "discrete": {"sample_time": float(dmodel.Ts), "state_names": list(dmodel.state_names),
                         "plant_states": int(dmodel.n_plant_states),
                         **{k: np.asarray(getattr(dmodel, k), float).tolist()
                            for k in ("A", "B", "Bd", "C", "D", "Dd")}},
            "gain_mv": _finite(gains[:, :dmodel.nu]), "gain_dv": _finite(gains[:, dmodel.nu:]),
            "open_loop_unstable": sm["unstable"],
            "step_response": {"file": STEP_CSV, "plot": MATRIX_PNG, "samples": int(n),
                              "settling_time": float(n * dmodel.Ts), "settling_note": sm["note"],
                              "time_column": head[0], "columns": cols},
            "fits": _finite(fits),
        },
        "settings": settings_to_plain(ctl),
        "effective_weights": _effective(ctl),
        "estimator": _estimator(ctl),
        "operating_limits": _operating_limits(scn, dmodel),
        "horizons": {"prediction": N, "moves": int(ctl.control_horizon or N),
                     "move_blocking": f"{int(ctl.control_horizon or N)} moves at samples 0.."
                                      f"{int(ctl.control_horizon or N) - 1}; the MVs are held "
                                      f"after the last move"},
        "pid_baseline": pids,
        "study": _study(summ, source),
        "proof": {"file": REPLAY_FILE, "samples": len(replay["steps"]["t"]),
                  "run_status": str(traj.status), "run_message": str(traj.meta.get("message", "")),
                  "tolerance": float(tolerance), "passed": False, "max_deviation": None,
                  "message": "not checked yet"},
        "notes": notes,
        "files": {},
    }
    doc = _finite(doc)
    doc["settings"] = settings_to_plain(ctl)      # keeps its nulls and exact numbers
    _write_json(out / BUNDLE_FILE, doc)

    # the round trip, from the written bundle alone
    proof = check_bundle(out, tolerance=tolerance, cls=type(ctl))
    doc["proof"].update(passed=bool(proof["passed"]), max_deviation=proof["max_deviation"],
                        message=proof["message"] or "every move of the rebuilt controller equals "
                        "the original's", schema=proof["schema"])
    from .sheet import write_design_sheet

    write_design_sheet(doc, out / SHEET_FILE, matrix_png=(out / MATRIX_PNG).read_bytes())
    files = [STEP_CSV, MATRIX_PNG, REPLAY_FILE, SHEET_FILE, f"scenario/{src.name}"]
    files += [f"study/{p.name}" for p in sorted(study_dir.iterdir()) if p.is_file()]
    doc["files"] = {f: sha256_of(out / f) for f in files}
    doc["proof"]["elapsed_s"] = round(time.perf_counter() - t_start, 3)
    _write_json(out / BUNDLE_FILE, doc)
    return {"bundle": doc, "proof": proof, "dir": str(out)}


def plot_scenario_step_matrix(scenario: Any, path: str | Path, *, which: str = "plant",
                              fits: bool = True) -> Path:
    """The step-response matrix plot of a scenario's plant (or controller's) model on its own.

    The model is linearized at the scenario's operating point and discretized at its sample time
    (dead times as the scenario rounds them); the responses run over the settling horizon, at least
    the horizon of the scenario's first predictive controller.  With *fits* the recommended
    low-order fit is drawn over each response.  The ``mpcproto linearize --plot`` option.
    """
    from ..linear import linearize
    from ..scenario import load_scenario
    from ..scenario.build import controller_model, discretize, operating_point, plant_model
    from ..scenario.schema import Scenario

    scn = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    if which not in ("plant", "controller"):
        raise fail("plot_scenario_step_matrix()", "which", "'plant' or 'controller'", shown(which))
    model = plant_model(scn) if which == "plant" else controller_model(scn)
    op = operating_point(scn, model)
    dmodel = discretize(scn, linearize(model, op))
    horizons = [int(s.get("horizon", 30)) for s in scn.data["controllers"].values()
                if s["kind"] == "mpc" and isinstance(s.get("horizon", 30), int)]
    sm = _step_model(dmodel, at_least=horizons[0] if horizons else 1, fits=fits)
    return _plot_model(sm, dmodel, model, path, f"Step-response matrix: {scn.name} ({which} model)")


def _step_model(dmodel: Any, *, at_least: int, fits: bool = True) -> dict[str, Any]:
    """Settling horizon, step-response coefficients, pair columns, gains and fits of *dmodel*."""
    n, note = settling_samples(dmodel, at_least=at_least)
    S = step_coefficients(dmodel, n)
    cols = pair_columns(dmodel.cv_names, dmodel.mv_names, dmodel.dv_names)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")      # an integrating channel: inf gain, by design
        gains = np.hstack([dmodel.gain("mv"), dmodel.gain("dv")])
    unstable = bool(np.any(np.abs(np.linalg.eigvals(dmodel.A)) > 1 + 1e-9)) if dmodel.nx else False
    return {"n": n, "note": note, "S": S, "columns": cols, "gains": gains, "unstable": unstable,
            "fits": fit_pairs(S, dmodel.Ts, gains, cols, unstable=unstable) if fits else None}


def _plot_model(sm: Mapping[str, Any], dmodel: Any, model: Any, path: str | Path, title: str) -> Path:
    unit = {v.name: v.unit for v in model.variables()}
    inputs = list(dmodel.mv_names) + list(dmodel.dv_names)
    return plot_step_matrix(sm["S"], dmodel.Ts, path, cv_names=dmodel.cv_names, input_names=inputs,
                            cv_units=[unit[c] for c in dmodel.cv_names],
                            input_units=[unit[m] for m in inputs],
                            input_roles=["mv"] * dmodel.nu + ["dv"] * dmodel.nd,
                            time_unit=model.time_unit, fits=sm["fits"], title=title)
