"""Open-loop tests as the trade runs them: step, pulse and impulse responses.

Before a controller is designed, an engineer moves one MV (or watches one DV) by a known amount
and records how every CV answers.  :func:`open_loop_test` does this on the **nonlinear** model and,
beside it, on its **linearization** at the same operating point, so the reach of the linear model is
visible; :func:`plot_response_test` draws both to a PNG and :func:`linearity_sweep` repeats the test
for several sizes (and both directions).  :func:`mpcproto.step_fit.fit_step_response` turns a
recorded step response into a first- or second-order-plus-dead-time model.

Inputs (held between samples of ``Ts``, zero-order hold):

``"step"``
    ``u = u0 + size`` from t = 0 on.
``"pulse"``
    ``u = u0 + size`` for ``0 <= t < width`` (default one sample), then back to ``u0``.
``"impulse"``
    an impulse of area ``size`` (input unit x time unit), applied to both models as a one-sample
    rectangular pulse of height ``size / Ts`` -- the sampled form of an impulse a plant test can
    actually apply.  Keep ``Ts`` short against the unit's time constants.

The nonlinear response comes from the closed loop's plant stepper (:class:`mpcproto.stepper.Plant`:
the model's plugin, cvodes by default with the stepper's ``OPEN_LOOP_TOLERANCES`` abstol 1e-11,
reltol 1e-10, or the exact discrete map of a linear model); dead times are exact, whole samples or not.  The linear response
is the exact ZOH discretization of the linearization (:meth:`~mpcproto.LinearModel.discretize`,
fractional dead times exact too), so for a linear plant the two agree to integrator accuracy.

Linearity report: per CV, the largest deviation between the nonlinear and the linear response,
relative to the largest change of the linear response,
``max_k |y_nl[k] - y_lin[k]| / max_k |y_lin[k] - y0|`` (0 = the linear model is exact for this
test; 0.1 = 10 % off at the worst moment).  A CV that the input does not move is reported as 0 if the
nonlinear response stays put too, else ``inf``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .exceptions import SimulationError
from .linear import linearize
from .validation import Names, Options, check, fail, shown
from .operating import OperatingPoint

__all__ = ["ResponseTest", "open_loop_test", "plot_response_test", "linearity_sweep"]

KINDS = ("step", "pulse", "impulse")


@dataclass
class ResponseTest:
    """Result of :func:`open_loop_test` (plain data).

    Attributes
    ----------
    model : str
        Model name.
    kind : str
        ``"step"``, ``"pulse"`` or ``"impulse"``.
    input_name, input_role : str
        The moved variable and its role (``"mv"`` or ``"dv"``).
    input_base : float
        Its value at the operating point (before the test).
    size : float
        Step/pulse height, or impulse area.
    Ts, duration : float
        Sample time and test length (model time unit).
    t : ndarray (N+1,)
        Sample times.
    u : ndarray (N+1,)
        Input applied over [t_k, t_k+1) (last value repeated).
    y_nonlinear, y_linear : ndarray (N+1, ny)
        CV values (absolute, not deviations) of the nonlinear model and of the linearization.
    x_nonlinear : ndarray (N+1, nx)
        States of the nonlinear model.
    linearity : dict
        CV name -> largest relative deviation (see the module docstring).
    cv_names, cv_units : tuple of str
    op : OperatingPoint
        Where the test starts.
    time_unit, input_unit : str
    """

    model: str
    kind: str
    input_name: str
    input_role: str
    size: float
    Ts: float
    duration: float
    t: np.ndarray
    u: np.ndarray
    y_nonlinear: np.ndarray
    y_linear: np.ndarray
    x_nonlinear: np.ndarray
    linearity: dict[str, float]
    cv_names: tuple[str, ...]
    cv_units: tuple[str, ...]
    op: OperatingPoint
    time_unit: str = ""
    input_unit: str = ""
    input_base: float = math.nan
    notes: list[str] = field(default_factory=list)

    @property
    def worst(self) -> tuple[str, float]:
        """(CV, relative deviation) of the least linear CV."""
        k = max(self.linearity, key=lambda c: self.linearity[c])
        return k, self.linearity[k]

    def as_dict(self) -> dict[str, Any]:
        """JSON-able view (time series as lists, non-finite numbers as None)."""
        def fin(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None

        return {
            "model": self.model, "kind": self.kind, "input": self.input_name, "role": self.input_role,
            "size": self.size, "Ts": self.Ts, "duration": self.duration, "time_unit": self.time_unit,
            "t": self.t.tolist(), "u": self.u.tolist(),
            "cvs": {c: {"unit": un, "nonlinear": self.y_nonlinear[:, i].tolist(),
                        "linear": self.y_linear[:, i].tolist(), "linearity": fin(self.linearity[c])}
                    for i, (c, un) in enumerate(zip(self.cv_names, self.cv_units))},
            "notes": list(self.notes),
        }


def _positive(v: Any, what: str) -> float:
    if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v) or v <= 0:
        raise fail("open_loop_test()", what, "a finite number > 0", shown(v))
    return float(v)


def open_loop_test(model, op: OperatingPoint, mv: str, *, kind: str = "step", size: float,
                   duration: float | None = None, Ts: float | None = None,
                   width: float | None = None) -> ResponseTest:
    """Move one input of *model* from *op* and record the nonlinear and the linear response.

    Parameters
    ----------
    model : Model
        A built model.
    op : OperatingPoint
        Starting point (normally a steady state, e.g. from :func:`~mpcproto.steady_state`).
    mv : str
        Name of the MV to move (a DV name is accepted too: a disturbance test).
    kind : {"step", "pulse", "impulse"}
        See the module docstring.
    size : float
        Step or pulse height (input unit), or impulse area (input unit x time unit); not 0.
    duration : float, optional
        Test length; default 5 times the slowest stable time constant of the linearization (at
        least 20 samples).
    Ts : float, optional
        Sample time of the recorded response; default ``duration / 200``.
    width : float, optional
        Pulse width (``kind="pulse"``), a whole number of samples; default one sample.

    Returns
    -------
    ResponseTest

    Raises
    ------
    SettingsError
        For an unknown input, kind or a bad number.
    SimulationError
        If the nonlinear integration fails (e.g. a tank runs dry).
    """
    if not getattr(model, "is_built", False):
        from .exceptions import NotBuiltError

        raise NotBuiltError(f"open_loop_test(): model '{model.name}' is not built; call model.build() first.")
    if kind not in KINDS:
        check(kind, Options(tuple(KINDS)), owner="open_loop_test()", key="kind")
    if mv in model.mv_names:
        role = "mv"
    elif mv in model.dv_names:
        role = "dv"
    else:
        names = model.mv_names + model.dv_names
        check(mv, Names("MV or DV", tuple(names)), owner="open_loop_test()", key="mv")
    if isinstance(size, bool) or not isinstance(size, numbers.Real) or not math.isfinite(size) or size == 0:
        raise fail("open_loop_test()", "size", "a finite non-zero number", shown(size))
    if tuple(op.state_names) != tuple(model.state_names) or tuple(op.mv_names) != tuple(model.mv_names):
        raise fail("open_loop_test()", "op", f"an operating point of model '{model.name}'",
                   f"one of model '{op.model}' (its variables differ)")
    lin = linearize(model, op)
    if duration is None:
        poles = lin.poles()
        slow = [-1.0 / p.real for p in poles if p.real < -1e-12]
        duration = 5.0 * max(slow) if slow else 100.0 * (Ts or 1.0)
        if Ts is not None:
            duration = max(duration, 20 * Ts)
    duration = _positive(duration, "duration")
    Ts = _positive(Ts, "Ts") if Ts is not None else duration / 200.0
    N = int(round(duration / Ts))
    if N < 2:
        raise fail("open_loop_test()", "duration", f"at least 2 samples of Ts = {Ts:g}",
                   f"{duration:g}")
    j = model.names(role).index(mv)
    lo, hi = model.bounds(role)
    base = (op.u if role == "mv" else op.d)[j]
    prof = np.zeros(N)
    notes: list[str] = []
    if kind == "step":
        prof[:] = size
    elif kind == "pulse":
        w = Ts if width is None else _positive(width, "width")
        nw = max(1, int(math.floor(w / Ts + 0.5)))
        if abs(nw * Ts - w) > 1e-9 * w:
            notes.append(f"pulse width {w:g} rounded to {nw} samples ({nw * Ts:g})")
        prof[:min(nw, N)] = size
    else:
        prof[0] = size / Ts
    vals = base + prof
    if np.any(vals < lo[j] - 1e-12) or np.any(vals > hi[j] + 1e-12):
        notes.append(f"{mv} leaves its physical range [{lo[j]:g}, {hi[j]:g}] during the test "
                     f"(reaches {vals.min():g}..{vals.max():g}); the model is evaluated there anyway")

    # nonlinear: the plant stepper of the closed loop (exact dead times, split samples)
    from .stepper import OPEN_LOOP_TOLERANCES, Plant

    plant = Plant(model, Ts, tolerances=OPEN_LOOP_TOLERANCES)
    dlin = lin.discretize(Ts, dead_time="exact")
    U = np.tile(op.u, (N, 1))
    D = np.tile(op.d, (N, 1))
    (U if role == "mv" else D)[:, j] = vals
    X = np.zeros((N + 1, model.nx))
    Y = np.zeros((N + 1, model.ny))
    X[0] = op.x
    plant.reset(op.x, op.u, op.d)
    for k in range(N):
        Y[k] = plant.output(U[k], D[k])
        try:
            X[k + 1] = plant.advance(U[k], D[k])
        except SimulationError as exc:
            raise exc.within("open_loop_test()",
                             f"model '{model.name}' not integrated past t = {k * Ts:g} "
                             f"{model.time_unit}, {kind} of {size:g} on {mv}; try a smaller "
                             f"size") from None
    Y[N] = plant.output(U[-1], D[-1])
    lo_x, hi_x = model.bounds("state")
    out_of = [n for i, n in enumerate(model.state_names)
              if np.any(X[:, i] < lo_x[i] - 1e-9) or np.any(X[:, i] > hi_x[i] + 1e-9)]
    if out_of:
        notes.append(f"states outside their physical bounds during the test: {', '.join(out_of)}")

    # linear: exact ZOH discretization, deviation variables
    du = np.zeros((N, model.nu))
    dd = np.zeros((N, model.nd))
    (du if role == "mv" else dd)[:, j] = prof
    du_full = np.vstack([du, du[-1:]])
    dd_full = np.vstack([dd, dd[-1:]])
    _, Ylin = dlin.simulate(du_full, dd_full)
    Ylin = Ylin + op.y

    lin_dict: dict[str, float] = {}
    for i, c in enumerate(model.cv_names):
        ref = float(np.max(np.abs(Ylin[:, i] - op.y[i])))
        dev = float(np.max(np.abs(Y[:, i] - Ylin[:, i])))
        scale = max(1.0, float(np.max(np.abs(Y[:, i]))))
        if ref <= 1e-12 * scale:
            lin_dict[c] = 0.0 if dev <= 1e-9 * scale else math.inf
        else:
            lin_dict[c] = dev / ref
    units = tuple(model.variable(c).unit for c in model.cv_names)
    return ResponseTest(
        model=model.name, kind=kind, input_name=mv, input_role=role, size=float(size), Ts=float(Ts),
        duration=float(N * Ts), t=np.arange(N + 1) * Ts, u=np.append(vals, vals[-1]), y_nonlinear=Y, y_linear=Ylin, x_nonlinear=X, linearity=lin_dict,
        cv_names=tuple(model.cv_names), cv_units=units, op=op, time_unit=model.time_unit,
        input_unit=model.variable(mv).unit, input_base=float(base), notes=notes)


def linearity_sweep(model, op: OperatingPoint, mv: str, sizes: Sequence[float], *, kind: str = "step",
                    duration: float | None = None, Ts: float | None = None) -> list[dict[str, Any]]:
    """Run :func:`open_loop_test` for several sizes (give negative ones for the other direction).

    Returns
    -------
    list of dict
        One per size: ``size`` and ``linearity`` (CV -> largest relative deviation).  The deviation
        normally grows with the size; an asymmetry between +size and -size shows a curved gain.
    """
    out = []
    for s in sizes:
        r = open_loop_test(model, op, mv, kind=kind, size=s, duration=duration, Ts=Ts)
        out.append({"size": float(s), "linearity": dict(r.linearity)})
    return out


def plot_response_test(result: ResponseTest, path: str | Path, *, title: str | None = None) -> Path:
    """Draw a :class:`ResponseTest` to a PNG: one panel per CV (nonlinear solid, linear dashed) and
    the input at the bottom.  Returns the path written."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    if path.suffix.lower() != ".png":
        raise fail("plot_response_test()", "path", "a file name ending in .png", f"'{path}'")
    ny = len(result.cv_names)
    fig = Figure(figsize=(8.0, 2.0 * (ny + 1) + 0.6), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(ny + 1, 1, sharex=True)
    tu = result.time_unit
    # a short stretch before t = 0 at the operating point, so the move itself is visible
    pre = 0.05 * result.duration
    t = np.concatenate([[-pre], result.t])
    for i, (c, un) in enumerate(zip(result.cv_names, result.cv_units)):
        ax = axes[i]
        y0 = result.op.y[i]
        ax.plot(t, np.concatenate([[y0], result.y_nonlinear[:, i]]), color="#1f4e79", lw=1.8,
                label="nonlinear model")
        ax.plot(t, np.concatenate([[y0], result.y_linear[:, i]]), color="#c55a11", lw=1.4, ls="--",
                label="linear model")
        dev = result.linearity[c]
        dtxt = "inf" if not math.isfinite(dev) else f"{100 * dev:.1f} %"
        ax.set_title(f"{c}: largest nonlinear-linear deviation {dtxt} of the linear change",
                     fontsize=9, loc="left")
        ax.set_ylabel(f"{c}\n[{un}]" if un else c)
        ax.grid(True, alpha=0.3)
        ax.ticklabel_format(axis="y", useOffset=False)
        if i == 0:
            ax.legend(loc="best", fontsize=8)
    ax = axes[-1]
    ax.step(t, np.concatenate([[result.input_base], result.u]), where="post", color="#375623", lw=1.6)
    ax.set_title(f"{result.input_name} ({result.input_role.upper()})", fontsize=9, loc="left")
    ax.set_ylabel(f"{result.input_name}\n[{result.input_unit}]" if result.input_unit else result.input_name)
    ax.set_xlabel(f"time [{tu}]" if tu else "time")
    ax.grid(True, alpha=0.3)
    ax.ticklabel_format(axis="y", useOffset=False)
    what = {"step": "step", "pulse": "pulse", "impulse": "impulse (area)"}[result.kind]
    fig.suptitle(title or f"{result.model}: {what} of {result.size:g} {result.input_unit} on "
                 f"{result.input_name} -- nonlinear vs linear")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    return path
