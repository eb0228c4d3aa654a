"""The built-in model library: the registry of built-in modules, ``available()``, ``make()`` and
``make_from_module()`` (kept apart from the package so that the resolver can use it without a
circle of imports)."""

from __future__ import annotations

import importlib
import math
from collections.abc import Mapping
from types import ModuleType
from typing import Any

from .._specs import as_float, shown
from ..exceptions import ModelError
from ..model import Model, suggest

__all__ = ["available", "make", "make_from_module"]

# name -> module; every module defines DESCRIPTION, OPTIONS, default_parameters(options), build(p, options)
#: (the modules are imported by name, not through the package, so the library never imports the
#: package that imports it)
_REGISTRY: dict[str, ModuleType] = {
    name: importlib.import_module(f"{__package__}.{name}")
    for name in ("blending_tank", "henson_seborg_cstr", "quadruple_tank", "wood_berry")
}



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
            raise ModelError(f"{what} must be a table of name = value; got {shown(given)}.",
                             owner=f"model '{name}'", key=what)
    for k, v in dict(options or {}).items():
        if k not in mod.OPTIONS:
            allowed = ", ".join(mod.OPTIONS) or "(none)"
            raise ModelError(
                f"model '{name}' has no option {k!r}{suggest(str(k), list(mod.OPTIONS))}; "
                f"its options are: {allowed}.", key=f"options.{k}")
        allowed_vals = mod.OPTIONS[k]["allowed"]
        if (isinstance(v, (list, dict, Mapping)) or v not in allowed_vals
                or isinstance(v, bool) != any(isinstance(a, bool) for a in allowed_vals)):
            hint = suggest(str(v), [str(a) for a in allowed_vals])
            raise ModelError(
                f"option '{k}' must be one of "
                f"{', '.join(repr(a) for a in allowed_vals)}; got {shown(v)}{hint}.",
                owner=f"model '{name}'", key=f"options.{k}")
        opts[k] = v
    params = dict(mod.default_parameters(opts))
    for k, v in dict(parameters or {}).items():
        if k not in params:
            raise ModelError(
                f"model '{name}' has no parameter {k!r}{suggest(str(k), list(params))}"
                f" (with options {opts}); its parameters are: {', '.join(params) or '(none)'}.",
                key=f"parameters.{k}")
        f = as_float(v)
        if f is None or not math.isfinite(f):
            raise ModelError(f"parameter '{k}' must be a finite number; got {shown(v)}.",
                             owner=f"model '{name}'", key=f"parameters.{k}")
        params[k] = f
    model = mod.build(params, opts)
    if not model.is_built:
        model.build()
    return model
