"""Shared pieces of the ``mpcproto`` commands: exit codes and the plain-text number formats."""

from __future__ import annotations

import math
from typing import Any, Sequence

__all__ = ["EXIT_OK", "EXIT_FAILED", "EXIT_BAD_INPUT", "EXIT_INTERNAL"]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3


def _finite_or_null(obj: Any) -> Any:
    """A copy of *obj* (dicts, lists, numbers) with NaN and infinite floats replaced by None."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite_or_null(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_null(v) for v in obj]
    return obj


def _print_table(rows: Sequence[Sequence[str]], indent: int = 0) -> None:
    widths = [max(len(str(r[i])) for r in rows) for i in range(len(rows[0]))]
    for r in rows:
        cells = [str(c).ljust(w) if i in (0, 1, 2, len(r) - 1) else str(c).rjust(w)
                 for i, (c, w) in enumerate(zip(r, widths))]
        print(" " * indent + "  ".join(cells).rstrip())


def _fmt(v: Any) -> str:
    if v is None:
        return "inf"
    return f"{v:.4g}"
