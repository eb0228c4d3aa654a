"""Named blocks of one flat vector, and CasADi Functions called by position only after a check.

CasADi Functions take their inputs as a few vectors; several of ours take one packed vector, e.g.
the integrator's ``p = [u; d; z; parameters]`` (:attr:`mpcproto.Model.p_layout_`).  A
:class:`ParameterLayout` names the blocks of such a vector once: :meth:`~ParameterLayout.pack`
joins named parts (numbers or CasADi expressions) in its order and :meth:`~ParameterLayout.unpack`
gives them back by name, so no caller computes offsets of its own.

>>> import numpy as np
>>> lay = ParameterLayout([("u", 2), ("d", 1), ("p", 1)])
>>> v = lay.pack(u=[1.0, 2.0], d=[3.0], p=[4.0])
>>> v.tolist(), lay.size
([1.0, 2.0, 3.0, 4.0], 4)
>>> lay.unpack(v)["d"].tolist()
[3.0]
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import casadi as ca
import numpy as np

from .exceptions import ModelError

__all__ = ["ParameterLayout", "in_order"]

_SYMBOLIC = (ca.SX, ca.MX, ca.DM)


class ParameterLayout:
    """The blocks ``(name, size)`` of one flat vector, in order.

    Parameters
    ----------
    blocks : sequence of (str, int)
        Block names (distinct) and sizes (>= 0), in the order they are packed.
    owner : str
        Named first in error messages (e.g. ``"model 'cstr' inputs"``).
    """

    def __init__(self, blocks: Sequence[tuple[str, int]], *, owner: str = "layout"):
        self.owner = str(owner)
        self.blocks = tuple((str(n), int(s)) for n, s in blocks)
        self.names = tuple(n for n, _ in self.blocks)
        if len(set(self.names)) != len(self.names) or any(s < 0 for _, s in self.blocks):
            raise ModelError(f"{self.owner}: block names must be distinct and sizes >= 0; got "
                             f"{self.blocks}.")
        edges = np.cumsum([0] + [s for _, s in self.blocks])
        #: block name -> slice of the flat vector
        self.slices = {n: slice(int(a), int(b)) for n, a, b in zip(self.names, edges[:-1], edges[1:])}
        self.size = int(edges[-1])
        self._sizes = [s for _, s in self.blocks]

    def __repr__(self) -> str:
        return f"ParameterLayout({list(self.blocks)})"

    def __add__(self, other: "ParameterLayout") -> "ParameterLayout":
        """The blocks of *self* followed by those of *other* (names must stay distinct)."""
        return ParameterLayout(self.blocks + other.blocks, owner=self.owner)

    def prefixed(self, prefix: str) -> "ParameterLayout":
        """The same blocks with *prefix* put before each name (to join two copies of a layout)."""
        return ParameterLayout([(prefix + n, k) for n, k in self.blocks], owner=self.owner)

    def pack(self, **parts: Any) -> Any:
        """Join the named *parts* in the layout's order: a NumPy vector, or a CasADi column when
        any part is a CasADi expression.  Every block must be given, each with its size."""
        try:
            vals = [parts[n] for n in self.names]
        except KeyError:
            vals = None
        if vals is None or len(parts) != len(vals):
            missing = [n for n in self.names if n not in parts]
            extra = [n for n in parts if n not in self.slices]
            raise ModelError(f"{self.owner}: pack() needs the blocks {', '.join(self.names)}; "
                             f"missing: {', '.join(missing) or '(none)'}; unknown: "
                             f"{', '.join(extra) or '(none)'}.")
        if all(type(v) is np.ndarray for v in vals):      # the per-sample path: arrays already
            if [v.size for v in vals] == self._sizes:
                return np.concatenate(vals, axis=None, dtype=float)
        elif any(isinstance(v, _SYMBOLIC) for v in vals):
            cols = [ca.reshape(v, -1, 1) if isinstance(v, _SYMBOLIC)
                    else ca.DM(np.asarray(v, float).reshape(-1)) for v in vals]
            for (n, s), c in zip(self.blocks, cols):
                if c.numel() != s:
                    self._wrong(n, s, c)
            return ca.vertcat(*cols)
        vals = [np.asarray(v, float).reshape(-1) for v in vals]
        for (n, s), a in zip(self.blocks, vals):
            if a.size != s:
                self._wrong(n, s, a)
        return np.concatenate(vals)

    def _wrong(self, name: str, size: int, value: Any) -> None:
        found = value.numel() if isinstance(value, _SYMBOLIC) else np.size(value)
        raise ModelError(f"{self.owner}: block '{name}' must have {size} entries; got {found}.")

    def unpack(self, vector: Any) -> dict[str, Any]:
        """The blocks of *vector* (NumPy or CasADi) by name (views/slices, in the layout's order)."""
        n = vector.numel() if isinstance(vector, _SYMBOLIC) else np.size(vector)
        if n != self.size:
            raise ModelError(f"{self.owner}: unpack() expects a vector of {self.size} entries "
                             f"({', '.join(f'{k} {s}' for k, s in self.blocks)}); got {n}.")
        if not isinstance(vector, _SYMBOLIC):
            vector = np.asarray(vector, float).reshape(-1)
        return {k: vector[s] for k, s in self.slices.items()}


def in_order(f: Any, inputs: Sequence[str], outputs: Sequence[str]) -> Any:
    """Return the CasADi Function *f* after checking once that its inputs and outputs are named
    *inputs* and *outputs* in that order, so that a positional call ``f(*args)`` on a hot path
    passes each value to the input it is meant for.

    Elsewhere call Functions by name (``f(x=..., p=...)["xf"]``).
    """
    got_in, got_out = tuple(f.name_in()), tuple(f.name_out())
    if got_in != tuple(inputs) or got_out != tuple(outputs):
        raise ModelError(f"CasADi Function '{f.name()}': a positional call expects inputs "
                         f"{tuple(inputs)} -> outputs {tuple(outputs)}; the Function has "
                         f"{got_in} -> {got_out}.")
    return f
