"""Library of built-in process models.

Each model lives in its own module and is derived from its balances in that module's docstring.
:func:`available` lists them (name, description, options with their allowed values, parameters with
their defaults); :func:`make` builds one by name with parameter overrides and options:

>>> import mpcproto as mp
>>> [m["name"] for m in mp.available_models()]
['blending_tank', 'henson_seborg_cstr', 'quadruple_tank', 'wood_berry']
>>> tank = mp.make_model("blending_tank", options={"outflow": "mv"})
>>> tank.mv_names
('caustic_flow', 'water_flow', 'heater_duty', 'draw_off')

Any model reference (a built-in name, ``"package.module:function"``, ``"file.py:function"``, a
model registered by an installed package, a transfer-matrix table or ``.toml`` file) is turned into
a model by :func:`resolve_model` (:mod:`mpcproto.models.resolve`).

Linear transfer-function-matrix plants of first- or second-order-plus-dead-time elements (models
identified from plant step tests) are built with :func:`transfer_matrix_model`.

Adding a model
--------------
Write a module here whose docstring derives the model from its balances and which defines

``DESCRIPTION`` (one line), ``TIME_UNIT`` (``"s"``, ``"min"`` or ``"h"``),
``OPTIONS``
    ``{option: {"default": ..., "allowed": (...), "description": "..."}}`` (may be empty),
``default_parameters(options) -> dict``
    every parameter name and default value for those options,
``build(parameters, options) -> Model``
    declares the variables (with units, nominal values, physical bounds, descriptions), gives
    the derivatives and CV expressions, and returns the built model,

then add it to ``_REGISTRY`` below.  :func:`make` validates names, options and parameter values
before calling ``build``; nominal values that follow from the parameters (an MV that holds the
nominal steady state) are computed in ``build``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from types import ModuleType
from typing import Any

from .._specs import as_float, shown
from ..exceptions import ModelError
from ..model import Model, suggest
from . import blending_tank, henson_seborg_cstr, quadruple_tank, wood_berry
from .transfer_matrix import TransferElement, transfer_matrix_model

__all__ = ["available", "make", "make_from_module", "transfer_matrix_model", "TransferElement",
           "resolve_model", "registered", "transfer_table_model"]

# name -> module; every module defines DESCRIPTION, OPTIONS, default_parameters(options), build(p, options)
_REGISTRY: dict[str, ModuleType] = {
    "blending_tank": blending_tank,
    "henson_seborg_cstr": henson_seborg_cstr,
    "quadruple_tank": quadruple_tank,
    "wood_berry": wood_berry,
}

from .resolve import registered, resolve_model  # noqa: E402 - needs _REGISTRY
from .transfer_table import transfer_table_model  # noqa: E402


def _default_options(mod: ModuleType) -> dict[str, Any]:
    return {k: spec["default"] for k, spec in mod.OPTIONS.items()}


def available() -> list[dict[str, Any]]:
    """Built-in models: one plain-data dict per model.

    Returns
    -------
    list of dict
        Each with ``name``, ``description``, ``time_unit``, ``options`` (option name -> dict with
        ``default``, ``allowed`` and ``description``) and ``parameters`` (name -> default value with
        the default options).
    """
    out = []
    for name, mod in _REGISTRY.items():
        opts = _default_options(mod)
        out.append({
            "name": name,
            "description": mod.DESCRIPTION,
            "time_unit": mod.TIME_UNIT,
            "options": {k: {"default": spec["default"], "allowed": list(spec["allowed"]),
                            "description": spec["description"]}
                        for k, spec in mod.OPTIONS.items()},
            "parameters": dict(mod.default_parameters(opts)),
        })
    return out


def make(name: str, *, parameters: Mapping[str, float] | None = None,
         options: Mapping[str, Any] | None = None) -> Model:
    """Build the built-in model called *name*.

    Parameters
    ----------
    name : str
        One of the names listed by :func:`available`.
    parameters : mapping of str to float, optional
        Parameter overrides; the others keep their defaults.  The nominal values of the variables
        are computed from the parameters where the model says so (e.g. the heater duty that holds
        the blending tank's nominal temperature).
    options : mapping of str to value, optional
        Structural choices of the model (see ``available()[i]["options"]``).

    Returns
    -------
    Model
        The built model (``model.is_built`` is True).

    Raises
    ------
    ModelError
        For an unknown model, option, option value or parameter, or a non-finite parameter value;
        the message names it, lists what is allowed and suggests the closest name.
    """
    if not isinstance(name, str) or name not in _REGISTRY:
        raise ModelError(
            f"unknown model {shown(name)}{suggest(str(name), list(_REGISTRY))}; "
            f"built-in models are: {', '.join(_REGISTRY)}.")
    return make_from_module(name, _REGISTRY[name], parameters=parameters, options=options)


def make_from_module(name: str, mod: ModuleType, *, parameters: Mapping[str, float] | None = None,
                     options: Mapping[str, Any] | None = None) -> Model:
    """Build the model a module written like a built-in one defines (see "Adding a model"):
    options and parameters checked against its ``OPTIONS`` and ``default_parameters``."""
    opts = _default_options(mod)
    for what, given in (("options", options), ("parameters", parameters)):
        if given is not None and not isinstance(given, Mapping):
            raise ModelError(f"model '{name}': {what} must be a table of name = value; got "
                             f"{shown(given)}.")
    for k, v in dict(options or {}).items():
        if k not in mod.OPTIONS:
            allowed = ", ".join(mod.OPTIONS) or "(none)"
            raise ModelError(
                f"model '{name}' has no option {k!r}{suggest(str(k), list(mod.OPTIONS))}; "
                f"its options are: {allowed}.")
        allowed_vals = mod.OPTIONS[k]["allowed"]
        if (isinstance(v, (list, dict, Mapping)) or v not in allowed_vals
                or isinstance(v, bool) != any(isinstance(a, bool) for a in allowed_vals)):
            hint = suggest(str(v), [str(a) for a in allowed_vals])
            raise ModelError(
                f"model '{name}': option '{k}' must be one of "
                f"{', '.join(repr(a) for a in allowed_vals)}; got {shown(v)}{hint}.")
        opts[k] = v
    params = dict(mod.default_parameters(opts))
    for k, v in dict(parameters or {}).items():
        if k not in params:
            raise ModelError(
                f"model '{name}' has no parameter {k!r}{suggest(str(k), list(params))}"
                f" (with options {opts}); its parameters are: {', '.join(params) or '(none)'}.")
        f = as_float(v)
        if f is None or not math.isfinite(f):
            raise ModelError(
                f"model '{name}': parameter '{k}' must be a finite number; got {shown(v)}.")
        params[k] = f
    model = mod.build(params, opts)
    if not model.is_built:
        model.build()
    return model
