"""The step-response matrix of a discrete linear model, its low-order fits and its plot.

Per MV/DV -> CV pair, the step-response coefficients are the CV's change at samples
``k = 0..n`` after a unit step of the input held from sample 0 (zero-order hold), in engineering
units (CV unit per input unit)::

    x[0] = 0,  x[k+1] = A x[k] + B[:, j],  S[k] = C x[k] + D[:, j]

Sampling the continuous step response at the sample times gives the same numbers (ZOH step
invariance), so a continuous FOPDT/SOPDT/integrating model can be fitted to them with the one
fitter of the package, :func:`mpcproto.step_fit.fit_step_response`.

The settling horizon is the number of samples after which every self-regulating channel stays
within 1 % of its steady-state gain (at least the prediction horizon; common practice, no
source: vendors' step-response models run to steady state).  An integrating or open-loop
unstable channel has no steady state; its coefficients are given over the same horizon.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import SettingsError
from ..step_fit import fit_step_response, step_model_response

__all__ = ["step_coefficients", "settling_samples", "pair_columns", "fit_pairs", "plot_step_matrix",
           "SETTLE_FRACTION"]

#: a self-regulating channel is settled once it stays within this fraction of its gain
SETTLE_FRACTION = 0.01
#: a fit this close (RMS error, % of the response's largest change) is exact for practical purposes:
#: no SOPDT is fitted after an FOPDT this good
EXACT_PERCENT = 0.1
#: a recommended fit worse than this (RMS error, %) is flagged as rough (common practice, no source)
ROUGH_PERCENT = 5.0
#: the longest settling horizon looked at (samples)
MAX_SAMPLES = 4000


def step_coefficients(dmodel: Any, n: int) -> np.ndarray:
    """Unit-step responses of every input, shape ``(n + 1, ny, nu + nd)`` (MVs first, then DVs)."""
    A = np.asarray(dmodel.A, float)
    Ball = np.hstack([np.asarray(dmodel.B, float), np.asarray(dmodel.Bd, float)])
    Dall = np.hstack([np.asarray(dmodel.D, float), np.asarray(dmodel.Dd, float)])
    C = np.asarray(dmodel.C, float)
    X = np.zeros((A.shape[0], Ball.shape[1]))
    S = np.zeros((n + 1, C.shape[0], Ball.shape[1]))
    for k in range(n + 1):
        S[k] = C @ X + Dall
        X = A @ X + Ball
    return S


def settling_samples(dmodel: Any, at_least: int = 1) -> tuple[int, str]:
    """(samples, note): the settling horizon of the model's step responses (module docstring)."""
    at_least = max(int(at_least), 1)
    poles = np.abs(np.linalg.eigvals(np.asarray(dmodel.A, float))) if dmodel.nx else np.zeros(0)
    if poles.size and np.any(poles > 1.0 + 1e-9):
        return at_least, ("the unit is open-loop unstable: its step responses do not settle; "
                          "coefficients are given over the prediction horizon")
    gains = np.hstack([np.asarray(dmodel.gain("mv"), float), np.asarray(dmodel.gain("dv"), float)])
    S = step_coefficients(dmodel, MAX_SAMPLES)
    last = 0
    for i, j in np.ndindex(gains.shape):
        g = gains[i, j]
        if not math.isfinite(g) or abs(g) <= 1e-12 * max(1.0, float(np.max(np.abs(S[:, i, j])))):
            continue
        off = np.flatnonzero(np.abs(S[:, i, j] - g) > SETTLE_FRACTION * abs(g))
        if off.size:
            last = max(last, int(off[-1]) + 1)
    note = "every self-regulating channel within 1 % of its gain"
    if last >= MAX_SAMPLES:
        note = f"not settled within {MAX_SAMPLES} samples; cut there"
    if not np.all(np.isfinite(gains)):
        note += "; integrating channels ramp on"
    return int(min(max(last, at_least), MAX_SAMPLES)), note


def pair_columns(cv_names: Sequence[str], mv_names: Sequence[str],
                 dv_names: Sequence[str]) -> list[dict[str, str]]:
    """One entry per (CV, input) pair in the order of :func:`step_coefficients` flattened row by row:
    ``{"column": "<cv> <- <input>", "cv", "input", "input_role"}``."""
    cols = []
    for c in cv_names:
        for role, names in (("mv", mv_names), ("dv", dv_names)):
            for m in names:
                cols.append({"column": f"{c} <- {m}", "cv": c, "input": m, "input_role": role})
    return cols


def _fit_entry(f: Any, span: float) -> dict[str, Any]:
    return {"gain": float(f.gain), "time_constants": [float(t) for t in f.time_constants],
            "dead_time": float(f.dead_time), "rms_error": float(f.rmse),
            "rms_error_percent": float(100.0 * f.rmse / span) if span > 0 else None}


def fit_pairs(S: np.ndarray, Ts: float, gains: np.ndarray, columns: Sequence[dict[str, str]], *,
              unstable: bool = False) -> list[dict[str, Any]]:
    """FOPDT and SOPDT (or integrating) fits of every pair's coefficients, with their fit quality.

    ``rms_error_percent`` is the RMS residual over the largest change of the response (0 % = the
    fit reproduces the coefficients).  The ``recommended`` fit is the SOPDT when it halves the
    FOPDT's error, else the FOPDT (common practice, no source: keep the simpler model unless the
    extra lag clearly earns its place); no SOPDT is fitted when the FOPDT is exact to
    ``EXACT_PERCENT``.  A pair the input does not move has ``kind == "none"``;
    an open-loop unstable unit is not fitted (a stable low-order model would mislead).
    """
    t = np.arange(S.shape[0]) * float(Ts)
    out = []
    for col, (c, j) in zip(columns, np.ndindex(S.shape[1], S.shape[2])):
        y = S[:, c, j]
        span = float(np.max(np.abs(y)))
        row = float(np.max(np.abs(S[:, c, :])))
        g = float(gains[c, j])
        entry: dict[str, Any] = {"cv": col["cv"], "input": col["input"],
                                 "input_role": col["input_role"], "gain": g if math.isfinite(g) else None,
                                 "integrating": not math.isfinite(g), "fits": {}, "recommended": None,
                                 "inverse_response": False, "note": ""}
        if span == 0.0 or span <= 1e-9 * row:
            entry.update(kind="none", note="the input does not move this CV")
            out.append(entry)
            continue
        if unstable:
            entry.update(kind="unstable", note="open-loop unstable: not fitted; use the state-space "
                                               "model or the coefficients")
            out.append(entry)
            continue
        final = y[-1] if math.isfinite(g) else y[-1] - y[-2]
        entry["inverse_response"] = bool(np.min(y * np.sign(final)) < -0.02 * span)
        # at most ~200 points: the coefficients are exact samples, more points add time, not
        # information (the dead time stays a continuous parameter of the fit)
        stride = max(1, math.ceil(len(y) / 200))
        ts, ys = t[::stride], y[::stride]
        kinds = ("integrating",) if not math.isfinite(g) else ("fopdt", "sopdt")
        for kind in kinds:
            if kind == "sopdt" and "error" not in entry["fits"].get("fopdt", {"error": ""}) and \
                    entry["fits"]["fopdt"]["rms_error_percent"] < EXACT_PERCENT:
                break           # the FOPDT is exact already: a second lag has nothing to add
            try:
                f = fit_step_response(ts, ys, size=1.0, t_step=0.0, y0=0.0, kind=kind,
                                      what=f"fit of {col['column']}")
            except SettingsError as exc:
                entry["fits"][kind] = {"error": str(exc)}
                continue
            entry["fits"][kind] = _fit_entry(f, span)
        good = {k: v for k, v in entry["fits"].items() if "error" not in v}
        if good:
            rec = "integrating" if "integrating" in good else "fopdt" if "fopdt" in good else "sopdt"
            if rec == "fopdt" and "sopdt" in good and \
                    good["sopdt"]["rms_error"] < 0.5 * good["fopdt"]["rms_error"]:
                rec = "sopdt"
            entry["recommended"] = rec
        entry["kind"] = entry["recommended"] or "not fitted"
        if entry["inverse_response"]:
            entry["note"] = "inverse response (the CV first moves the wrong way): a low-order fit " \
                            "without a zero misses it; use the coefficients"
        elif entry["recommended"] and (good[entry["recommended"]]["rms_error_percent"] or 0) > ROUGH_PERCENT:
            entry["note"] = "rough fit (an oscillating or higher-order response): use the coefficients"
        out.append(entry)
    return out


def _short(v: float) -> str:
    return f"{v:.3g}"


def plot_step_matrix(S: np.ndarray, Ts: float, path: str | Path, *, cv_names: Sequence[str],
                     input_names: Sequence[str], cv_units: Sequence[str] = (),
                     input_units: Sequence[str] = (), input_roles: Sequence[str] = (),
                     time_unit: str = "", fits: Sequence[dict[str, Any]] | None = None,
                     title: str | None = None, dpi: int = 100) -> Path:
    """A grid of small plots of the step responses: CVs down, MVs/DVs across; writes a PNG.

    Each cell shows the coefficients (CV change per unit input step) against time; with *fits*
    (from :func:`fit_pairs`, same order) the recommended fit is drawn dashed over them and its
    parameters written in the cell.  A pair the input does not move is left blank with "no effect".
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    ny, ni = S.shape[1], S.shape[2]
    stride = max(1, math.ceil(S.shape[0] / 400))          # a small plot needs no more points
    S = S[::stride]
    t = np.arange(0, stride * S.shape[0], stride)[:S.shape[0]] * float(Ts)
    w = min(2.3 * ni + 1.2, 30.0)
    h = min(1.75 * ny + 1.3, 40.0)
    fig, axes = plt.subplots(ny, ni, figsize=(w, h), squeeze=False, sharex=True)
    ink, mv_col, dv_col, fit_col = "#23313f", "#1f4e79", "#2a8c72", "#b5452f"
    by_pair = {(f["cv"], f["input"]): f for f in (fits or [])}
    for i, j in np.ndindex(ny, ni):
        ax = axes[i, j]
        y = S[:, i, j]
        role = input_roles[j] if j < len(input_roles) else "mv"
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        ax.tick_params(labelsize=7, colors=ink)
        ax.grid(True, color="#d6dde4", linewidth=0.6)
        ax.set_axisbelow(True)
        if float(np.max(np.abs(y))) <= 1e-9 * float(np.max(np.abs(S[:, i, :]))) or not np.any(y):
            ax.text(0.5, 0.5, "no effect", ha="center", va="center", transform=ax.transAxes,
                    fontsize=8, color="#8a96a3")
            ax.set_yticks([])
        else:
            ax.axhline(0.0, color="#8a96a3", linewidth=0.6)
            ax.plot(t, y, color=dv_col if role == "dv" else mv_col, linewidth=1.6)
            f = by_pair.get((cv_names[i], input_names[j]))
            rec = f and f.get("recommended")
            if rec:
                p = f["fits"][rec]
                ax.plot(t, step_model_response(t, p["gain"], p["time_constants"], p["dead_time"],
                                               integrating=rec == "integrating"),
                        color=fit_col, linewidth=1.0, linestyle=(0, (4, 3)))
                taus = ", ".join(_short(x) for x in p["time_constants"])
                txt = (f"K={_short(p['gain'])}" + ("/" + (time_unit or "t") if rec == "integrating" else "")
                       + (f"\nτ={taus}" if taus else "") + f"\nθ={_short(p['dead_time'])}")
                ax.text(0.97, 0.05 if y[-1] >= 0 else 0.95, txt, transform=ax.transAxes, ha="right",
                        va="bottom" if y[-1] >= 0 else "top", fontsize=7, color=ink,
                        bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1})
            elif f and f.get("kind") == "unstable":
                ax.text(0.03, 0.92, "unstable", transform=ax.transAxes, fontsize=7, color=fit_col,
                        va="top")
        if i == 0:
            u = f" [{input_units[j]}]" if j < len(input_units) and input_units[j] else ""
            ax.set_title(f"{input_names[j]}{u}\n({'DV' if role == 'dv' else 'MV'})", fontsize=8,
                         color=dv_col if role == "dv" else mv_col)
        if j == 0:
            u = f"\n[{cv_units[i]}]" if i < len(cv_units) and cv_units[i] else ""
            ax.set_ylabel(f"{cv_names[i]}{u}", fontsize=8, color=ink)
        if i == ny - 1:
            ax.set_xlabel(f"time [{time_unit}]" if time_unit else "time", fontsize=7)
    import textwrap

    head = title or "Step-response matrix"
    sub = textwrap.fill("CV change per unit step of each input (solid); recommended low-order fit "
                        "(dashed). K gain, τ time constants, θ dead time.", width=int(w * 13))
    fig.suptitle(f"{head}\n{sub}", fontsize=9, color=ink)
    fig.text(0.995, 0.003, "simulation of a model only, not evidence that a controller is safe "
             "on a real unit", ha="right", va="bottom", fontsize=6.5, color="#666666")
    # fixed margins in inches (tight_layout draws the whole grid twice more)
    top = 0.2 + 0.17 * (2 + sub.count("\n")) + 0.45          # suptitle lines + column titles
    fig.subplots_adjust(left=1.0 / w, right=1 - 0.15 / w, bottom=0.65 / h, top=1 - top / h,
                        wspace=0.35, hspace=0.3)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path
