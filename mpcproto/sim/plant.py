"""The nonlinear plant advanced one sample at a time by a CasADi integrator built once.

MVs and DVs are held constant over each sample (zero-order hold).  Every dead time declared with
:meth:`mpcproto.Model.delayed` becomes a buffer of whole samples, rounded exactly as
:func:`mpcproto.linear.delay_samples` rounds it for the controller's discrete model, so the plant
and the controller's model see the same delays.

The integrator for a (model, Ts, plugin, options) is built once and kept in a small module-level
cache, so the runs of a comparison or a study reuse it.

Integrators
-----------
The plugin is the model's ``integrator`` attribute unless overridden.  ``"cvodes"`` (the default:
adaptive-order, adaptive-step BDF from SUNDIALS) is the safe choice for stiff units such as an
exothermic reactor; ``"idas"`` is the same family; the fixed-step ``"rk"`` and ``"collocation"``
plugins are faster per call but need an accuracy check (``benchmarks/bench_sim.py`` measures it).
"""

from __future__ import annotations

import math
from typing import Any

import casadi as ca
import numpy as np

from ..exceptions import SettingsError, SimulationError
from ..linear import delay_samples

__all__ = ["Plant", "DEFAULT_TOLERANCES"]

DEFAULT_TOLERANCES = {"abstol": 1e-9, "reltol": 1e-8}
# compiled integrators by (model name, Ts, plugin, options), valid while the model's compiled
# Functions are the same objects (parameters are inputs, so a mismatched plant shares them)
_CACHE: dict[tuple, tuple] = {}
_CACHE_SIZE = 32
_ADAPTIVE = ("cvodes", "idas")


class Plant:
    """A built model stepped by a CasADi integrator over one sample time.

    Parameters
    ----------
    model : Model
        A built model; its current parameter values are the plant's (use
        ``model.with_parameters(...)`` for a plant that differs from the controller's model).
    Ts : float
        Sample time (model time unit); the integrator is built once for it.
    integrator : str, optional
        CasADi plugin; default ``model.integrator``.
    options : dict, optional
        Plugin options (for cvodes/idas the defaults are ``abstol=1e-9, reltol=1e-8``).

    Attributes
    ----------
    step_ : casadi.Function
        ``(x0, p) -> xf`` over one sample, ``p = [u; d; z; parameters]``.
    step_out_ : casadi.Function
        ``[x0; p; q] -> [xf; y]``: the same step plus the CVs at its end with inputs ``q``,
        packed into one vector each way (used by :meth:`advance`, so a closed-loop sample costs
        one CasADi call with one conversion in and one out).
    delay_steps_ : list of int
        Whole-sample length of each delay buffer (``model.delays`` order).
    """

    def __init__(self, model: Any, Ts: float, *, integrator: str | None = None,
                 options: dict[str, Any] | None = None):
        if not getattr(model, "is_built", False):
            from ..exceptions import NotBuiltError

            raise NotBuiltError(f"Plant: model '{model.name}' is not built; call model.build() first.")
        if not (isinstance(Ts, (int, float)) and math.isfinite(Ts) and Ts > 0):
            raise SettingsError(f"Plant: the sample time Ts must be a finite number > 0; got {Ts!r}.")
        self.model = model
        self.Ts = float(Ts)
        self.plugin = integrator or getattr(model, "integrator", "cvodes") or "cvodes"
        opts = dict(DEFAULT_TOLERANCES) if self.plugin in _ADAPTIVE else {}
        opts.update(options or {})
        self.options = opts
        nx, nu, nd = model.nx, model.nu, model.nd
        key = (model.name, self.Ts, self.plugin, repr(sorted(opts.items())))
        hit = _CACHE.get(key)
        if hit is not None and hit[0] is model.ode_ and hit[1] is model.out_:
            self.integrator_, self.step_, self.step_out_ = hit[2:]
        else:
            self.integrator_, self.step_, self.step_out_ = self._build(model, opts)
            if len(_CACHE) >= _CACHE_SIZE:
                _CACHE.pop(next(iter(_CACHE)))
            _CACHE[key] = (model.ode_, model.out_, self.integrator_, self.step_, self.step_out_)
        self.delay_steps_ = [delay_samples(dl.dead_time, self.Ts,
                                           what=f"plant simulation's dead time on '{dl.source}'")
                             for dl in model.delays]
        self._z_src = [(dl.source_role, model.names(dl.source_role).index(dl.source))
                       for dl in model.delays]
        self._p = model.p
        self.x = np.zeros(nx)
        self._hist_u: list[np.ndarray] = []
        self._hist_d: list[np.ndarray] = []
        self._u0 = np.zeros(nu)
        self._d0 = np.zeros(nd)
        self.k = 0
        self.y_next: np.ndarray | None = None
        self._nx = nx

    def _build(self, model: Any, opts: dict[str, Any]) -> tuple[Any, Any, Any]:
        nx, nu, nd, nz = model.nx, model.nu, model.nd, model.nz
        F = model.sampled_integrator(self.Ts, plugin=self.plugin, options=opts, label="plant")
        npv = nu + nd + nz + len(model.parameter_names)
        X0 = ca.MX.sym("x0", nx)
        P = ca.MX.sym("p", npv)
        xf = F(x0=X0, p=P)["xf"]
        step = ca.Function(f"{model.name}_plant_step", [X0, P], [xf], ["x0", "p"], ["xf"])
        # one call per sample: integrate and evaluate the CVs at the end of the sample, with the
        # inputs q = [u; d; z; parameters] that will act at the start of the next one
        # one packed input and one packed output: each Python<->CasADi conversion costs time
        W = ca.MX.sym("w", nx + 2 * npv)
        X0w, Pw, Q = W[:nx], W[nx:nx + npv], W[nx + npv:]
        xfw = F(x0=X0w, p=Pw)["xf"]
        yf = model.out_(xfw, Q[:nu], Q[nu:nu + nd], Q[nu + nd:nu + nd + nz], Q[nu + nd + nz:])
        step_out = ca.Function(f"{model.name}_plant_step_out", [W], [ca.vertcat(xfw, yf)],
                               ["w"], ["xf_y"])
        return F, step, step_out

    # ------------------------------------------------------------------ run
    def reset(self, x0: np.ndarray, u0: np.ndarray, d0: np.ndarray) -> None:
        """Start at state *x0* with every delay buffer filled with *u0*/*d0* (a steady past)."""
        m = self.model
        self.x = m.vector("state", x0, what="Plant.reset x0").copy()
        self._u0 = m.vector("mv", u0, what="Plant.reset u0").copy()
        self._d0 = m.vector("dv", d0, what="Plant.reset d0").copy()
        self._hist_u, self._hist_d = [], []
        self.k = 0
        self.y_next = None

    def z(self, u: np.ndarray, d: np.ndarray) -> np.ndarray:
        """Delayed inputs acting over the current sample if *u*, *d* are applied now."""
        out = np.empty(len(self._z_src))
        for i, ((role, j), n) in enumerate(zip(self._z_src, self.delay_steps_)):
            if n == 0:
                out[i] = u[j] if role == "mv" else d[j]
                continue
            idx = self.k - n
            hist, first = (self._hist_u, self._u0) if role == "mv" else (self._hist_d, self._d0)
            out[i] = hist[idx][j] if idx >= 0 else first[j]
        return out

    def output(self, u: np.ndarray, d: np.ndarray) -> np.ndarray:
        """True CVs at the current state with inputs *u*, *d*."""
        return np.asarray(self.model.out_(self.x, u, d, self.z(u, d), self._p), float).reshape(-1)

    def advance(self, u: np.ndarray, d: np.ndarray, d_next: np.ndarray | None = None) -> np.ndarray:
        """Integrate one sample with *u*, *d* held; returns the new state.

        The CVs at the end of the sample (MVs still at *u*, DVs at *d_next*, default *d*) are
        left in :attr:`y_next`.  Raises :class:`SimulationError` if the integrator fails or the
        state becomes non-finite (the plant is left at the start of the failed sample).
        """
        u = np.array(u, float)
        d = np.array(d, float)
        dn = d if d_next is None else np.asarray(d_next, float)
        if self._z_src:
            pv = np.concatenate([u, d, self.z(u, d), self._p])
        else:
            pv = np.concatenate([u, d, self._p])
        self._hist_u.append(u)       # the caller hands fresh arrays: kept, not copied
        self._hist_d.append(d)
        self.k += 1
        q = np.concatenate([u, dn, self.z(u, dn), self._p]) if self._z_src else \
            np.concatenate([u, dn, self._p])
        try:
            out = np.array(self.step_out_(np.concatenate([self.x, pv, q])).elements(), float)
            xf, y = out[:self._nx], out[self._nx:]
        except RuntimeError as exc:
            self._undo()
            last = [ln for ln in str(exc).splitlines() if ln.strip()]
            raise SimulationError(
                f"plant integrator {self.plugin!r} failed on the sample starting at step {self.k}: "
                f"{last[-1] if last else exc}") from None
        if not math.isfinite(float(xf.sum())):
            self._undo()
            bad = [n for n, v in zip(self.model.state_names, xf) if not math.isfinite(v)]
            raise SimulationError(
                f"plant state became non-finite on the sample starting at step {self.k}: "
                f"{', '.join(bad)}")
        self.x = xf
        self.y_next = y
        return xf

    def _undo(self) -> None:
        self._hist_u.pop()
        self._hist_d.pop()
        self.k -= 1
