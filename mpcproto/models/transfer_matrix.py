r"""Linear transfer-function-matrix plants from first- or second-order-plus-dead-time elements.

Plant step tests give, for each MV (or DV) -> CV pair, a gain, one or two time constants, perhaps a
lead, and a dead time:

.. math:: g_{ij}(s) = \frac{K (\tau_a s + 1)}{(\tau_1 s + 1)(\tau_2 s + 1)} e^{-\theta s}
          \quad\text{(SOPDT)}, \qquad
          g_{ij}(s) = \frac{K (\tau_a s + 1)}{\tau_1 s + 1} e^{-\theta s}\quad\text{(FOPDT)}.

:func:`transfer_matrix_model` realizes every element by its own states (a series of first-order
lags, so each state has a plain meaning) fed by the input delayed with :meth:`Model.delayed`:

.. math::
    \dot\xi_1 = \frac{K\,(u(t-\theta) - u_0) - \xi_1}{\tau_1},\qquad
    \dot\xi_2 = \frac{\xi_1 - \xi_2}{\tau_2},\qquad
    y_{ij} = \xi_2 + \tau_a\dot\xi_2

(with one lag, :math:`y_{ij} = \xi_1 + \tau_a\dot\xi_1`; with no lag, a pure gain with dead time
:math:`y_{ij} = K (u(t-\theta) - u_0)`, which needs no state: a matrix of such elements is a model
without states).  Laplace-transforming :math:`\xi_1 = K U/(\tau_1 s + 1)`,
:math:`\xi_2 = \xi_1/(\tau_2 s + 1)`, :math:`y = (\tau_a s + 1)\xi_2` gives back :math:`g_{ij}`.
Each CV is its nominal value plus the sum of its elements' contributions:
:math:`y_i = y_{i,0} + \sum_j y_{ij}`, so the nominal MVs/DVs and states 0 form a steady state.

Elements are given as a :class:`TransferElement`, a dict with keys ``gain``, ``time_constants`` (or
``tau``: a number or a list of one or two numbers), ``lead`` and ``dead_time``, a tuple
``(gain, tau, dead_time)``, or ``None``/``0`` for "no effect".
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from .._specs import as_float, refuse_unknown_keys, shown
from ..exceptions import ModelError
from ..model import Model, suggest

__all__ = ["TransferElement", "transfer_matrix_model"]


@dataclass(frozen=True)
class TransferElement:
    """One transfer element ``K (lead s + 1) / prod(tau_k s + 1) * exp(-dead_time s)``.

    Parameters
    ----------
    gain : float
        Steady-state gain, CV units per input unit.
    time_constants : tuple of float
        Zero, one (FOPDT) or two (SOPDT) time constants > 0, in the model's time unit.
    lead : float
        Lead time constant (numerator); needs at least one time constant.
    dead_time : float
        Dead time >= 0, in the model's time unit.
    integrating : bool
        An integrating element ``K / s`` times the rest: *gain* is then the ramp rate (CV units
        per time unit per input unit).
    """

    gain: float
    time_constants: tuple[float, ...] = ()
    lead: float = 0.0
    dead_time: float = 0.0
    integrating: bool = False

    @classmethod
    def coerce(cls, spec: Any, where: str) -> "TransferElement | None":
        """Turn a user spec into an element (``None`` for no effect); errors name *where*."""
        if spec is None or (isinstance(spec, numbers.Real) and not isinstance(spec, bool) and spec == 0):
            return None
        if isinstance(spec, TransferElement):
            el = spec
        elif isinstance(spec, Mapping):
            refuse_unknown_keys(spec, ("gain", "time_constants", "tau", "lead", "dead_time",
                                       "integrating"),
                                what=where, error=ModelError)
            if "gain" not in spec:
                raise ModelError(f"an element needs a 'gain'; got {dict(spec)!r}.", owner=where)
            taus = _taus(spec.get("time_constants", spec.get("tau", ())), where)
            el = cls(gain=spec["gain"], time_constants=taus, lead=spec.get("lead", 0.0),
                     dead_time=spec.get("dead_time", 0.0),
                     integrating=spec.get("integrating", False))
        elif isinstance(spec, Sequence) and not isinstance(spec, str) and len(spec) == 3:
            el = cls(gain=spec[0], time_constants=_taus(spec[1], where), dead_time=spec[2])
        else:
            raise ModelError(
                f"expected a TransferElement, a dict (gain, time_constants, lead, dead_time), "
                f"a tuple (gain, tau, dead_time) or None; got {spec!r}.", owner=where)
        el._check(where)
        return el

    def _check(self, where: str) -> None:
        def num(v, what, low=-math.inf, strict=False):
            f = as_float(v)
            ok = f is not None and math.isfinite(f) and (f > low if strict else f >= low)
            if not ok:
                rel = ">" if strict else ">="
                rng = "" if low == -math.inf else f" {rel} {low:g}"
                raise ModelError(f"{what} must be a finite number{rng}; got {v!r}.", owner=where)

        num(self.gain, "the gain")
        if len(self.time_constants) > 2:
            raise ModelError(f"at most two time constants (SOPDT); got "
                             f"{len(self.time_constants)}: {self.time_constants!r}.", owner=where)
        for t in self.time_constants:
            num(t, "a time constant", 0.0, strict=True)
        num(self.lead, "the lead time constant")
        num(self.dead_time, "the dead time", 0.0)
        if not isinstance(self.integrating, bool):
            raise ModelError(f"'integrating' must be true or false; got {self.integrating!r}.",
                             owner=where)
        if self.lead != 0 and not self.time_constants:
            raise ModelError(f"a lead needs at least one time constant (the element would "
                             f"be improper); got lead={self.lead!r} and no time constant.",
                             owner=where)


def _taus(v: Any, where: str) -> tuple:
    """Time constants as a tuple: one number or a list of them."""
    if isinstance(v, numbers.Real) and not isinstance(v, bool):
        return (v,)
    if isinstance(v, Sequence) and not isinstance(v, (str, bytes)):
        return tuple(v)
    raise ModelError(f"the time constants must be a number or a list of one or two "
                     f"numbers; got {shown(v)}.", owner=where)


def _spec_list(items: Any, role: str, what: str) -> list[dict[str, Any]]:
    if items is None:
        return []
    if isinstance(items, Mapping):
        items = [dict({"name": k}, **(v or {})) for k, v in items.items()]
    out = []
    allowed = ("name", "unit", "nominal", "low", "high", "description") + (("measured",) if role == "dv" else ())
    for it in items:
        if isinstance(it, str):
            it = {"name": it}
        if not isinstance(it, Mapping) or "name" not in it:
            raise ModelError(f"each {role} must be a name or a dict with a 'name'; got {it!r}.",
                             owner=what)
        refuse_unknown_keys(it, allowed, what=what, context=f" in {role} '{it['name']}'",
                            error=ModelError)
        out.append(dict(it))
    return out


def _matrix(elements: Any, rows: list[str], cols: list[str], what: str, model: str) -> dict:
    """{(row, col): element} from a nested mapping or a nested sequence."""
    out: dict[tuple[str, str], TransferElement] = {}
    if elements is None:
        return out
    if isinstance(elements, Mapping):
        for r, rowspec in elements.items():
            if r not in rows:
                raise ModelError(f"transfer_matrix_model('{model}'): {what} names the CV {r!r}, which is "
                                 f"not declared{suggest(str(r), rows)}; CVs: {', '.join(rows)}.")
            if not isinstance(rowspec, Mapping):
                raise ModelError(f"transfer_matrix_model('{model}'): {what}['{r}'] must map input names "
                                 f"to elements; got {rowspec!r}.")
            for c, spec in rowspec.items():
                if c not in cols:
                    raise ModelError(f"transfer_matrix_model('{model}'): {what}['{r}'] names the input "
                                     f"{c!r}, which is not declared{suggest(str(c), cols)}; inputs: "
                                     f"{', '.join(cols) or '(none)'}.")
                el = TransferElement.coerce(spec, f"transfer_matrix_model('{model}'): {what}['{r}']['{c}']")
                if el is not None:
                    out[(r, c)] = el
        return out
    try:
        nrow = len(elements)
        ncol = [len(row) for row in elements]
    except TypeError:
        raise ModelError(f"transfer_matrix_model('{model}'): {what} must be a nested mapping "
                         f"{{cv: {{input: element}}}} or a list of rows; got {elements!r}.") from None
    if nrow != len(rows) or any(n != len(cols) for n in ncol):
        raise ModelError(f"transfer_matrix_model('{model}'): {what} must have {len(rows)} rows (CVs) "
                         f"of {len(cols)} elements (inputs); got {nrow} rows of {ncol}.")
    for r, row in zip(rows, elements):
        for c, spec in zip(cols, row):
            el = TransferElement.coerce(spec, f"transfer_matrix_model('{model}'): {what}['{r}']['{c}']")
            if el is not None:
                out[(r, c)] = el
    return out


def transfer_matrix_model(name: str, mvs: Any, cvs: Any, elements: Any, *, dvs: Any = None,
                          dv_elements: Any = None, time_unit: str = "min", description: str = "",
                          integrator: str = "exact") -> Model:
    """Build a linear plant from a matrix of FOPDT/SOPDT elements.

    Parameters
    ----------
    name : str
        Model name.
    mvs, cvs, dvs : sequence of (str or dict) or mapping of name -> dict
        The variables.  A dict may give ``unit``, ``nominal`` (default 0), ``low``, ``high``,
        ``description`` and, for DVs, ``measured`` (default True).  A CV's nominal is its value when
        every input sits at its nominal.
    elements : mapping {cv: {mv: element}} or list of rows (one per CV, one entry per MV)
        The MV -> CV elements (see the module docstring for the accepted forms).
    dv_elements : same form, optional
        The DV -> CV elements.
    time_unit : {"s", "min", "h"}
        Unit of time constants and dead times.
    description, integrator : str
        Passed to :class:`~mpcproto.Model`.  The default integrator ``"exact"`` steps the plant by
        its exact discrete map (the model is linear; see :class:`mpcproto.sim.Plant`), with every
        dead time kept exactly, whole samples or not.

    Returns
    -------
    Model
        The built model: states ``"<cv>__<input>_<k>"`` per lag of each element (0 at the nominal
        point), dead times as delayed inputs.
    """
    where = f"transfer_matrix_model('{name}')"
    mv_specs = _spec_list(mvs, "mv", where)
    cv_specs = _spec_list(cvs, "cv", where)
    dv_specs = _spec_list(dvs, "dv", where)
    if not mv_specs:
        raise ModelError(f"at least one MV is needed; got {mvs!r}.", owner=where)
    if not cv_specs:
        raise ModelError(f"at least one CV is needed; got {cvs!r}.", owner=where)
    if dv_elements is not None and not dv_specs:
        raise ModelError("dv_elements given but no DVs declared (pass dvs=...).", owner=where)
    cv_names = [c["name"] for c in cv_specs]
    mv_names = [c["name"] for c in mv_specs]
    dv_names = [c["name"] for c in dv_specs]
    mv_el = _matrix(elements, cv_names, mv_names, "elements", name)
    dv_el = _matrix(dv_elements, cv_names, dv_names, "dv_elements", name)

    m = Model(name, time_unit=time_unit, description=description, integrator=integrator)

    def fnum(spec, key, default):
        v = spec.get(key, default)
        if isinstance(v, bool) or not isinstance(v, numbers.Real):
            raise ModelError(f"'{spec['name']}' key '{key}' must be a number; got {v!r}.",
                             owner=where)
        return float(v)

    syms: dict[str, Any] = {}
    nominal: dict[str, float] = {}
    for role, specs in (("mv", mv_specs), ("dv", dv_specs)):
        for s in specs:
            kw = dict(nominal=fnum(s, "nominal", 0.0), unit=str(s.get("unit", "")),
                      low=fnum(s, "low", -math.inf), high=fnum(s, "high", math.inf),
                      description=str(s.get("description", "")))
            if role == "dv":
                kw["measured"] = bool(s.get("measured", True))
            syms[s["name"]] = (m.mv if role == "mv" else m.dv)(s["name"], **kw)
            nominal[s["name"]] = kw["nominal"]

    contributions: dict[str, list[Any]] = {c: [] for c in cv_names}
    for (cv, inp), el in list(mv_el.items()) + list(dv_el.items()):
        src = m.delayed(inp, float(el.dead_time)) - nominal[inp]
        drive = float(el.gain) * src
        if el.integrating:
            drive = _integrated(m, cv, inp, drive)
        if not el.time_constants:
            contributions[cv].append(drive)
            continue
        prev = drive
        xi = None
        for k, tau in enumerate(el.time_constants, start=1):
            xi = m.state(f"{cv}__{inp}_{k}", nominal=0.0,
                         description=f"lag {k} of the {inp} -> {cv} element")
            dxi = (prev - xi) / float(tau)
            m.derivative(xi, dxi)
            prev = xi
        contributions[cv].append(xi + float(el.lead) * dxi if el.lead else xi)

    for s in cv_specs:
        y0 = fnum(s, "nominal", 0.0)
        expr = y0
        for c in contributions[s["name"]]:
            expr = expr + c
        m.cv(s["name"], expr, unit=str(s.get("unit", "")), low=fnum(s, "low", -math.inf),
             high=fnum(s, "high", math.inf), description=str(s.get("description", "")))
    return m.build()


def _integrated(m: Model, cv: str, inp: str, rate: Any) -> Any:
    """The integrating part of an element: a state (0 at the nominal point) whose rate is *rate*."""
    xi = m.state(f"{cv}__{inp}_int", nominal=0.0,
                 description=f"integral of the {inp} -> {cv} element")
    m.derivative(xi, rate)
    return xi
