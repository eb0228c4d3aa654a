"""Process models written from balances, on CasADi.

A :class:`Model` declares named variables, each with a *role*:

``state``
    evolves by a differential equation the model gives (hold-up, concentration, temperature...).
``mv``
    manipulated variable: what a controller moves (a valve, a heater duty, a pump speed).
``dv``
    disturbance variable: arrives from outside; *measured* (feedforward is possible) or not.
``cv``
    controlled variable: a measured output, an expression of the states and inputs.
``parameter``
    a constant of the unit (volume, heat of reaction...).  Parameters stay symbolic in the compiled
    functions, so a plant with other parameter values (model mismatch) reuses the same compiled code.

Every variable carries a unit, a nominal value, physical bounds and a one-line description.  Dead
times enter through :meth:`Model.delayed`, which gives a symbol for the value an MV or DV had a given
time ago (used by transfer-function plants identified from step tests).

Declaring stores; :meth:`Model.build` validates the whole definition and compiles it once into
CasADi Functions (attributes with a trailing underscore: ``ode_``, ``out_``, ``jac_``).

Example
-------
>>> import mpcproto as mp
>>> m = mp.Model("tank", time_unit="s")
>>> area = m.parameter("area", 2.0, unit="m2", low=0.0, description="cross-section")
>>> h = m.state("level", nominal=1.0, unit="m", low=0.0, high=3.0, description="liquid level")
>>> qin = m.mv("inflow", nominal=0.1, unit="m3/s", low=0.0, high=0.5, description="feed valve")
>>> qout = m.dv("draw", nominal=0.1, unit="m3/s", low=0.0, high=0.5, description="draw-off")
>>> m.derivative(h, (qin - qout) / area)
>>> _ = m.cv("level_meas", h, unit="m", low=0.0, high=3.0, description="level transmitter")
>>> m.build().state_names
('level',)
"""

from __future__ import annotations

import copy
import difflib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import casadi as ca
import numpy as np

from .exceptions import ModelError, NotBuiltError
from .layout import ParameterLayout, in_order

__all__ = ["Variable", "Delay", "Model", "ROLES", "suggest"]

ROLES = ("state", "mv", "dv", "cv", "parameter")
TIME_UNITS = {"s": 1.0, "min": 60.0, "h": 3600.0}


def suggest(name: str, choices: Sequence[str]) -> str:
    """Return a ``" (did you mean 'x'?)"`` hint for a misspelt *name*, or an empty string."""
    close = difflib.get_close_matches(str(name), list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


@dataclass(frozen=True)
class Variable:
    """One declared variable of a model: its name, role, unit, nominal value and physical bounds."""

    name: str
    role: str
    unit: str = ""
    nominal: float = 0.0
    low: float = -math.inf
    high: float = math.inf
    description: str = ""
    measured: bool = True  # only meaningful for DVs

    def as_dict(self) -> dict[str, Any]:
        """Plain-data view (JSON-able; infinite bounds become ``None``)."""
        def fin(v: float) -> float | None:
            return None if not math.isfinite(v) else float(v)

        out = {
            "name": self.name,
            "role": self.role,
            "unit": self.unit,
            "nominal": float(self.nominal),
            "low": fin(self.low),
            "high": fin(self.high),
            "description": self.description,
        }
        if self.role == "dv":
            out["measured"] = self.measured
        return out


@dataclass(frozen=True)
class Delay:
    """A delayed copy of an MV or DV: the value ``source`` had ``dead_time`` time units ago."""

    name: str
    source: str
    source_role: str
    dead_time: float


@dataclass
class _Declared:
    var: Variable
    sym: Any


class Model:
    """A nonlinear process model: named variables with roles plus CasADi balance equations.

    Parameters
    ----------
    name : str
        Short identifier of the model (used in messages and reports).
    time_unit : {"s", "min", "h"}
        Unit of time of every rate in the model; sample times and dead times use the same unit.
    description : str
        One line saying what the unit is.
    integrator : str
        CasADi integrator plugin the simulator should use for this model (``"cvodes"`` by default:
        adaptive BDF, safe for stiff units such as an exothermic reactor), or ``"exact"`` for a
        model linear in its states and inputs (stepped by its exact discrete map, see
        :class:`mpcproto.sim.Plant`).
    """

    def __init__(self, name: str, *, time_unit: str = "s", description: str = "",
                 integrator: str = "cvodes"):
        self.name = str(name)
        self.time_unit = time_unit
        self.description = description
        self.integrator = integrator
        self._vars: dict[str, _Declared] = {}
        self._delays: list[tuple[Delay, Any]] = []
        self._rhs: dict[str, Any] = {}
        self._cv_expr: dict[str, Any] = {}
        self._built = False

    # ------------------------------------------------------------------ declaration
    def _declare(self, name: str, role: str, sym_needed: bool = True, **kw) -> Any:
        if not isinstance(name, str) or not name.isidentifier():
            raise ModelError(
                f"Model '{self.name}': a variable name must be a Python-style identifier "
                f"(letters, digits, underscores); got {name!r}.")
        if name in self._vars or any(d.name == name for d, _ in self._delays):
            raise ModelError(
                f"Model '{self.name}': the name '{name}' is declared twice "
                f"(first as {self._vars[name].var.role if name in self._vars else 'delay'}, "
                f"now as {role}); every variable needs its own name.")
        var = Variable(name=name, role=role, **kw)
        sym = ca.SX.sym(name) if sym_needed else None
        self._vars[name] = _Declared(var, sym)
        self._built = False
        return sym

    def parameter(self, name: str, value: float, *, unit: str = "", description: str = "",
                  low: float = -math.inf, high: float = math.inf) -> Any:
        """Declare a constant; returns its CasADi symbol."""
        return self._declare(name, "parameter", unit=unit, nominal=value, low=low, high=high,
                             description=description)

    def state(self, name: str, *, nominal: float, unit: str = "", low: float = -math.inf,
              high: float = math.inf, description: str = "") -> Any:
        """Declare a state; give its derivative later with :meth:`derivative`."""
        return self._declare(name, "state", unit=unit, nominal=nominal, low=low, high=high,
                             description=description)

    def mv(self, name: str, *, nominal: float, unit: str = "", low: float = -math.inf,
           high: float = math.inf, description: str = "") -> Any:
        """Declare a manipulated variable; ``low``/``high`` are its physical range."""
        return self._declare(name, "mv", unit=unit, nominal=nominal, low=low, high=high,
                             description=description)

    def dv(self, name: str, *, nominal: float, unit: str = "", low: float = -math.inf,
           high: float = math.inf, description: str = "", measured: bool = True) -> Any:
        """Declare a disturbance variable, measured (feedforward possible) or not."""
        return self._declare(name, "dv", unit=unit, nominal=nominal, low=low, high=high,
                             description=description, measured=bool(measured))

    def cv(self, name: str, expr: Any, *, unit: str = "", low: float = -math.inf,
           high: float = math.inf, description: str = "") -> Any:
        """Declare a controlled (measured) variable given by an expression; returns the expression."""
        self._declare(name, "cv", sym_needed=False, unit=unit, nominal=math.nan, low=low,
                      high=high, description=description)
        self._cv_expr[name] = expr
        return expr

    def derivative(self, state: Any, expr: Any) -> None:
        """Give d(state)/dt.  *state* is the symbol returned by :meth:`state` or its name."""
        name = self._name_of(state, "derivative")
        decl = self._vars.get(name)
        if decl is None or decl.var.role != "state":
            found = "an unknown name" if decl is None else f"a {decl.var.role}"
            raise ModelError(
                f"Model '{self.name}': derivative() expects a declared state; '{name}' is {found}"
                f"{suggest(name, self.names('state'))}.")
        if name in self._rhs:
            raise ModelError(f"Model '{self.name}': the derivative of state '{name}' is given twice.")
        self._rhs[name] = expr
        self._built = False

    def delayed(self, source: Any, dead_time: float) -> Any:
        """Symbol for the value MV/DV *source* had *dead_time* ago (a pure transport delay)."""
        name = self._name_of(source, "delayed")
        decl = self._vars.get(name)
        if decl is None or decl.var.role not in ("mv", "dv"):
            found = "an unknown name" if decl is None else f"a {decl.var.role}"
            raise ModelError(
                f"Model '{self.name}': delayed() expects an MV or DV; '{name}' is {found}"
                f"{suggest(name, self.names('mv') + self.names('dv'))}.")
        try:
            dt = float(dead_time)
        except (TypeError, ValueError):
            dt = math.nan
        if not (math.isfinite(dt) and dt >= 0):
            raise ModelError(
                f"Model '{self.name}': the dead time on '{name}' must be a finite number >= 0; "
                f"got {dead_time!r}.")
        if dt == 0:
            return decl.sym
        for d, sym in self._delays:
            if d.source == name and d.dead_time == dt:
                return sym
        dname = f"{name}__delay{len(self._delays)}"
        sym = ca.SX.sym(dname)
        self._delays.append((Delay(dname, name, decl.var.role, dt), sym))
        self._built = False
        return sym

    def _name_of(self, obj: Any, where: str) -> str:
        if isinstance(obj, str):
            return obj
        if isinstance(obj, (ca.SX, ca.MX)) and obj.is_symbolic() and obj.numel() == 1:
            return obj.name()
        raise ModelError(
            f"Model '{self.name}': {where}() expects a declared symbol or its name; got {obj!r}.")

    # ------------------------------------------------------------------ lookup
    def names(self, role: str) -> tuple[str, ...]:
        """Names of the variables of one role, in declaration order."""
        if role not in ROLES:
            raise ModelError(f"Model '{self.name}': unknown role {role!r}; expected one of {ROLES}.")
        return tuple(n for n, d in self._vars.items() if d.var.role == role)

    def variable(self, name: str) -> Variable:
        """The :class:`Variable` called *name* (any role)."""
        try:
            return self._vars[name].var
        except KeyError:
            raise ModelError(
                f"Model '{self.name}' has no variable '{name}'{suggest(name, list(self._vars))}. "
                f"Known: {', '.join(self._vars)}.") from None

    def variables(self, role: str | None = None) -> list[Variable]:
        """All variables, or those of one role, in declaration order."""
        return [d.var for d in self._vars.values() if role is None or d.var.role == role]

    state_names = property(lambda self: self.names("state"))
    mv_names = property(lambda self: self.names("mv"))
    dv_names = property(lambda self: self.names("dv"))
    cv_names = property(lambda self: self.names("cv"))
    parameter_names = property(lambda self: self.names("parameter"))
    delays = property(lambda self: tuple(d for d, _ in self._delays))
    nx = property(lambda self: len(self.state_names))
    nu = property(lambda self: len(self.mv_names))
    nd = property(lambda self: len(self.dv_names))
    ny = property(lambda self: len(self.cv_names))
    nz = property(lambda self: len(self._delays))

    @property
    def measured_dv_names(self) -> tuple[str, ...]:
        return tuple(v.name for v in self.variables("dv") if v.measured)

    def nominal(self, role: str) -> np.ndarray:
        """Vector of nominal values of one role (parameters: their current values)."""
        if role == "cv":
            self._require_built("nominal('cv')")
            return self.output(self.nominal("state"), self.nominal("mv"), self.nominal("dv"))
        return np.array([v.nominal for v in self.variables(role)], dtype=float)

    def bounds(self, role: str) -> tuple[np.ndarray, np.ndarray]:
        """(low, high) vectors of the physical bounds of one role."""
        vs = self.variables(role)
        return (np.array([v.low for v in vs], dtype=float), np.array([v.high for v in vs], dtype=float))

    def vector(self, role: str, values: Mapping[str, float] | Sequence[float] | np.ndarray | None,
               *, what: str = "values") -> np.ndarray:
        """Turn a name->value mapping (missing names take their nominal) or a sequence into a vector.

        Unknown names and wrong lengths raise :class:`ModelError` naming *what*.
        """
        names = self.names(role)
        base = self.nominal(role) if role != "cv" else np.full(len(names), np.nan)
        if values is None:
            return base
        if isinstance(values, Mapping):
            out = base.copy()
            for k, v in values.items():
                if k not in names:
                    raise ModelError(
                        f"{what}: '{k}' is not a {role} of model '{self.name}'"
                        f"{suggest(k, names)}; its {role}s are: {', '.join(names) or '(none)'}.")
                out[names.index(k)] = float(v)
            return out
        arr = np.asarray(values, dtype=float).reshape(-1)
        if arr.shape != (len(names),):
            raise ModelError(
                f"{what}: expected {len(names)} {role} values for model '{self.name}' "
                f"({', '.join(names)}); got shape {np.shape(values)}.")
        return arr

    # ------------------------------------------------------------------ build
    def build(self) -> "Model":
        """Validate the definition and compile it once into CasADi Functions; returns ``self``."""
        errs: list[str] = []
        bad_parameter = None        # the first parameter out of its bounds: the error's key
        states = self.names("state")
        if not states and not self._delays:  # pure dead times (y = K u(t - theta)) need no state
            errs.append("it declares no state")
        if not self.names("cv"):
            errs.append("it declares no CV (controlled/measured output)")
        for s in states:
            if s not in self._rhs:
                errs.append(f"state '{s}' has no derivative (call derivative('{s}', expr))")
        for v in self.variables():
            if v.role == "cv":
                bad_bounds = not (v.low < v.high) or math.isnan(v.low) or math.isnan(v.high)
            else:
                bad_bounds = not (v.low <= v.high) or math.isnan(v.low) or math.isnan(v.high)
                if not math.isfinite(v.nominal):
                    errs.append(f"{v.role} '{v.name}' has a non-finite nominal value {v.nominal!r}")
                elif not (v.low <= v.nominal <= v.high):
                    if v.role == "parameter" and bad_parameter is None:
                        bad_parameter = v.name
                    errs.append(
                        f"{v.role} '{v.name}' has nominal value {v.nominal:g} {v.unit} outside its "
                        f"physical bounds [{v.low:g}, {v.high:g}]")
            if bad_bounds:
                errs.append(f"{v.role} '{v.name}' has low bound {v.low!r} not below high bound {v.high!r}")
        if self.time_unit not in TIME_UNITS:
            errs.append(f"time_unit must be one of {sorted(TIME_UNITS)}, got {self.time_unit!r}")

        known = {d.sym.name() for d in self._vars.values() if d.sym is not None}
        known |= {sym.name() for _, sym in self._delays}
        exprs = {f"derivative of '{k}'": e for k, e in self._rhs.items()}
        exprs.update({f"CV '{k}'": e for k, e in self._cv_expr.items()})
        for where, e in exprs.items():
            try:
                e = ca.SX(e)
            except Exception:  # noqa: BLE001 - any non-expression
                errs.append(f"the {where} is not a CasADi expression or number (got {type(e).__name__})")
                continue
            if e.shape != (1, 1):
                errs.append(f"the {where} must be a scalar expression; got shape {e.shape}")
                continue
            for s in ca.symvar(e):
                if s.name() not in known:
                    errs.append(f"the {where} depends on the undeclared symbol '{s.name()}'"
                                f"{suggest(s.name(), sorted(known))}")
        if errs:
            raise ModelError(f"Model '{self.name}' is not valid: " + "; ".join(errs) + ".",
                             key=f"parameters.{bad_parameter}" if bad_parameter else None)

        x = self._stack("state")
        u = self._stack("mv")
        d = self._stack("dv")
        p = self._stack("parameter")
        z = ca.vertcat(*[s for _, s in self._delays]) if self._delays else ca.SX(0, 1)
        xdot = ca.vertcat(*[ca.SX(self._rhs[s]) for s in states])
        y = ca.vertcat(*[ca.SX(self._cv_expr[c]) for c in self.names("cv")])
        ins, in_names = [x, u, d, z, p], ["x", "u", "d", "z", "p"]
        self.ode_ = ca.Function(f"{self.name}_ode", ins, [xdot], in_names, ["xdot"])
        self.out_ = ca.Function(f"{self.name}_out", ins, [y], in_names, ["y"])
        # rhs()/output() run inside Newton iterations and the plant's per-sample CVs: called by
        # position (Python -> CasADi by name costs ~15-25 us more per call, 10-20 % of the call,
        # measured on the CSTR's out_), the order checked here once
        self._ode_pos = in_order(self.ode_, in_names, ["xdot"])
        self._out_pos = in_order(self.out_, in_names, ["y"])
        #: blocks of the packed input vector ``[u; d; z; parameters]`` of the sampled integrator
        self.p_layout_ = ParameterLayout(
            [("u", self.nu), ("d", self.nd), ("z", self.nz), ("p", len(self.names("parameter")))],
            owner=f"model '{self.name}' packed inputs")
        jac = [ca.jacobian(xdot, v) for v in (x, u, d, z)] + [ca.jacobian(y, v) for v in (x, u, d, z)]
        self.jac_ = ca.Function(
            f"{self.name}_jac", ins, jac, in_names,
            ["A", "B", "Bd", "Bz", "C", "D", "Dd", "Dz"])
        # where each delayed input takes its value from, for steady states (z = source value)
        self._z_src = [(d.source_role, self.names(d.source_role).index(d.source)) for d, _ in self._delays]
        # linear (affine) in states and inputs whatever the parameters: the plant may then be
        # stepped by its exact discrete map (integrator "exact")
        self.is_linear_ = bool(ca.is_linear(ca.vertcat(xdot, y), ca.vertcat(x, u, d, z)))
        self._p_values = self.nominal("parameter")
        self._built = True
        return self

    def _stack(self, role: str) -> Any:
        syms = [self._vars[n].sym for n in self.names(role)]
        return ca.vertcat(*syms) if syms else ca.SX(0, 1)

    @property
    def is_built(self) -> bool:
        return self._built

    def _require_built(self, what: str) -> None:
        if not self._built:
            raise NotBuiltError(
                f"Model '{self.name}' must be built before {what}; call model.build() first.")

    # ------------------------------------------------------------------ parameters
    @property
    def parameters(self) -> dict[str, float]:
        """Current parameter values by name."""
        self._require_built("reading parameters")
        return dict(zip(self.names("parameter"), map(float, self._p_values)))

    @property
    def p(self) -> np.ndarray:
        """Current parameter vector (declaration order)."""
        self._require_built("reading parameters")
        return self._p_values.copy()

    def with_parameters(self, overrides: Mapping[str, float] | None = None, **kw: float) -> "Model":
        """A copy with some parameter values changed; the compiled Functions are shared.

        Used for model mismatch: the plant and the controller's model differ only in parameters.
        Each new value is checked against the parameter's physical bounds.
        """
        self._require_built("with_parameters()")
        vals = dict(overrides or {})
        vals.update(kw)
        names = self.names("parameter")
        new = copy.copy(self)
        p = self._p_values.copy()
        for k, v in vals.items():
            if k not in names:
                raise ModelError(
                    f"Model '{self.name}' has no parameter '{k}'{suggest(k, names)}; "
                    f"its parameters are: {', '.join(names) or '(none)'}.", key=f"parameters.{k}")
            var = self._vars[k].var
            try:
                fv = float(v)
            except (TypeError, ValueError):
                fv = math.nan
            if not math.isfinite(fv) or not (var.low <= fv <= var.high):
                raise ModelError(
                    f"parameter '{k}' must be a finite number in "
                    f"[{var.low:g}, {var.high:g}] {var.unit}; got {v!r}.",
                    owner=f"Model '{self.name}'", key=f"parameters.{k}")
            p[names.index(k)] = fv
        new._p_values = p
        return new

    # ------------------------------------------------------------------ numeric evaluation
    def z_of(self, u: Any, d: Any) -> Any:
        """Delayed-input vector at steady state (each delayed copy equals its source); a CasADi
        column when *u* or *d* is a CasADi expression."""
        self._require_built("z_of()")
        if isinstance(u, (ca.SX, ca.MX)) or isinstance(d, (ca.SX, ca.MX)):
            src = {"mv": u, "dv": d}
            return ca.vertcat(*[src[r][i] for r, i in self._z_src]) if self._z_src else \
                type(u if isinstance(u, (ca.SX, ca.MX)) else d)(0, 1)
        u = np.asarray(u, float).reshape(-1)
        d = np.asarray(d, float).reshape(-1)
        return np.array([u[i] if r == "mv" else d[i] for r, i in self._z_src], dtype=float)

    def _args(self, x, u, d, z, p):
        self._require_built("evaluating it")
        x = np.asarray(x, float).reshape(-1)
        u = np.asarray(u, float).reshape(-1)
        d = np.asarray(d, float).reshape(-1) if d is not None else self.nominal("dv")
        z = self.z_of(u, d) if z is None else np.asarray(z, float).reshape(-1)
        p = self._p_values if p is None else np.asarray(p, float).reshape(-1)
        return x, u, d, z, p

    def rhs(self, x, u, d=None, z=None, p=None) -> np.ndarray:
        """dx/dt at the given point (``z`` defaults to the steady-state delayed values)."""
        return np.asarray(self._ode_pos(*self._args(x, u, d, z, p)), float).reshape(-1)

    def output(self, x, u, d=None, z=None, p=None) -> np.ndarray:
        """CV values at the given point."""
        return np.asarray(self._out_pos(*self._args(x, u, d, z, p)), float).reshape(-1)

    def pack_inputs(self, u: Any, d: Any, z: Any, p: Any = None) -> Any:
        """The packed vector ``[u; d; z; parameters]`` of :meth:`sampled_integrator` (``p``: the
        current parameter values by default); NumPy, or CasADi for symbolic parts."""
        self._require_built("pack_inputs()")
        return self.p_layout_.pack(u=u, d=d, z=z, p=self._p_values if p is None else p)

    def unpack_inputs(self, vector: Any) -> dict[str, Any]:
        """The blocks ``u``, ``d``, ``z``, ``p`` of a packed input vector (see :meth:`pack_inputs`)."""
        self._require_built("unpack_inputs()")
        return self.p_layout_.unpack(vector)

    def sampled_integrator(self, Ts: float, *, plugin: str | None = None,
                           options: Mapping[str, Any] | None = None, label: str = "step",
                           scaled: bool = False) -> Any:
        """CasADi integrator over one sample with the inputs held (zero-order hold).

        The Function maps ``x0`` and the packed vector ``p = [u; d; z; parameters]`` to ``xf``.
        With ``scaled=True`` it integrates over the unit interval with the duration as the first
        entry of ``p`` (``p = [h; u; d; z; parameters]``, ``dx/ds = h f``): one integrator for
        every interval length (the plant splits a sample where a dead time ends; *Ts* is then
        ignored).  *plugin* defaults to the model's own integrator (``model.integrator``;
        ``"exact"`` -- the exact discrete map of a linear model -- means cvodes here); *options*
        are the plugin's CasADi options.  An integrator that CasADi refuses raises
        :class:`~mpcproto.exceptions.SettingsError` naming the plugin and options.
        """
        from .exceptions import SettingsError

        self._require_built("sampled_integrator()")
        plugin = plugin or self.integrator or "cvodes"
        if plugin == "exact":
            plugin = "cvodes"
        x = ca.SX.sym("x", self.nx)
        pv = ca.SX.sym("p", self.p_layout_.size)
        rhs = self.ode_(x=x, **self.unpack_inputs(pv))["xdot"]
        if scaled:
            h = ca.SX.sym("h")
            pv, rhs, Ts = ca.vertcat(h, pv), h * rhs, 1.0
        try:
            return ca.integrator(f"{self.name}_{label}", plugin, {"x": x, "p": pv, "ode": rhs},
                                 0.0, float(Ts), dict(options or {}))
        except RuntimeError as exc:   # CasADi's own words (a foreign text): its last line
            raise SettingsError(owner=f"Model '{self.name}'", key="integrator",
                                expected="a CasADi integrator plugin and options it accepts",
                                found=f"{plugin!r} with options {dict(options or {})}, which "
                                      f"CasADi refuses: {str(exc).splitlines()[-1]}") from None

    def describe(self) -> dict[str, Any]:
        """Plain-data description: name, time unit, variables by role, delays."""
        return {
            "name": self.name,
            "description": self.description,
            "time_unit": self.time_unit,
            "integrator": self.integrator,
            "variables": [v.as_dict() for v in self.variables()],
            "delays": [{"source": d.source, "dead_time": d.dead_time} for d in self.delays],
        }

    def __repr__(self) -> str:
        return (f"Model({self.name!r}, states={list(self.names('state'))}, mvs={list(self.names('mv'))}, "
                f"dvs={list(self.names('dv'))}, cvs={list(self.names('cv'))}, built={self._built})")

    # CasADi symbols do not pickle; compiled Functions do.  Ship the compiled form only.
    def __getstate__(self) -> dict[str, Any]:
        self._require_built("pickling")
        st = self.__dict__.copy()
        st["_vars"] = {k: _Declared(v.var, None) for k, v in self._vars.items()}
        st["_delays"] = [(dl, None) for dl, _ in self._delays]
        st["_rhs"] = {}
        st["_cv_expr"] = {}
        return st
