"""From a validated :class:`~mpcproto.scenario.schema.Scenario` to models, an operating point and a
linear model.

No numerics of its own: it calls the model resolver (:func:`mpcproto.models.resolve_model`), the steady-state
and target solvers (:mod:`mpcproto.operating`) and :func:`mpcproto.linearize`.  Errors raised by those
layers on behalf of a scenario key are re-raised as :class:`~mpcproto.exceptions.ScenarioError` naming
the file and the key path.

Compiled models are cached per process by the resolver (keyed by the full reference -- a file's
path and content hash --, options and parameter values), so a pool worker that runs many cases of
one study builds each distinct model once.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import scipy.linalg as sla

from ..exceptions import MpcprotoError, ScenarioError
from ..model import Model, suggest
from .schema import Scenario

__all__ = ["get_model", "plant_model", "controller_model", "operating_point", "linear_report",
           "clear_model_cache", "check_same_variables", "scenario_folder"]

def clear_model_cache() -> None:
    """Forget every compiled model of this process."""
    from ..models.resolve import clear_cache

    clear_cache()


def get_model(name: Any, *, options: Mapping[str, Any] | None = None,
              parameters: Mapping[str, float] | None = None, base_dir: str | Path | None = None,
              what: str = "model") -> Model:
    """The built model *name* (any model reference, see :mod:`mpcproto.models.resolve`) with
    *options* and *parameters*, compiled once per process.

    Same arguments, same (shared) :class:`~mpcproto.model.Model` object: treat it as read-only.
    """
    from ..models.resolve import resolve_model

    return resolve_model(name, options=options, parameters=parameters, base_dir=base_dir, what=what)


def scenario_folder(scn: Scenario) -> Path:
    """The folder a scenario's relative file references (model files, CSV tables) are read from."""
    if scn.file and scn.file != "<dict>":
        return Path(scn.file).resolve().parent
    return Path.cwd()


def _wrap(scn: Scenario, key: str, err: MpcprotoError) -> ScenarioError:
    """*err* as the scenario's error, at its own key path if it has one, else at *key*."""
    out = err.replace(key=err.key or key).in_file(scn.file)
    out.detail = getattr(err, "detail", "")
    return out


def discretize(scn: Scenario, lin: Any) -> Any:
    """*lin* discretized at the scenario's sample time and dead-time policy; a refusal (a dead time
    that is not a whole number of samples under ``dead_time = "refuse"``) is the scenario's error
    at ``scenario.sample_time`` (its fields kept; the function's own argument key replaced)."""
    from ..exceptions import SettingsError

    try:
        return lin.discretize(scn.sample_time, dead_time=scn.data["scenario"]["dead_time"])
    except SettingsError as e:
        raise e.replace(key="scenario.sample_time").in_file(scn.file) from None


def _section_model(scn: Scenario, section: str, ref: Any, options: Mapping[str, Any],
                   params: Mapping[str, Any]) -> Model:
    """Resolve one section's model; errors name the key path the resolver gives them (a
    parameter or an option of the section), else ``<section>.model``."""
    try:
        return get_model(ref, options=options, parameters=params, base_dir=scenario_folder(scn),
                         what=f"{section}.model")
    except MpcprotoError as e:
        raise _wrap(scn, f"{section}.model", e) from None


def plant_model(scn: Scenario) -> Model:
    """The plant: ``[plant] model`` with its ``options`` and ``parameters``."""
    pl = scn.data["plant"]
    return _section_model(scn, "plant", pl["model"], pl["options"], pl["parameters"])


def controller_model(scn: Scenario, base: Mapping[str, float] | None = None) -> Model:
    """The controller's model.

    Without ``[controller_model] model``: the plant's model and options with the parameter values
    the controller believes -- the plant's parameters as written in the file (*base*, by default
    ``plant.parameters``) updated with ``[controller_model] parameters``.  A study that changes
    ``plant.parameters.x`` therefore changes the plant only -- model mismatch -- unless it also
    addresses ``controller_model.parameters.x``.

    With ``[controller_model] model`` (or ``kind = "transfer_matrix"``): that model, of any
    structure, with its own ``options`` and ``parameters``; its MVs, DVs and CVs must be the
    plant's (same names, same order, same units), see :func:`check_same_variables`.
    """
    pl = scn.data["plant"]
    cm = scn.data["controller_model"]
    if cm.get("model") is not None:
        model = _section_model(scn, "controller_model", cm["model"], cm.get("options", {}),
                               cm["parameters"])
        check_same_variables(scn, plant_model(scn), model)
        return model
    params = dict(pl["parameters"] if base is None else base)
    params.update(cm["parameters"])
    try:
        return get_model(pl["model"], options=pl["options"], parameters=params,
                         base_dir=scenario_folder(scn), what="plant.model")
    except MpcprotoError as e:
        # a parameter the controller's model sets is that section's key, not the plant's
        key = next((f"controller_model.parameters.{k}" for k in cm["parameters"]
                    if e.key == f"plant.parameters.{k}"), None)
        raise _wrap(scn, "plant.model", e.replace(key=key) if key else e) from None


def check_same_variables(scn: Scenario, plant: Model, model: Model) -> None:
    """A controller's model of another structure must speak the plant's variables.

    The controller reads the plant's CVs and measured DVs and moves its MVs, vector by vector, so
    the MVs, DVs and CVs must have the same names in the same order, and the same units.  Raises
    :class:`ScenarioError` at ``controller_model.model`` naming both lists.
    """
    for role, word in (("mv", "MVs"), ("dv", "DVs"), ("cv", "CVs")):
        pn, cn = list(plant.names(role)), list(model.names(role))
        if pn != cn:
            missing = [n for n in pn if n not in cn]
            extra = [n for n in cn if n not in pn]
            why = []
            if missing:
                why.append(f"missing {', '.join(missing)}")
            if extra:
                why.append(f"not in the plant: {', '.join(extra)}")
            if not why:
                why.append("the same names in another order")
            raise ScenarioError(
                f"expected the controller's model '{model.name}' to have the plant's {word} in the "
                f"plant's order ({', '.join(pn) or 'none'}: model '{plant.name}' from plant.model); "
                f"found {', '.join(cn) or 'none'} ({'; '.join(why)}).", file=scn.file,
                key="controller_model.model")
        for pv, cv in zip(plant.variables(role), model.variables(role)):
            if pv.unit != cv.unit:
                raise ScenarioError(
                    f"expected the unit of {role.upper()} '{pv.name}' in the controller's model "
                    f"'{model.name}' to be the plant's ({pv.unit!r}); found {cv.unit!r}.",
                    file=scn.file, key="controller_model.model")
            if role == "dv" and pv.measured != cv.measured:
                raise ScenarioError(
                    f"expected DV '{pv.name}' to be {'measured' if pv.measured else 'unmeasured'} "
                    f"in the controller's model '{model.name}' as in the plant; found it "
                    f"{'measured' if cv.measured else 'unmeasured'}.", file=scn.file,
                    key="controller_model.model")


def _names(model: Model, role: str) -> tuple[str, ...]:
    return model.names(role)


def check_names(scn: Scenario, model: Model, section: str, role: str | tuple[str, ...],
                entries: Mapping[str, Any]) -> None:
    """Every key of *entries* must be a variable of *model* with one of the given roles."""
    roles = (role,) if isinstance(role, str) else role
    words = [r.upper() if r != "state" else r for r in roles]
    what = " or ".join(words)
    article = "an" if words[0] in ("MV",) or words[0][0] in "aeiou" else "a"
    names: list[str] = []
    for r in roles:
        names += list(_names(model, r))
    for k in entries:
        if k not in names:
            raise ScenarioError(
                f"expected the name of {article} {what} "
                f"of model '{model.name}' ({', '.join(names) or 'none'}); found '{k}'"
                f"{suggest(k, names)}.", file=scn.file, key=f"{section}.{k}")


def operating_point(scn: Scenario, model: Model | None = None):
    """The operating point the scenario starts from.

    ``[operating_point]`` gives the MVs and DVs (the rest take the model's nominal values) and the
    steady state is solved for, or CV ``targets`` for which the free MVs are solved (the target
    problem; MVs listed under ``mvs`` are then held at their values).  ``state_guess`` seeds the
    search; ``pick`` chooses among several steady states: "nearest" (to the guess, default),
    "stable" or "unstable" (the one nearest the guess among those, e.g. the open-loop-unstable middle
    state of an exothermic reactor).
    """
    from ..operating import steady_state, steady_states
    from ..target_problem import solve_targets

    model = plant_model(scn) if model is None else model
    op = scn.data["operating_point"]
    check_names(scn, model, "operating_point.mvs", "mv", op["mvs"])
    check_names(scn, model, "operating_point.dvs", "dv", op["dvs"])
    check_names(scn, model, "operating_point.targets", "cv", op["targets"])
    check_names(scn, model, "operating_point.state_guess", "state", op["state_guess"])
    for section, role in (("mvs", "mv"), ("dvs", "dv")):
        # a value outside the variable's physical range cannot be an operating point
        for v in model.variables(role):
            if v.name not in op[section]:
                continue
            val = float(op[section][v.name])
            lo = v.low if v.low is not None else -np.inf
            hi = v.high if v.high is not None else np.inf
            if (np.isfinite(lo) and val < lo) or (np.isfinite(hi) and val > hi):
                raise ScenarioError(
                    f"expected a value within the physical range of '{v.name}' [{lo:g}, {hi:g}] "
                    f"{v.unit} (mpcproto models lists it); found {val:g}.",
                    file=scn.file, key=f"operating_point.{section}.{v.name}")
    u = model.vector("mv", op["mvs"])
    d = model.vector("dv", op["dvs"])
    xg = model.vector("state", op["state_guess"]) if op["state_guess"] else None
    try:
        if op["targets"]:
            res = solve_targets(model, dict(op["targets"]), d=d,
                                          fixed_mvs=dict(op["mvs"]) or None, x_guess=xg)
            if not res.reachable:
                raise ScenarioError(
                    f"expected CV targets the MVs can reach at steady state within their bounds; "
                    f"found: {res.message}", file=scn.file, key="operating_point.targets")
            return res.op
        if op["pick"] == "nearest":
            return steady_state(model, u, d, x_guess=xg)
        found = steady_states(model, u, d, starts=None if xg is None else [xg])
        return _pick(scn, found, op["pick"], xg if xg is not None else model.nominal("state"))
    except ScenarioError:
        raise
    except MpcprotoError as e:
        # includes OperatingPointError for non-finite derivatives (absurd parameter values):
        # its message names the model, the entries and the extreme parameters
        hint = ("parameter values come from [plant] and [controller_model]"
                if e.code == "non_finite" else None)
        note = "; ".join(p for p in (e.note, hint) if p) or None
        raise e.replace(key="operating_point", note=note).in_file(scn.file) from None


def _pick(scn: Scenario, found: list, pick: str, xg: np.ndarray | None):
    if not found:
        raise ScenarioError("expected at least one steady state for these MVs and DVs; found none.",
                            file=scn.file, key="operating_point")
    cands = list(found)
    if pick == "stable":
        cands = [p for p in found if p.stable]
    elif pick == "unstable":
        cands = [p for p in found if p.stable is False]
    if not cands:
        desc = ", ".join("stable" if p.stable else "unstable" for p in found)
        raise ScenarioError(
            f"expected a {pick} steady state for these MVs and DVs; found only {len(found)} "
            f"({desc}).", file=scn.file, key="operating_point.pick")
    if xg is not None:
        cands.sort(key=lambda p: float(np.linalg.norm((p.x - xg) / np.maximum(np.abs(xg), 1e-9))))
    return cands[0]


def _cplx(values) -> list[list[float]]:
    return [[float(np.real(v)), float(np.imag(v))] for v in np.asarray(values).reshape(-1)]


def _mat(M) -> list[list[float | None]]:
    M = np.asarray(M, float)
    return [[(float(v) if math.isfinite(v) else None) for v in row] for row in M]


def linear_report(scn: Scenario, *, which: str = "plant") -> dict[str, Any]:
    """Everything ``mpcproto linearize`` prints, as plain JSON-able data.

    Parameters
    ----------
    scn : Scenario
    which : {"plant", "controller"}
        Linearize the plant or the controller's model (they differ under model mismatch).

    Returns
    -------
    dict
        ``model``, ``time_unit``, ``sample_time``, ``operating_point`` (as
        :meth:`OperatingPoint.as_dict`), ``names`` (states/mvs/dvs/cvs/discrete_states),
        ``continuous`` (A, B, Bd, Bz, C, D, Dd, Dz, delays), ``discrete`` (Ts, A, B, Bd, C, D, Dd),
        ``open_loop`` ("stable", "integrating" or "unstable"), ``gain`` (CV x MV), ``dv_gain`` (CV x DV), ``poles`` and ``zeros`` (as [re, im] pairs),
        ``rga`` (square systems with a non-singular gain, else null, with ``rga_note``) and ``pairs``
        (per CV/MV: gain, time constants, dead time).  Non-finite gains (integrating channels) are
        null.
    """
    from ..linear import linearize

    if which not in ("plant", "controller"):
        raise ScenarioError(f"expected 'plant' or 'controller' for the model to linearize; found {which!r}.",
                            file=scn.file)
    model = plant_model(scn) if which == "plant" else controller_model(scn)
    op = operating_point(scn, model)
    lin = linearize(model, op)
    with warnings.catch_warnings():
        # an integrating unit (a level) has a singular A; the gain reports inf for it
        warnings.simplefilter("ignore", sla.LinAlgWarning)
        return _report(scn, which, model, op, lin)


def _open_loop(eigenvalues) -> str:
    from ..linear import open_loop_class

    return open_loop_class(eigenvalues)


def _report(scn, which, model, op, lin) -> dict[str, Any]:
    from ..exceptions import SettingsError

    dlin = discretize(scn, lin)
    K = lin.gain("mv")
    rga_val, rga_note = None, ""
    if K.shape[0] == K.shape[1] and K.size:
        try:
            rga_val = _mat(lin.rga())
        except SettingsError as e:
            rga_note = str(e)
    else:
        rga_note = f"no RGA: the system is not square ({K.shape[0]} CVs, {K.shape[1]} MVs)"
    pairs = []
    for p in lin.pairs():
        q = dict(p)
        q["gain"] = float(q["gain"]) if math.isfinite(q["gain"]) else None
        q["poles"] = _cplx(q["poles"])
        q["zeros"] = _cplx(q["zeros"])
        pairs.append(q)
    cont = lin.as_dict()
    return {
        "scenario": scn.name,
        "file": scn.file,
        "model": model.name,
        "which": which,
        "time_unit": model.time_unit,
        "sample_time": scn.sample_time,
        "operating_point": op.as_dict(),
        "open_loop": _open_loop(op.eigenvalues),
        "names": {"states": list(model.state_names), "mvs": list(model.mv_names),
                  "dvs": list(model.dv_names), "cvs": list(model.cv_names),
                  "discrete_states": list(dlin.state_names)},
        "continuous": {k: (_mat(v) if k != "delays" else v) for k, v in cont.items()},
        "discrete": {"Ts": dlin.Ts, "A": _mat(dlin.A), "B": _mat(dlin.B), "Bd": _mat(dlin.Bd),
                     "C": _mat(dlin.C), "D": _mat(dlin.D), "Dd": _mat(dlin.Dd)},
        "gain": _mat(K),
        "dv_gain": _mat(lin.gain("dv")),
        "poles": _cplx(lin.poles()),
        "zeros": _cplx(lin.zeros()),
        "rga": rga_val,
        "rga_note": rga_note,
        "pairs": pairs,
    }
