"""What the predictive controller hands back: small dataclasses with a mapping view.

:class:`StepDiagnostics` (the ``diagnostics`` of each :meth:`PredictiveController.step
<mpcproto.control.mpc.PredictiveController.step>`) and :class:`PlanResult` (what
:meth:`~mpcproto.control.mpc.PredictiveController.plan` returns) are dataclasses whose fields are
the documented entries.  Both are also read as mappings (``diag["solve_ms"]``, ``"u" in plan``,
``to_dict()``), which is how the simulator records them: a field that a step did not fill (the
steady target's entries without a steady target, DAQP's ``exit_flag`` with another solver...) is
not a key, so the recorded columns are those of the plain dicts these objects replace, in the same
order.  The steady target's per-variable values are kept as arrays and become lists only when
read through the mapping view.
"""

from __future__ import annotations

from collections.abc import Mapping, MutableMapping
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

__all__ = ["StepDiagnostics", "PlanResult", "ABSENT", "blank_diagnostics"]


class _Absent:
    """The value of a field that was not filled (not a key of the mapping view)."""

    __slots__ = ()

    def __repr__(self) -> str:
        return "ABSENT"

    def __reduce__(self):
        return "ABSENT"


#: marks a field that was not filled
ABSENT: Any = _Absent()


class FieldView(Mapping):
    """Read-only mapping view over a dataclass's fields; a field holding :data:`ABSENT` is no key.
    Fields named in ``_AS_LISTS`` hold arrays and are read as lists."""

    _FIELDS: tuple[str, ...] = ()
    _KEYS: frozenset[str] = frozenset()
    _AS_LISTS: frozenset[str] = frozenset()

    def __getitem__(self, key: str) -> Any:
        if key not in self._KEYS:
            raise KeyError(key)
        v = getattr(self, key)
        if v is ABSENT:
            raise KeyError(key)
        if key in self._AS_LISTS and isinstance(v, np.ndarray):
            return v.tolist()
        return v

    def __iter__(self):
        return (k for k in self._FIELDS if getattr(self, k) is not ABSENT)

    def __len__(self) -> int:
        return sum(1 for _ in self)

    def to_dict(self) -> dict[str, Any]:
        """The filled entries as a plain dict (the mapping view's values)."""
        return {k: self[k] for k in self}

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.to_dict()!r})"


class _FieldRecord(FieldView, MutableMapping):
    """A :class:`FieldView` whose entries may be set by key; unknown keys are refused."""

    def __setitem__(self, key: str, value: Any) -> None:
        if key not in self._KEYS:
            raise KeyError(f"{type(self).__name__} has no entry {key!r}; its entries are "
                           f"{list(self._FIELDS)}")
        setattr(self, key, value)

    def __delitem__(self, key: str) -> None:
        self[key]                               # KeyError when not filled
        setattr(self, key, ABSENT)


def _with_fields(cls):
    cls._FIELDS = tuple(f.name for f in fields(cls))
    cls._KEYS = frozenset(cls._FIELDS)
    return cls


@_with_fields
@dataclass(eq=False, repr=False, init=False)
class StepDiagnostics(_FieldRecord):
    """Diagnostics of one controller step (fields in the order they are recorded).

    Measurements: ``rejected_measurements``, ``late_measurements``, ``dropped_measurements``,
    ``mvs_not_following`` (CV / MV names) and their counts ``n_*``.  Steady target:
    ``target_iterations``, ``target_status``, ``target_u``, ``target_y`` (absolute; arrays, read
    as lists), ``target_ms``.  Dynamic QP: ``solver``, ``solver_status``, ``first_solver_status``
    (when the backup solver was asked), ``iterations``, ``exit_flag`` and ``active_set`` (DAQP),
    ``solve_ms``, ``backup_solves``.  Outcome: ``fallback``, ``slack_max``, ``cv_limits_relaxed``,
    ``relaxed_cvs``, ``clipped``, ``active_mv_limits``, ``active_mv_limit_names``,
    ``active_rate_limits``, ``limits_over_rate``.  ``step_ms`` is the controller's own wall time
    of the step (the simulator records its own timing of the whole call under the same name,
    replacing this one); ``counts`` the controller's running totals.
    """

    _AS_LISTS = frozenset({"target_u", "target_y"})

    def __init__(self, **entries: Any):
        # unfilled fields read their class default (ABSENT): a step creates one of these per
        # sample, so nothing is assigned that the step does not fill
        for k, v in entries.items():
            self[k] = v

    mvs_not_following: Any = ABSENT
    rejected_measurements: Any = ABSENT
    late_measurements: Any = ABSENT
    dropped_measurements: Any = ABSENT
    backup_solves: Any = ABSENT
    target_iterations: Any = ABSENT
    target_status: Any = ABSENT
    target_u: Any = ABSENT
    target_y: Any = ABSENT
    exit_flag: Any = ABSENT
    active_set: Any = ABSENT
    solver: Any = ABSENT
    first_solver_status: Any = ABSENT
    target_ms: Any = ABSENT
    solve_ms: Any = ABSENT
    solver_status: Any = ABSENT
    iterations: Any = ABSENT
    fallback: Any = ABSENT
    slack_max: Any = ABSENT
    cv_limits_relaxed: Any = ABSENT
    relaxed_cvs: Any = ABSENT
    clipped: Any = ABSENT
    active_mv_limits: Any = ABSENT
    active_mv_limit_names: Any = ABSENT
    active_rate_limits: Any = ABSENT
    limits_over_rate: Any = ABSENT
    n_rejected_measurements: Any = ABSENT
    n_mvs_not_following: Any = ABSENT
    n_dropped_measurements: Any = ABSENT
    step_ms: Any = ABSENT
    counts: Any = ABSENT


def blank_diagnostics() -> StepDiagnostics:
    """A :class:`StepDiagnostics` with no field filled, as ``StepDiagnostics()`` (without the
    keyword loop of ``__init__``: a step makes one per sample)."""
    return _new(StepDiagnostics)


_new = object.__new__


@_with_fields
@dataclass(eq=False, repr=False)
class PlanResult(_FieldRecord):
    """What :meth:`~mpcproto.control.mpc.PredictiveController.plan` returns.

    ``status`` (solver word), ``accepted``, ``objective``, ``diagnostics``
    (:class:`StepDiagnostics` of the solve) and, when the solve gave values, ``u`` (first move,
    absolute, after the exact limit projection), ``u_plan`` (nu, N) absolute, ``y_pred`` (ny, N)
    absolute predicted CVs at samples 1..N, ``x_pred`` (nx, N) deviation states, ``slack`` (ny, N).
    """

    status: Any = ABSENT
    accepted: Any = ABSENT
    objective: Any = ABSENT
    diagnostics: Any = field(default_factory=StepDiagnostics)
    u: Any = ABSENT
    u_plan: Any = ABSENT
    y_pred: Any = ABSENT
    x_pred: Any = ABSENT
    slack: Any = ABSENT
