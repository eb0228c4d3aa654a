"""Every error mpcproto raises on purpose.

All of them derive from :class:`MpcprotoError`, so a caller (and the CLI, which turns them into exit
code 2 with no traceback) can catch the whole family at once.

Every error can carry structured fields -- ``owner`` (the object or file section that owns the
setting), ``key`` (the key path below it), ``file`` (for a scenario), ``expected``, ``found``,
``fix`` and ``code`` (a short machine-readable reason) -- and renders them with one template::

    <file or owner>: key '<key>': expected <expected>, found <found>[; <fix>]

A caller never parses the text: it reads the fields, and places an error under a longer key path
with :meth:`MpcprotoError.at` (``err.at("controllers.mpc")``), under the settings table that
passed the value on with :meth:`MpcprotoError.within`, or in a scenario file with
:meth:`MpcprotoError.in_file`.  :mod:`mpcproto.validation` builds these errors from declared
constraints.
"""

from __future__ import annotations

import copy
from typing import Any

__all__ = [
    "MpcprotoError",
    "ModelError",
    "NotBuiltError",
    "SettingsError",
    "ScenarioError",
    "OperatingPointError",
    "SimulationError",
    "join_key",
]

_FIELDS = ("message", "owner", "key", "file", "expected", "found", "fix", "note", "code")


def join_key(prefix: str | None, key: str | None) -> str | None:
    """Key path *key* below *prefix*: ``("controllers.mpc", "cv.level.weight")`` ->
    ``"controllers.mpc.cv.level.weight"``; an index joins without a dot (``"a" + "[1].b"`` ->
    ``"a[1].b"``); a missing part gives the other."""
    if not prefix:
        return key or None
    if not key:
        return prefix
    return prefix + key if key.startswith("[") else f"{prefix}.{key}"


class MpcprotoError(Exception):
    """Base class of every error raised on purpose by mpcproto.

    ``MpcprotoError("free text")`` keeps working; the structured form is
    ``SettingsError(owner=..., key=..., expected=..., found=..., fix=...)``, and a free-text
    message can also be given an ``owner`` and a ``key`` (it then replaces ``expected, found``).
    """

    def __init__(self, message: str = "", *, owner: str | None = None, key: str | None = None,
                 file: str | None = None, expected: str | None = None, found: str | None = None,
                 fix: str | None = None, note: str | None = None, code: str | None = None):
        self.message = message
        self.owner = owner
        self.key = key
        self.file = file
        self.expected = expected
        self.found = found
        self.fix = fix
        self.note = note
        self.code = code
        super().__init__(self._render())

    # ------------------------------------------------------------------------------ rendering
    @property
    def body(self) -> str:
        """The message without the place (file/owner and key)."""
        if self.expected is not None:
            found = self.found if self.found is not None else "nothing"
            text = f"expected {self.expected}, found {found}"
            if self.fix:    # a fix written as a sentence follows as one
                text += f". {self.fix}" if self.fix[:1].isupper() else f"; {self.fix}"
            if text[-1] not in ".?!":
                text += "."
        else:
            text = self.message
            if self.fix:
                text = f"{text.rstrip('.')}; {self.fix}" if text else self.fix
        if self.note:
            text += f" ({self.note})"
        return text

    def _render(self) -> str:
        where = self.file or self.owner
        parts = [p for p in (where, f"key '{self.key}'" if self.key else None) if p]
        return ": ".join(parts + [self.body]) if self.body else ": ".join(parts)

    def __str__(self) -> str:
        return self._render()

    # ------------------------------------------------------------------------------ placing
    def fields(self) -> dict[str, Any]:
        """The structured fields (constructor keywords) of this error."""
        return {k: getattr(self, k, None) for k in _FIELDS}

    def replace(self, **changes: Any) -> "MpcprotoError":
        """A copy of this error (same class, same extra attributes) with some fields changed."""
        new = copy.copy(self)
        for k, v in changes.items():
            if k not in _FIELDS:
                raise TypeError(f"unknown error field {k!r}")
            setattr(new, k, v)
        new.args = (new._render(),)
        return new

    def at(self, prefix: str | None) -> "MpcprotoError":
        """This error with its key path placed below *prefix* (``err.at("controllers.mpc")``:
        key ``horizon`` -> ``controllers.mpc.horizon``)."""
        return self.replace(key=join_key(prefix, self.key))

    def within(self, owner: str | None, context: str | None = None) -> "MpcprotoError":
        """This error as *owner*'s: the settings table whose value reached the code that raised
        it (same key, expected and found); *context* (``"loop level<-feed"``) leads the note."""
        note = "; ".join(p for p in (context, self.note) if p) or None
        return self.replace(owner=owner, note=note)

    def referred(self, owner: str | None, key: str | None) -> "MpcprotoError":
        """This error, raised in a file (or object) that setting *key* of *owner* names, placed at
        that setting: the inner file (or owner) and key lead the note (a bundle's ``bundle.json``
        named by ``controllers.mpc.bundle``)."""
        inner = ", ".join(p for p in (self.file or self.owner,
                                      f"key '{self.key}'" if self.key else None) if p)
        note = "; ".join(p for p in (f"in {inner}" if inner else None, self.note) if p) or None
        return self.replace(owner=owner, key=key, file=None, note=note)

    def as_class(self, cls: type) -> "MpcprotoError":
        """This error (same fields and extra attributes) as one of class *cls* (a failed step
        test's :class:`SimulationError` as the :class:`SettingsError` of the tuning setting)."""
        out = cls(**self.fields())
        out.__dict__.update({k: v for k, v in self.__dict__.items() if k not in _FIELDS})
        return out

    def in_file(self, file: str | None) -> "ScenarioError":
        """This error as a :class:`ScenarioError` of scenario *file* (same fields, same key)."""
        return self.replace(file=file).as_class(ScenarioError)

    def __reduce__(self):  # keep the fields through pickling (process pools)
        return (_rebuild, (type(self), self.fields(), {k: v for k, v in self.__dict__.items()
                                                       if k not in _FIELDS}))


def _rebuild(cls: type, fields: dict[str, Any], extra: dict[str, Any]) -> MpcprotoError:
    err = cls.__new__(cls)
    MpcprotoError.__init__(err, **fields)
    err.__dict__.update(extra)
    return err


class ModelError(MpcprotoError, ValueError):
    """A model definition is inconsistent (unknown name, missing derivative, bad nominal value...)."""


class NotBuiltError(MpcprotoError, RuntimeError):
    """An object was used before its ``build()`` step compiled it."""


class SettingsError(MpcprotoError, ValueError):
    """A function or constructor argument is out of its allowed range or has the wrong shape."""


class ScenarioError(MpcprotoError, ValueError):
    """A scenario file is malformed; the message names the file and the key path.

    ``ScenarioError(message, file=..., key=...)`` as before, or with the structured fields.
    """


class OperatingPointError(MpcprotoError, ValueError):
    """No steady state or target could be found, or one that was asked for is unreachable."""


class SimulationError(MpcprotoError, RuntimeError):
    """A closed-loop run could not continue (integrator failure, non-finite plant state)."""
