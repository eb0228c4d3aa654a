"""Every error mpcproto raises on purpose.

All of them derive from :class:`MpcprotoError`, so a caller (and the CLI, which turns them into exit
code 2 with no traceback) can catch the whole family at once.  Messages follow one template: *which
object or file and key*, *what was expected*, *what was found*, and where possible *the fix*.
"""

from __future__ import annotations

__all__ = [
    "MpcprotoError",
    "ModelError",
    "NotBuiltError",
    "SettingsError",
    "ScenarioError",
    "OperatingPointError",
    "SimulationError",
]


class MpcprotoError(Exception):
    """Base class of every error raised on purpose by mpcproto."""


class ModelError(MpcprotoError, ValueError):
    """A model definition is inconsistent (unknown name, missing derivative, bad nominal value...)."""


class NotBuiltError(MpcprotoError, RuntimeError):
    """An object was used before its ``build()`` step compiled it."""


class SettingsError(MpcprotoError, ValueError):
    """A function or constructor argument is out of its allowed range or has the wrong shape."""


class ScenarioError(MpcprotoError, ValueError):
    """A scenario file is malformed; the message names the file and the key path."""

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None):
        self.file = file
        self.key = key
        where = []
        if file:
            where.append(f"{file}")
        if key:
            where.append(f"key '{key}'")
        prefix = (": ".join(where) + ": ") if where else ""
        super().__init__(prefix + message)


class OperatingPointError(MpcprotoError, ValueError):
    """No steady state or target could be found, or one that was asked for is unreachable."""


class SimulationError(MpcprotoError, RuntimeError):
    """A closed-loop run could not continue (integrator failure, non-finite plant state)."""
