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

from .library import _REGISTRY, available, make, make_from_module
from .resolve import registered, resolve_model
from .transfer_matrix import TransferElement, transfer_matrix_model
from .transfer_table import transfer_table_model

__all__ = ["available", "make", "make_from_module", "transfer_matrix_model", "TransferElement",
           "resolve_model", "registered", "transfer_table_model"]
