"""What a controller had in a comparison: its kind, structure, the measurements it reads and its
tuning as resolved (:func:`describe_controller`), in plain JSON-able data.  The scenario runner
stores it in summary.json (``inputs``) and ``run`` prints it (:func:`mpcproto.compare.tuning_text`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = ["describe_controller"]


def describe_controller(controller: Any, model: Any) -> dict[str, Any]:
    """What a controller had in a comparison (JSON-able): ``kind``, ``structure`` (lines of
    text), ``measured_cvs``, ``measured_dvs_used`` (the measured DVs it acts on: feedforward,
    ratio), ``mv_flows_used`` (other MVs' flows it reads) and ``tuning``.

    A controller with a ``describe()`` method answers itself (the PID controllers); for the
    predictive controller the measured DVs are those of *model* its settings feed forward; any
    other controller is reported as ``unknown`` (what it reads is not known: no DV is assumed).
    """
    desc = getattr(controller, "describe", None)
    if callable(desc):
        return dict(desc())
    measured = list(getattr(model, "measured_dv_names", ()))
    resolved = getattr(controller, "_resolved", None)
    if resolved is not None and "feedforward" in resolved:
        names = list(getattr(getattr(controller, "dmodel", None), "dv_names", ()) or
                     getattr(model, "dv_names", ()))
        ff = [n for n, on in zip(names, list(resolved["feedforward"])) if on and n in measured]
        mvs = list(getattr(model, "mv_names", ()))
        structure = [f"one multivariable predictive controller on {', '.join(mvs)}"]
        if getattr(controller, "setpoint_preview", False) is True:   # it sees the program ahead
            structure.append(f"setpoint program seen {resolved.get('N')} samples ahead")
        return {"kind": "mpc", "structure": structure,
                "measured_cvs": list(getattr(model, "cv_names", ())), "measured_dvs_used": ff,
                "mv_flows_used": [],
                "tuning": {"horizon": resolved.get("N", getattr(controller, "horizon", None)),
                           "control_horizon": resolved.get(
                               "M", getattr(controller, "control_horizon", None)),
                           **_mpc_weights(controller, resolved)}}
    return {"kind": "unknown", "structure": [type(controller).__name__], "measured_cvs": [],
            "measured_dvs_used": [], "mv_flows_used": [], "tuning": {}}


def _mpc_weights(controller: Any, resolved: Mapping[str, Any]) -> dict[str, Any]:
    """Per CV: scale, weight and priority; per MV: scale and move weight, as the predictive
    controller resolved them (weights per squared scale, as given or by default), and the rule
    of the default move weight (:func:`~mpcproto.control.mpc_settings.default_move_weight`)."""
    from .mpc_settings import CV_KEYS, MV_KEYS, per_var

    m = getattr(controller, "dmodel", None)
    if m is None or "cv_scale" not in resolved:
        return {}
    cvs = per_var("cv", controller.cv, m.cv_names, CV_KEYS)
    mvs = per_var("mv", controller.mv, m.mv_names, MV_KEYS)
    return {"cv": {n: {"scale": float(resolved["cv_scale"][i]), "weight": float(row["weight"]),
                       "priority": int(row["priority"])} for i, (n, row) in enumerate(zip(m.cv_names, cvs))},
            "mv": {n: {"scale": float(resolved["mv_scale"][j]),
                       "move_weight": float(resolved["move_weight_per_scale"][j]),
                       "move_weight_given": row["move_weight"] is not None}
                   for j, (n, row) in enumerate(zip(m.mv_names, mvs))},
            "move_weight_default": _plain(resolved.get("move_weight_default") or {})}


def _plain(d: Mapping[str, Any]) -> dict[str, Any]:
    return {k: (float(v) if isinstance(v, (int, float)) else v) for k, v in d.items()}
