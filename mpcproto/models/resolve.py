"""One resolver from a model reference to a built :class:`~mpcproto.model.Model`.

Everything above the model layer (scenarios, batch workers, the command line) names a model by a
*reference* and calls :func:`resolve_model`; nothing else turns references into models.  The forms:

``"blending_tank"``
    a built-in model (:func:`mpcproto.models.available`), else a model an installed package
    registers under the entry-point group ``mpcproto.models`` (:func:`registered`);
``"package.module:function"``
    an importable function;
``"units.py:function"``
    a function in a Python file, relative to *base_dir* (a scenario's folder) unless absolute;
``"step_test.toml"``
    a transfer-matrix file (:mod:`mpcproto.models.transfer_table`), relative to *base_dir*;
a table with ``kind = "transfer_matrix"``
    a transfer matrix written inline.

A function is called with the reference's ``options`` as keyword arguments and returns a
:class:`~mpcproto.model.Model` (built or not); ``parameters`` then override the values of the
parameters the model declares (:meth:`Model.with_parameters`).  An entry point may also name a
module written like a built-in one (``DESCRIPTION``, ``TIME_UNIT``, ``OPTIONS``,
``default_parameters``, ``build``): its options and parameters are then checked and passed exactly
as for a built-in model.

**Where code runs.**  Scenario files are data.  The model function (or module) a reference names
explicitly is the only code a scenario makes run; no other string of a scenario is ever evaluated.

Errors are :class:`~mpcproto.exceptions.ModelError` naming *what* (the key, e.g. ``plant.model``),
the file/module and function, and what was found.  When the user's own code raises, the message's
last line is its exception (``ValueError: ...``); the whole traceback is kept as text in the
error's ``detail`` attribute (the command line prints it with ``--debug``).

Built models are cached per process, keyed by the full reference (a file's absolute path and the
hash of its content, so an edited file is loaded afresh), the options and the parameters: a pool or
Dask worker that runs many cases of a study builds each distinct model once, from the same plain
reference the parent checked.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import inspect
import json
import sys
import traceback
import typing
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Any

from .._specs import shown
from ..exceptions import ModelError, join_key
from ..model import Model, suggest

__all__ = ["ENTRY_POINT_GROUP", "Reference", "parse_reference", "resolve_model", "registered",
           "model_options", "describe_reference", "clear_cache"]

#: Entry-point group under which installed packages register models.
ENTRY_POINT_GROUP = "mpcproto.models"

_CACHE: dict[str, Model] = {}
_CACHE_LIMIT = 256


def clear_cache() -> None:
    """Forget every model built in this process."""
    _CACHE.clear()


@dataclass(frozen=True)
class Reference:
    """A parsed model reference (plain data).

    ``form`` is one of ``"builtin"``, ``"registered"``, ``"module"``, ``"file"``, ``"toml"``,
    ``"table"``; ``target`` the name, module path or absolute file path; ``function`` the function
    name (module and file forms); ``text`` the reference as written; ``table`` the inline table.
    """

    form: str
    target: str
    function: str = ""
    text: str = ""
    table: Any = None

    @property
    def label(self) -> str:
        """Short human name: the text as written, or ``transfer matrix 'name'``."""
        if self.form == "table":
            return f"transfer matrix '{self.table.get('name', '(inline)')}'"
        return self.text


def _err(what: str, msg: str, detail: str = "", key: str | None = None) -> ModelError:
    e = ModelError(msg, owner=what, key=key)
    e.detail = detail
    return e


def _unplaced(e: ModelError) -> str:
    """The text of *e* without its key (the wrapping error carries it)."""
    return f"{e.owner}: {e.body}" if e.owner else e.body


def _placed(e: ModelError, what: str) -> ModelError:
    """An error of the model layer (key relative to the model's table: ``options.x``,
    ``parameters.x``) placed beside *what* (``plant.model`` -> ``plant.parameters.x``)."""
    base = what[:-len(".model")] if what.endswith(".model") else None
    return e.replace(owner=e.owner or what, key=join_key(base, e.key))


def registered() -> dict[str, Any]:
    """Models registered by installed packages: ``{name: entry point}`` (group ``mpcproto.models``)."""
    from importlib.metadata import entry_points

    out: dict[str, Any] = {}
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        out.setdefault(ep.name, ep)
    return out


def _forms_hint() -> str:
    return ('a built-in or registered model name, "package.module:function", "file.py:function" '
            '(beside the scenario), "file.toml" (a transfer matrix) or a table with '
            'kind = "transfer_matrix"')


def parse_reference(ref: Any, *, base_dir: str | Path | None = None,
                    what: str = "model") -> Reference:
    """Tell which form *ref* has (no code runs, no file is read); relative files join *base_dir*."""
    from .library import _REGISTRY

    if isinstance(ref, Reference):
        return ref
    if isinstance(ref, Mapping):
        return Reference("table", str(ref.get("name", "")), text="", table=dict(ref))
    if not isinstance(ref, str) or not ref.strip():
        raise _err(what, f"expected {_forms_hint()}; found {shown(ref)}.")
    text = ref.strip()
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    if text.endswith(".toml") and ":" not in text:
        p = Path(text)
        return Reference("toml", str((p if p.is_absolute() else base / p).resolve()), text=text)
    if ":" in text:
        target, _, func = text.rpartition(":")
        if not target or not func.isidentifier():
            raise _err(what, f"expected \"module:function\" or \"file.py:function\" with a function "
                       f"name after the colon; found {text!r}.")
        if target.endswith(".py"):
            p = Path(target)
            return Reference("file", str((p if p.is_absolute() else base / p).resolve()), func,
                             text=text)
        if not all(part.isidentifier() for part in target.split(".")):
            raise _err(what, f"expected an importable module path (package.module) before the colon, "
                       f"or a file ending in .py; found {target!r}.")
        return Reference("module", target, func, text=text)
    if text in _REGISTRY:
        return Reference("builtin", text, text=text)
    if text in registered():
        return Reference("registered", text, text=text)
    known = list(_REGISTRY) + sorted(registered())
    raise _err(what, f"unknown model {text!r}{suggest(text, known)}; built-in models are: "
               f"{', '.join(_REGISTRY)}; registered by installed packages: "
               f"{', '.join(sorted(registered())) or '(none)'}. A model of your own is named as "
               f"\"file.py:function\" (beside the scenario), \"package.module:function\", "
               f"\"file.toml\" (a transfer matrix) or a table with kind = \"transfer_matrix\".")


def _file_digest(path: str, what: str, label: str) -> str:
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except FileNotFoundError:
        raise _err(what, f"expected the file {label} at {path}; found no such file (a file "
                   f"reference is relative to the scenario's folder).") from None
    except OSError as e:
        raise _err(what, f"expected a readable file at {path}; found: {e.strerror or e}.") from None


def cache_key(ref: Reference, options: Mapping[str, Any], parameters: Mapping[str, Any],
              what: str = "model") -> str:
    """The full identity of a reference with its options and parameters (file content included)."""
    if ref.form in ("file", "toml"):
        ident: Any = [ref.form, ref.target, _file_digest(ref.target, what, ref.text), ref.function]
    elif ref.form == "table":
        ident = ["table", ref.table]
    else:
        ident = [ref.form, ref.target, ref.function]
    return json.dumps([ident, dict(options), dict(parameters)], sort_keys=True, default=str)


def resolve_model(ref: Any, *, options: Mapping[str, Any] | None = None,
                  parameters: Mapping[str, Any] | None = None,
                  base_dir: str | Path | None = None, what: str = "model",
                  cache: bool = True) -> Model:
    """Turn a model reference into a built :class:`Model` (see the module docstring for the forms).

    Parameters
    ----------
    ref : str, mapping or Reference
        The reference.
    options, parameters : mapping, optional
        Structural options (keyword arguments of a model function) and parameter values.
    base_dir : path, optional
        Folder relative file references are read from (a scenario's folder; default the current
        directory).
    what : str
        Key path for messages (``"plant.model"``).
    cache : bool
        Reuse a model already built in this process for the same reference, options and
        parameters (treat it as read-only).

    Returns
    -------
    Model
        Built; its ``origin`` attribute is the reference's cache key (plain text).

    Raises
    ------
    ModelError
        Naming *what*, the file/function and what was found; ``detail`` holds the traceback of an
        exception the user's code raised.
    """
    options = dict(options or {})
    parameters = dict(parameters or {})
    for label, given in (("options", options), ("parameters", parameters)):
        if not isinstance(given, Mapping):
            raise _err(what, f"expected {label} as a table of name = value; found {shown(given)}.")
    r = parse_reference(ref, base_dir=base_dir, what=what)
    key = cache_key(r, options, parameters, what)
    if cache and key in _CACHE:
        return _CACHE[key]
    model = _build(r, options, parameters, what)
    try:
        model.origin = key
    except AttributeError:  # pragma: no cover - a Model subclass with __slots__
        pass
    if cache:
        if len(_CACHE) >= _CACHE_LIMIT:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[key] = model
    return model


def _build(r: Reference, options: dict, parameters: dict, what: str) -> Model:
    from .library import _REGISTRY, make_from_module

    if r.form == "builtin":
        try:
            return make_from_module(r.target, _REGISTRY[r.target], parameters=parameters,
                                    options=options)
        except ModelError as e:
            raise _placed(e, what) from None
    if r.form in ("table", "toml"):
        from .transfer_table import read_transfer_file, transfer_table_model

        if options or parameters:
            raise _err(what, f"expected no options or parameters for the transfer matrix "
                       f"{r.label} (its elements are its data); found "
                       f"{', '.join(list(options) + list(parameters))}.")
        if r.form == "table":
            return transfer_table_model(r.table, what=what.rsplit(".model", 1)[0] or what)
        try:
            return transfer_table_model(read_transfer_file(r.target), what=r.text)
        except ModelError as e:
            raise e.referred(what, None) from None
    obj, where = _load(r, what)
    if isinstance(obj, ModuleType) and all(hasattr(obj, a) for a in ("OPTIONS", "build",
                                                                       "default_parameters")):
        try:
            return make_from_module(r.target, obj, parameters=parameters, options=options)
        except ModelError as e:
            raise _placed(e, what) from None
    return _call(obj, where, options, parameters, what)


def _load(r: Reference, what: str) -> tuple[Any, str]:
    """The object a reference names, and a phrase saying where it came from."""
    if r.form == "registered":
        ep = registered()[r.target]
        where = f"the model '{r.target}' registered by {_dist_name(ep)} (entry point {ep.value})"
        try:
            return ep.load(), where
        except Exception as e:  # noqa: BLE001 - the package's own import failed
            raise _err(what, f"expected {where} to load; loading it raised an error. Its last "
                       f"line:\n{_last_line(e)}", _tb(e)) from None
    if r.form == "module":
        where = f"function '{r.function}' of module '{r.target}'"
        try:
            mod = importlib.import_module(r.target)
        except ModuleNotFoundError as e:
            if e.name and r.target.startswith(e.name):
                raise _err(what, f"expected an importable module '{r.target}' for {r.text!r}; "
                           f"found no module '{e.name}' on the Python path ({_short_path()}).") from None
            raise _err(what, f"expected module '{r.target}' to import; importing it raised an "
                       f"error. Its last line:\n{_last_line(e)}", _tb(e)) from None
        except Exception as e:  # noqa: BLE001 - the user's module raised while importing
            raise _err(what, f"expected module '{r.target}' to import; importing it raised an "
                       f"error. Its last line:\n{_last_line(e)}", _tb(e)) from None
        return _attr(mod, r, where, what), where
    # a Python file: load it under a name tied to its path and content
    path = Path(r.target)
    digest = _file_digest(r.target, what, r.text.rpartition(":")[0])
    name = f"mpcproto_user_{hashlib.sha256(str(path).encode()).hexdigest()[:10]}_{digest[:10]}"
    where = f"function '{r.function}' of {path.name} ({path})"
    mod = sys.modules.get(name)
    if mod is None:
        spec = importlib.util.spec_from_file_location(name, path)
        if spec is None or spec.loader is None:  # pragma: no cover - a .py path always has one
            raise _err(what, f"expected a Python file at {path}; found one Python cannot load.")
        mod = importlib.util.module_from_spec(spec)
        try:
            spec.loader.exec_module(mod)
        except Exception as e:  # noqa: BLE001 - the user's file raised while loading
            raise _err(what, f"expected {path.name} to load; running the file raised an error "
                       f"({path}). Its last line:\n{_last_line(e)}", _tb(e)) from None
        sys.modules[name] = mod
    return _attr(mod, r, where, what), where


def _attr(mod: ModuleType, r: Reference, where: str, what: str) -> Any:
    fn = getattr(mod, r.function, None)
    if fn is None:
        found = sorted(n for n, v in vars(mod).items() if callable(v) and not n.startswith("_")
                       and getattr(v, "__module__", None) == mod.__name__)
        raise _err(what, f"expected a {where}; found no such name{suggest(r.function, found)} "
                   f"(its functions: {', '.join(found) or 'none'}).")
    if not callable(fn):
        raise _err(what, f"expected {where} to be a function returning a Model; found "
                   f"a {type(fn).__name__} ({_short_repr(fn)}).")
    return fn


def _call(fn: Any, where: str, options: dict, parameters: dict, what: str) -> Model:
    if not callable(fn):
        raise _err(what, f"expected {where} to be a function returning a Model; found "
                   f"a {type(fn).__name__} ({_short_repr(fn)}).")
    try:
        sig = inspect.signature(fn)
        sig.bind(**options)
    except TypeError:
        accepted = [p.name for p in _option_params(fn)]
        raise _err(what, f"expected options that {where} accepts as keyword arguments "
                   f"({', '.join(accepted) or 'none'}); found {', '.join(options) or 'none'}"
                   f"{''.join(suggest(k, accepted) for k in options if k not in accepted)}.") from None
    except ValueError:  # a builtin without a signature: just call it
        pass
    try:
        model = fn(**options)
    except Exception as e:  # noqa: BLE001 - the user's function raised
        raise _err(what, f"expected {where} to return a Model; it raised an error. Its last "
                   f"line:\n{_last_line(e)}", _tb(e)) from None
    if not isinstance(model, Model):
        raise _err(what, f"expected {where} to return an mpcproto Model; found it returned "
                   f"a {type(model).__name__} ({_short_repr(model)}).")
    try:
        if not model.is_built:
            model.build()
    except ModelError as e:
        raise _placed(_err(what, f"the model {where} returned is not usable: {_unplaced(e)}",
                           key=e.key),
                      what) from None
    try:
        return model.with_parameters(parameters) if parameters else model
    except ModelError as e:
        raise _placed(_err(what, f"expected parameters the model of {where} declares: "
                           f"{_unplaced(e)}", key=e.key), what) from None


def _option_params(fn: Any) -> list[inspect.Parameter]:
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return []
    return [p for p in sig.parameters.values()
            if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)]


def model_options(ref: Any, *, base_dir: str | Path | None = None,
                  what: str = "model") -> dict[str, dict[str, Any]]:
    """The options of a referenced model: ``{name: {"default", "allowed", "description"}}``.

    Built-in (and module-style registered) models list theirs in ``OPTIONS``.  For a model
    function, the options are its keyword arguments: ``allowed`` comes from a ``Literal[...]``
    annotation or a boolean default, else it is empty (any value).  A transfer matrix has none.
    """
    from .library import _REGISTRY

    r = parse_reference(ref, base_dir=base_dir, what=what)
    if r.form in ("table", "toml"):
        return {}
    obj = _REGISTRY[r.target] if r.form == "builtin" else _load(r, what)[0]
    if isinstance(obj, ModuleType):
        return {k: {"default": s["default"], "allowed": list(s["allowed"]),
                    "description": s.get("description", "")} for k, s in obj.OPTIONS.items()}
    try:
        hints = typing.get_type_hints(obj)
    except Exception:  # noqa: BLE001 - unresolvable annotations: no allowed values known
        hints = {}
    out = {}
    for p in _option_params(obj):
        default = None if p.default is p.empty else p.default
        allowed: list[Any] = []
        h = hints.get(p.name)
        if typing.get_origin(h) is typing.Literal:
            allowed = list(typing.get_args(h))
        elif isinstance(default, bool):
            allowed = [False, True]
        out[p.name] = {"default": default, "allowed": allowed, "description": ""}
    return out


def _dist_name(ep: Any) -> str:
    dist = getattr(ep, "dist", None)
    return f"the package {dist.name} {dist.version}" if dist is not None else "an installed package"


def _short_repr(v: Any) -> str:
    r = repr(v)
    return r if len(r) <= 60 else r[:57] + "..."


def _last_line(e: BaseException) -> str:
    return "".join(traceback.format_exception_only(type(e), e)).strip().splitlines()[-1]


def _tb(e: BaseException) -> str:
    return "".join(traceback.format_exception(type(e), e, e.__traceback__))


def _short_path() -> str:
    shown_path = [p for p in sys.path if p][:4]
    return "sys.path starts " + ", ".join(shown_path) + (", ..." if len(sys.path) > 4 else "")


def describe_reference(ref: Any, *, options: Mapping[str, Any] | None = None,
                       parameters: Mapping[str, Any] | None = None,
                       base_dir: str | Path | None = None, what: str = "model") -> dict[str, Any]:
    """Plain-data description of a referenced model, with what each other option value changes.

    Returns
    -------
    dict
        :meth:`Model.describe` of the model built with *options* (``name``, ``description``,
        ``time_unit``, ``variables``, ``delays``) plus ``reference`` (the label), ``options``
        (see :func:`model_options`) and ``option_variants``: for every other allowed value of
        every option, ``{"option", "value", "added": [variable dicts], "removed": [names]}``
        (the variables that value adds or removes).
    """
    r = parse_reference(ref, base_dir=base_dir, what=what)
    options = dict(options or {})
    model = resolve_model(r, options=options, parameters=parameters, what=what)
    out = model.describe()
    out["reference"] = r.label
    opts = model_options(r, what=what)
    out["options"] = opts
    base = {(v["name"], v["role"]) for v in out["variables"]}
    variants = []
    for k, spec in opts.items():
        current = options.get(k, spec["default"])
        for value in spec["allowed"]:
            if value == current:
                continue
            other = resolve_model(r, options={**options, k: value}, what=what).describe()
            names = {(v["name"], v["role"]) for v in other["variables"]}
            variants.append({
                "option": k, "value": value,
                "added": [v for v in other["variables"] if (v["name"], v["role"]) not in base],
                "removed": [f"{role} {n}" for n, role in sorted(base - names)],
            })
    out["option_variants"] = variants
    return out
