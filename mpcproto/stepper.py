"""The plant advanced one sample at a time: a CasADi integrator built once, or the exact map.

MVs and DVs are held constant over each sample (zero-order hold).  Every dead time declared with
:meth:`mpcproto.Model.delayed` keeps its true length whatever the sample time: the input history is
a piecewise-constant signal, so a delayed input ``u(t - theta)`` with ``theta = (n + f) Ts``
(:func:`mpcproto.linear.delay_split`) equals the input of sample ``k-n-1`` over the first fraction
``f`` of sample ``k`` and that of sample ``k-n`` over the rest.  A sample in which some dead time
ends is integrated in pieces, split at those instants; the controller's discrete model uses the
same split (:meth:`mpcproto.LinearModel.discretize`, ``dead_time="exact"``).

Integrators
-----------
The plugin is the model's ``integrator`` attribute unless overridden.  ``"cvodes"`` (the default:
adaptive-order, adaptive-step BDF from SUNDIALS) is the safe choice for stiff units such as an
exothermic reactor; ``"idas"`` is the same family; the fixed-step ``"rk"`` and ``"collocation"``
plugins are faster per call but need an accuracy check (``benchmarks/bench_sim.py`` measures it).
One CasADi integrator over the unit interval, with the piece's duration as an input, serves every
piece of every sample; the pieces of one sample are chained in one compiled Function, built once for
a (model, Ts, plugin, options) and kept in a small module-level cache, so the runs of a comparison
or a study reuse it.

``"exact"`` (the default of transfer-matrix models) steps a model that is linear in its states and
inputs (:attr:`Model.is_linear_`) by its exact discrete map: matrix-exponential zero-order hold with
the split-sample input matrices of the fractional dead times, computed once per plant.  No ODE
solver runs; the result is exact to rounding.
"""

from __future__ import annotations

import math
from typing import Any

import casadi as ca
import numpy as np

from .exceptions import SimulationError
from .validation import fail, shown
from .layout import ParameterLayout, in_order
from .linear import delay_split, split_sample_inputs, zoh

__all__ = ["Plant", "DEFAULT_TOLERANCES", "OPEN_LOOP_TOLERANCES"]

#: tolerances of the adaptive plugins (cvodes, idas) in the closed loop
DEFAULT_TOLERANCES = {"abstol": 1e-9, "reltol": 1e-8}
#: tighter tolerances for open-loop and PID step tests, whose records are fitted and compared with
#: the linear model (``Plant(..., tolerances=OPEN_LOOP_TOLERANCES)``)
OPEN_LOOP_TOLERANCES = {"abstol": 1e-11, "reltol": 1e-10}
# compiled steps by (model name, Ts, plugin, options, switching fractions), valid while the model's
# compiled Functions are the same objects (parameters are inputs, so a mismatched plant shares them)
_CACHE: dict[tuple, tuple] = {}
_CACHE_SIZE = 32
_ADAPTIVE = ("cvodes", "idas")


class Plant:
    """A built model stepped over one sample time by a CasADi integrator or its exact map.

    Parameters
    ----------
    model : Model
        A built model; its current parameter values are the plant's (use
        ``model.with_parameters(...)`` for a plant that differs from the controller's model).
    Ts : float
        Sample time (model time unit); the step is compiled once for it.
    integrator : str, optional
        CasADi plugin, or ``"exact"`` for a linear model; default ``model.integrator``.
    options : dict, optional
        Plugin options (for cvodes/idas the defaults are *tolerances*).
    tolerances : dict, optional
        ``abstol``/``reltol`` of the adaptive plugins (cvodes, idas; ignored by the others);
        default :data:`DEFAULT_TOLERANCES`, :data:`OPEN_LOOP_TOLERANCES` for step tests.

    Attributes
    ----------
    delay_split_ : list of (int, float)
        Per delay (``model.delays`` order) its whole samples ``n`` and fraction ``f`` of a sample.
    switches_ : tuple of float
        The distinct fractions ``0 < f < 1`` at which a delayed input switches within a sample
        (the pieces each sample is integrated in).
    step_ : casadi.Function or None
        ``(x0, b) -> xf`` over one sample, ``b = [u; d; z_before; z_after; parameters]`` (the
        delayed inputs before and after their switch); None for ``"exact"``.
    step_out_ : casadi.Function or None
        ``[x0; b; q] -> [xf; y]``: the same step plus the CVs at its end with inputs
        ``q = [u; d; z; parameters]``, packed into one vector each way (used by :meth:`advance`, so
        a closed-loop sample costs one CasADi call with one conversion in and one out).
    """

    def __init__(self, model: Any, Ts: float, *, integrator: str | None = None,
                 options: dict[str, Any] | None = None, tolerances: dict[str, float] | None = None):
        if not getattr(model, "is_built", False):
            from .exceptions import NotBuiltError

            raise NotBuiltError(f"Plant: model '{model.name}' is not built; call model.build() first.")
        if not (isinstance(Ts, (int, float)) and math.isfinite(Ts) and Ts > 0):
            raise fail("Plant", "Ts", "a finite sample time > 0", shown(Ts))
        self.model = model
        self.Ts = float(Ts)
        self.plugin = integrator or getattr(model, "integrator", "cvodes") or "cvodes"
        opts = dict(tolerances or DEFAULT_TOLERANCES) if self.plugin in _ADAPTIVE else {}
        opts.update(options or {})
        self.options = opts if self.plugin != "exact" else {}
        self.delay_split_ = [delay_split(dl.dead_time, self.Ts) for dl in model.delays]
        self.switches_ = tuple(sorted({f for _, f in self.delay_split_ if f > 0}))
        nx, nu, nd = model.nx, model.nu, model.nd
        # delayed inputs read from a ring buffer of past [u; d] rows (filled with the steady past)
        self._col = np.array([(0 if dl.source_role == "mv" else nu)
                              + model.names(dl.source_role).index(dl.source) for dl in model.delays],
                             dtype=int)
        n = np.array([s[0] for s in self.delay_split_], dtype=int)
        frac = np.array([s[1] > 0 for s in self.delay_split_], dtype=bool)
        lag_before = n + frac                       # = n where there is no switch
        L = int(lag_before.max(initial=0)) + 2
        self._ring = np.zeros((L, nu + nd))
        self._flat = self._ring.reshape(-1)         # a view: rows written in _ring are seen here
        # flat positions of [z_before; z_after] in the ring for each k mod L: one take() per read
        rows = np.arange(L)[:, None]
        self._tab = np.hstack([((rows - lag_before) % L) * (nu + nd) + self._col,
                               ((rows - n) % L) * (nu + nd) + self._col])
        self._nz = len(self._col)
        self._p = model.p
        npar = len(self._p)
        #: ``b = [u; d; z_before; z_after; parameters]``, the input of :attr:`step_`
        self.b_layout_ = ParameterLayout(
            [("u", nu), ("d", nd), ("z_before", self._nz), ("z_after", self._nz), ("p", npar)],
            owner=f"Plant '{model.name}' step input")
        #: ``w = [x0; b; q]``, the input of :attr:`step_out_`: ``q`` (blocks ``next_u``...) are
        #: the inputs ``[u; d; z; parameters]`` at the start of the next sample
        self.w_layout_ = ParameterLayout([("x0", nx)], owner=f"Plant '{model.name}' step-and-output "
                                         f"input") + self.b_layout_ + model.p_layout_.prefixed("next_")
        self._out = in_order(model.out_, ("x", "u", "d", "z", "p"), ("y",))
        self.step_ = self.step_out_ = self.integrator_ = None
        if self.plugin == "exact":
            self._exact_maps(model)
        else:
            key = (model.name, self.Ts, self.plugin, repr(sorted(opts.items())),
                   tuple(f for _, f in self.delay_split_))
            hit = _CACHE.get(key)
            if hit is not None and hit[0] is model.ode_ and hit[1] is model.out_:
                self.integrator_, self.step_, self.step_out_ = hit[2:]
            else:
                self.integrator_, self.step_, self.step_out_ = self._build(model, opts)
                if len(_CACHE) >= _CACHE_SIZE:
                    _CACHE.pop(next(iter(_CACHE)))
                _CACHE[key] = (model.ode_, model.out_, self.integrator_, self.step_, self.step_out_)
        self.x = np.zeros(nx)
        self._u0 = np.zeros(nu)
        self._d0 = np.zeros(nd)
        self.k = 0
        self.y_next: np.ndarray | None = None
        self._nx = nx

    def _build(self, model: Any, opts: dict[str, Any]) -> tuple[Any, Any, Any]:
        nx, nz = model.nx, model.nz
        # a model of pure dead times has no state to integrate: only its outputs are evaluated
        F = model.sampled_integrator(self.Ts, plugin=self.plugin, options=opts, label="plant",
                                     scaled=True) if nx else None
        # the integrator's p = [h; u; d; z; parameters] (h: the piece's length)
        hp = ParameterLayout([("h", 1)]) + model.p_layout_
        fr = [f for _, f in self.delay_split_]
        bounds = (0.0, *self.switches_, 1.0)

        def sample(x0: Any, bb: dict[str, Any]) -> Any:
            """Chain the pieces of one sample; in each, a delayed input is before or after its switch."""
            zb, za = bb["z_before"], bb["z_after"]
            x = x0
            for s0, s1 in zip(bounds[:-1], bounds[1:]) if nx else ():
                z = ca.vertcat(*[za[i] if fr[i] <= s0 else zb[i] for i in range(nz)])
                x = F(x0=x, p=hp.pack(h=(s1 - s0) * self.Ts, u=bb["u"], d=bb["d"], z=z,
                                      p=bb["p"]))["xf"]
            return x

        X0 = ca.MX.sym("x0", nx)
        Bv = ca.MX.sym("b", self.b_layout_.size)
        step = ca.Function(f"{model.name}_plant_step", [X0, Bv], [sample(X0, self.b_layout_.unpack(Bv))],
                           ["x0", "b"], ["xf"])
        # one call per sample: integrate and evaluate the CVs at the end of the sample, with the
        # inputs q = [u; d; z; parameters] that will act at the start of the next one
        # one packed input and one packed output: each Python<->CasADi conversion costs time
        W = ca.MX.sym("w", self.w_layout_.size)
        ww = self.w_layout_.unpack(W)
        xfw = sample(ww["x0"], ww)
        yf = model.out_(x=xfw, **{k: ww["next_" + k] for k in model.p_layout_.names})["y"]
        step_out = ca.Function(f"{model.name}_plant_step_out", [W], [ca.vertcat(xfw, yf)],
                               ["w"], ["xf_y"])
        return F, step, step_out

    def _exact_maps(self, model: Any) -> None:
        """Exact discrete map of a linear (affine) model over one sample, split at the switches."""
        if not getattr(model, "is_linear_", False):
            raise fail("Plant", "integrator",
                       "a model linear in its states and inputs for integrator 'exact' (it steps "
                       "the exact discrete map)", f"model '{model.name}', which is not linear",
                       "Use 'cvodes'.")
        nx, nu, nd, nz, ny = model.nx, model.nu, model.nd, model.nz, model.ny
        zero = dict(x=np.zeros(nx), u=np.zeros(nu), d=np.zeros(nd), z=np.zeros(nz), p=self._p)
        shapes = dict(A=(nx, nx), B=(nx, nu), Bd=(nx, nd), Bz=(nx, nz), C=(ny, nx), D=(ny, nu),
                      Dd=(ny, nd), Dz=(ny, nz))
        jac = model.jac_(**zero)
        A, B, Bd, Bz, C, D, Dd, Dz = [np.asarray(jac[k], float).reshape(s) for k, s in shapes.items()]
        c = np.asarray(model.ode_(**zero)["xdot"], float).reshape(nx, 1)     # affine terms
        y0 = np.asarray(model.out_(**zero)["y"], float).reshape(ny, 1)
        Phi, G = zoh(A, np.hstack([B, Bd, c]), self.Ts)
        after, before = split_sample_inputs(A, Bz, self.Ts, [f for _, f in self.delay_split_])
        # x+ = M [x; u; d; z_before; z_after; 1];  y = C x + H [u; d; z; 1]
        self._M = np.hstack([Phi, G[:, :nu + nd], before, after, G[:, nu + nd:]])
        self._C = C
        self._H = np.hstack([D, Dd, Dz, y0])

    # ------------------------------------------------------------------ run
    def reset(self, x0: np.ndarray, u0: np.ndarray, d0: np.ndarray) -> None:
        """Start at state *x0* with every delay filled with *u0*/*d0* (a steady past)."""
        m = self.model
        self.x = m.vector("state", x0, what="Plant.reset x0").copy()
        self._u0 = m.vector("mv", u0, what="Plant.reset u0").copy()
        self._d0 = m.vector("dv", d0, what="Plant.reset d0").copy()
        self._ring[:] = np.concatenate([self._u0, self._d0])
        self.k = 0
        self.y_next = None

    def _put(self, k: int, u: np.ndarray, d: np.ndarray) -> None:
        row = self._ring[k % len(self._ring)]
        nu = len(u)
        row[:nu] = u
        row[nu:] = d

    def _z_pair(self) -> np.ndarray:
        """``[z_before; z_after]``: delayed inputs over sample k before and after their switch
        (the row of sample k already put)."""
        return self._flat.take(self._tab[self.k % len(self._ring)])

    def z(self, u: np.ndarray, d: np.ndarray) -> np.ndarray:
        """Delayed inputs at the start of the current sample if *u*, *d* are applied now."""
        self._put(self.k, np.asarray(u, float), np.asarray(d, float))
        return self._z_pair()[:self._nz]

    def inputs(self, u: np.ndarray, d: np.ndarray) -> np.ndarray:
        """The packed input ``b = [u; d; z_before; z_after; parameters]`` of :attr:`step_` for the
        current sample with *u*, *d* applied (the plant's history is not advanced)."""
        u = np.asarray(u, float)
        d = np.asarray(d, float)
        self._put(self.k, u, d)
        zz = self._z_pair()
        return self.b_layout_.pack(u=u, d=d, z_before=zz[:self._nz], z_after=zz[self._nz:], p=self._p)

    def output(self, u: np.ndarray, d: np.ndarray) -> np.ndarray:
        """True CVs at the current state with inputs *u*, *d*."""
        return np.asarray(self._out(self.x, u, d, self.z(u, d), self._p), float).reshape(-1)

    def advance(self, u: np.ndarray, d: np.ndarray, d_next: np.ndarray | None = None) -> np.ndarray:
        """Integrate one sample with *u*, *d* held; returns the new state.

        The CVs at the end of the sample (MVs still at *u*, DVs at *d_next*, default *d*) are
        left in :attr:`y_next`.  Raises :class:`SimulationError` if the integrator fails or the
        state becomes non-finite (the plant is left at the start of the failed sample).
        """
        u = np.asarray(u, float)
        d = np.asarray(d, float)
        dn = d if d_next is None else np.asarray(d_next, float)
        self._put(self.k, u, d)
        zz = self._z_pair()                          # [z_before; z_after] over this sample
        self.k += 1
        self._put(self.k, u, dn)                    # the next sample's start, as far as known
        zq = self._z_pair()[:self._nz]
        if self.plugin == "exact":
            xf = self._M @ np.concatenate([self.x, u, d, zz, (1.0,)])
            y = self._C @ xf + self._H @ np.concatenate([u, dn, zq, (1.0,)])
        else:
            try:
                # packed by name and called by name: ~6 us of packing against ~2 us for a bare
                # concatenate, within the noise of a cvodes sample (CSTR: 400-470 us per advance()
                # before and after, measured alternately on the shared machine); the one input of
                # step_out_ makes the by-name call cost the same as the positional one
                nz, p = self._nz, self._p
                w = self.w_layout_.pack(x0=self.x, u=u, d=d, z_before=zz[:nz], z_after=zz[nz:], p=p,
                                        next_u=u, next_d=dn, next_z=zq, next_p=p)
                out = np.array(self.step_out_(w=w)["xf_y"].elements(), float)
                xf, y = out[:self._nx], out[self._nx:]
            except RuntimeError as exc:
                self.k -= 1
                # CasADi's own words (a foreign exception's text): its last line closes ours
                last = [ln for ln in str(exc).splitlines() if ln.strip()]
                raise SimulationError(
                    f"plant integrator {self.plugin!r} failed on the sample starting at step {self.k}: "
                    f"{last[-1] if last else exc}") from None
        if not math.isfinite(float(xf.sum())):
            self.k -= 1
            bad = [n for n, v in zip(self.model.state_names, xf) if not math.isfinite(v)]
            raise SimulationError(
                f"plant state became non-finite on the sample starting at step {self.k}: "
                f"{', '.join(bad)}")
        self.x = xf
        self.y_next = y
        return xf
