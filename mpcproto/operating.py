"""Operating points: steady states of a model and the target problem.

This module holds the :class:`OperatingPoint` data type used by every later layer.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["OperatingPoint"]


@dataclass(frozen=True)
class OperatingPoint:
    """A point (x, u, d) of a model, usually a steady state, with the CV values there.

    Attributes
    ----------
    model : str
        Name of the model.
    x, u, d, y : ndarray
        States, MVs, DVs and CVs (declaration order of the model).
    p : ndarray
        Parameter values the point was computed with.
    state_names, mv_names, dv_names, cv_names : tuple of str
    residual : float
        Largest absolute derivative at the point (0 for an exact steady state).
    eigenvalues : ndarray
        Eigenvalues of the state Jacobian at the point (empty if not computed).
    stable : bool or None
        True if every eigenvalue has a negative real part (None if not computed).
    """

    model: str
    x: np.ndarray
    u: np.ndarray
    d: np.ndarray
    y: np.ndarray
    p: np.ndarray
    state_names: tuple[str, ...]
    mv_names: tuple[str, ...]
    dv_names: tuple[str, ...]
    cv_names: tuple[str, ...]
    residual: float = 0.0
    eigenvalues: np.ndarray = field(default_factory=lambda: np.zeros(0, complex))
    stable: bool | None = None

    def as_dict(self) -> dict[str, Any]:
        """JSON-able view: values keyed by variable name."""
        ev = np.asarray(self.eigenvalues)
        return {
            "model": self.model,
            "states": dict(zip(self.state_names, map(float, self.x))),
            "mvs": dict(zip(self.mv_names, map(float, self.u))),
            "dvs": dict(zip(self.dv_names, map(float, self.d))),
            "cvs": dict(zip(self.cv_names, map(float, self.y))),
            "residual": float(self.residual),
            "eigenvalues": [[float(e.real), float(e.imag)] for e in ev],
            "stable": self.stable,
        }

    @classmethod
    def at(cls, model, x, u, d=None) -> "OperatingPoint":
        """The point (x, u, d) of a built *model*, with its CVs, residual and eigenvalues."""
        x = np.asarray(x, float).reshape(-1)
        u = np.asarray(u, float).reshape(-1)
        d = model.nominal("dv") if d is None else np.asarray(d, float).reshape(-1)
        z = model.z_of(u, d)
        p = model.p
        xdot = model.rhs(x, u, d, z, p)
        A = np.asarray(model.jac_(x, u, d, z, p)[0], float)
        ev = np.linalg.eigvals(A) if A.size else np.zeros(0, complex)
        return cls(
            model=model.name, x=x, u=u, d=d, y=model.output(x, u, d, z, p), p=p,
            state_names=model.state_names, mv_names=model.mv_names, dv_names=model.dv_names,
            cv_names=model.cv_names, residual=float(np.max(np.abs(xdot))) if xdot.size else 0.0,
            eigenvalues=ev, stable=bool(np.all(ev.real < 0)) if ev.size else True,
        )
