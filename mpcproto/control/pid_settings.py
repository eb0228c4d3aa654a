"""PID controllers from plain settings (scenario files): :func:`pid_from_settings`.

The one PID factory of the package: decentralized loops tuned from step tests by a published rule
(:mod:`.tuning`), or the regulatory structures of :mod:`.regulatory` (feedforward, ratio, cascade,
selector, split range).  It sits above both, so neither imports the other's settings code.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from .._specs import as_float, choice, refuse_unknown_keys, shown
from ..exceptions import SettingsError, join_key
from ..validation import Names, check, did_you_mean, fail
from .pid import PIDLoop
from .tuning import RULES, ZN_METHODS, ProcessFit, rule_on_fit, tune_pid_loops

__all__ = ["pid_from_settings"]


# ---------------------------------------------------------------------------------- settings
_STRUCTURE_KEYS = ("feedforward", "ratio", "cascade", "override", "split_range")
_SETTINGS_KEYS = ("loops", "pairs", "rule", "tau_c", "lam", "mode", "method", "step_fraction",
                  "test_duration", "fit", "extra_dead_time", "setpoint_weight",
                  "derivative_filter", "on_fresh") + _STRUCTURE_KEYS


_RULE_KEYS = {"simc": ("tau_c",), "imc": ("lam", "mode"), "ziegler_nichols": ("mode", "method")}
_MODES = ("P", "PI", "PID")
FIT_CHOICES = ("auto", "fopdt", "sopdt", "integrating")


def _per_cv(v: Any, cv: str, what: str, key: str) -> Any:
    if isinstance(v, Mapping):
        return v.get(cv)
    return v


def _check_number(v: Any, where: str, *, low: float, strict: bool, high: float = math.inf) -> float:

    f = as_float(v)
    ok = f is not None and math.isfinite(f) and (f > low if strict else f >= low) and f <= high
    if not ok:
        rel = ">" if strict else ">="
        rng = f"{rel} {low:g}" + (f" and <= {high:g}" if math.isfinite(high) else "")
        raise fail(None, where, f"a finite number {rng}", shown(v))
    return float(f)


def _check_per_cv(settings: Mapping[str, Any], key: str, model: Any, what: str, check) -> None:
    """A number/string for every CV, or a table per CV (``"*"`` = the others)."""

    v = settings[key]
    if not isinstance(v, Mapping):
        check(v, join_key(what, key))
        return
    names = list(getattr(model, "cv_names", ()))
    for c, x in v.items():
        if not isinstance(c, str) or (c != "*" and c not in names):
            raise fail(None, join_key(what, key), f"one value or a table keyed by CV names of "
                       f"model '{getattr(model, 'name', '?')}' ({', '.join(names)} or '*')",
                       shown(c), did_you_mean(str(c), names))
        check(x, join_key(join_key(what, key), str(c)))


def _check_settings(model: Any, settings: Mapping[str, Any], what: str) -> None:
    """Types and ranges of every key of :func:`pid_from_settings` (before any step test)."""
    try:
        _check_settings_below(model, settings)
    except SettingsError as e:
        # the checks below are given the key path of their entry as the owner: it goes in
        # front of the error's key, below the PID settings (*what*)
        raise e.replace(owner=what, key=join_key(e.owner, e.key)) from None


def _check_settings_below(model: Any, settings: Mapping[str, Any]) -> None:
    what = None

    rule = choice(settings.get("rule", "simc"), RULES, what=what, key="rule", noun="rule")
    for key in ("tau_c", "lam", "mode", "method"):
        if key in settings and key not in _RULE_KEYS[rule]:
            users = [r for r, ks in _RULE_KEYS.items() if key in ks]
            raise SettingsError(f"applies to rule {' / '.join(users)}, but the rule "
                                f"is '{rule}'; remove '{key}' or set rule = '{users[0]}'.",
                                key=key)
    pos = lambda v, w: _check_number(v, w, low=0.0, strict=True)  # noqa: E731
    if "tau_c" in settings:
        _check_per_cv(settings, "tau_c", model, what, pos)
    if "lam" in settings:
        _check_per_cv(settings, "lam", model, what, pos)
    if "mode" in settings:
        _check_per_cv(settings, "mode", model, what,
                      lambda v, w: choice(v, _MODES, what=w, key=None, noun="mode"))
    if "method" in settings:
        _check_per_cv(settings, "method", model, what,
                      lambda v, w: choice(v, ZN_METHODS, what=w, key=None, noun="method"))
    choice(settings.get("fit", "auto"), FIT_CHOICES, what=what, key="fit", noun="fit")
    if "step_fraction" in settings:
        _check_number(settings["step_fraction"], "step_fraction", low=0.0, strict=True,
                      high=0.5)
    if settings.get("test_duration") is not None:
        _check_number(settings["test_duration"], "test_duration", low=0.0, strict=True)
    if "extra_dead_time" in settings:
        _check_per_cv(settings, "extra_dead_time", model, what,
                      lambda v, w: _check_number(v, w, low=0.0, strict=False))
    if "setpoint_weight" in settings:
        _check_number(settings["setpoint_weight"], "setpoint_weight", low=0.0, strict=False,
                      high=1.0)
    if "derivative_filter" in settings:
        _check_number(settings["derivative_filter"], "derivative_filter", low=0.0, strict=True)
    if "on_fresh" in settings and not isinstance(settings["on_fresh"], bool):
        raise SettingsError(owner=None, key="on_fresh", expected="true or false",
                            found=shown(settings["on_fresh"]))


def _name(v: Any, key: str, role: str, names: Sequence[str], what: str) -> str:
    """*v*, the name of a *role* variable of the model, or the error at *key*."""
    return check(v, Names(role, tuple(names)), owner=what, key=key)


def pid_from_settings(model: Any, op: Any, Ts: float, settings: Mapping[str, Any], *,
                      what: str = "pid") -> Any:
    """A :class:`mpcproto.control.pid.PIDController` from a plain settings dict.

    Keys (all optional)
    -------------------
    ``loops``          list of loop specs (see :mod:`mpcproto.control.pid`); a loop that gives
                       ``gain`` is used as is, one without is tuned by the rule
    ``pairs``          list of ``[cv, mv]`` or a table ``{cv = mv}``; default: from ``loops``,
                       else :func:`mpcproto.control.pid.suggest_pairing` (RGA)
    ``rule``           ``"simc"`` (default), ``"imc"`` or ``"ziegler_nichols"``
    ``tau_c``          SIMC closed-loop time constant: a number or a table per CV
    ``lam``            IMC filter time constant: a number or a table per CV
    ``mode``           ``"PID"``/``"PI"`` (IMC, Ziegler-Nichols), a string or a table per CV
    ``fit``            ``"auto"`` (default), ``"fopdt"``, ``"sopdt"``, ``"integrating"``
    ``step_fraction``  step-test size as a fraction of the MV range (default 0.05)
    ``test_duration``  step-test length (default: from the linearized model)
    ``extra_dead_time`` dead time the step test does not see (an analyzer's dead time plus half
                       its cycle): a number or a table per CV; added, with half a sample for the
                       hold, to the fitted dead time before the rule is applied
    ``setpoint_weight``, ``derivative_filter``, ``on_fresh``: applied to every tuned loop
    ``feedforward``, ``ratio``, ``cascade``, ``override``, ``split_range``: the regulatory
                       structures of :mod:`mpcproto.control.regulatory` (keys in
                       docs/scenario-format.md); with any of them the result is a
                       :class:`~mpcproto.control.regulatory.RegulatoryController`

    ``tau_c`` belongs to SIMC, ``lam`` to IMC, ``mode`` to IMC and Ziegler-Nichols: a key the
    chosen rule does not use is refused.  Every value is checked (type and range) before any step
    test runs; a wrong one raises :class:`SettingsError` starting with *what* and the key path.
    """
    from .pid import PIDController, pid_loop_from_spec, suggest_pairing

    if not isinstance(settings, Mapping):
        raise fail(what, None, "a table of PID settings", shown(settings))
    refuse_unknown_keys(settings, _SETTINGS_KEYS, what=what)
    cv_names = list(getattr(model, "cv_names", ()))
    mv_names = list(getattr(model, "mv_names", ()))
    given: dict[tuple[str, str], PIDLoop] = {}
    to_tune: list[tuple[str, str]] = []
    loop_specs = settings.get("loops")
    if loop_specs is not None:
        if not isinstance(loop_specs, (list, tuple)) or not loop_specs:
            raise SettingsError(owner=what, key="loops", expected="a non-empty list of loop tables",
                                found=shown(loop_specs))
        for i, spec in enumerate(loop_specs):
            w = f"loops[{i}]"
            if isinstance(spec, PIDLoop):
                given[(spec.cv, spec.mv)] = spec
                continue
            if not isinstance(spec, Mapping):
                raise SettingsError(owner=what, key=w, expected="a loop table (cv, mv and gain or "
                                    "none to tune it)", found=shown(spec))
            for k, names, role in (("cv", cv_names, "CV"), ("mv", mv_names, "MV")):
                if k not in spec:
                    raise SettingsError(owner=what, key=f"{w}.{k}", expected=f"the key '{k}'",
                                        found=f"keys {', '.join(map(str, spec)) or '(none)'}")
                _name(spec[k], f"{w}.{k}", role, names, what)
            if "gain" not in spec:
                for k in spec:
                    if k not in ("cv", "mv"):
                        raise SettingsError(
                            f"a loop without 'gain' is tuned by the rule and takes only cv "
                            f"and mv; found {shown(k)}. Give 'gain' (and the other settings) or "
                            f"set them at the top of the PID settings.", owner=what, key=f"{w}.{k}")
                to_tune.append((spec["cv"], spec["mv"]))
            else:
                try:
                    lp = pid_loop_from_spec(spec, what=what)
                except SettingsError as e:
                    raise e.replace(owner=what).at(w) from None
                given[(lp.cv, lp.mv)] = lp
    pairs_spec = settings.get("pairs")
    if pairs_spec is not None:
        w = "pairs"
        if isinstance(pairs_spec, Mapping):
            pairs = [(_name(c, f"{w}.{c}", "CV", cv_names, what),
                      _name(m, f"{w}.{c}", "MV", mv_names, what)) for c, m in pairs_spec.items()]
        elif isinstance(pairs_spec, (list, tuple)) and pairs_spec and all(
                isinstance(p, (list, tuple)) and len(p) == 2 for p in pairs_spec):
            pairs = [(_name(c, f"{w}[{i}][0]", "CV", cv_names, what),
                      _name(m, f"{w}[{i}][1]", "MV", mv_names, what))
                     for i, (c, m) in enumerate(pairs_spec)]
        else:
            raise SettingsError(owner=what, key=w, expected="a non-empty list of [cv, mv] pairs or "
                                "a table {cv = mv}", found=shown(pairs_spec))
        to_tune += [p for p in pairs if p not in given and p not in to_tune]
    _check_settings(model, settings, what)
    if any(k in settings for k in _STRUCTURE_KEYS):
        from .regulatory_settings import check_structure_settings

        check_structure_settings(model, {k: settings[k] for k in _STRUCTURE_KEYS if k in settings},
                                 what=what)
    structures = {k: settings[k] for k in _STRUCTURE_KEYS if k in settings}
    if pairs_spec is None and loop_specs is None and not structures:
        from ..linear import linearize

        to_tune = suggest_pairing(linearize(model, op)).pairs
    rule = settings.get("rule", "simc")

    def rule_kw(c: str) -> dict[str, Any]:
        kw: dict[str, Any] = {}
        for key in _RULE_KEYS[rule]:
            if key in settings:
                v = _per_cv(settings[key], c, what, key)
                if v is None and isinstance(settings[key], Mapping):
                    v = settings[key].get("*")
                if v is not None:
                    kw[key] = v
        return kw

    lopts = {k: settings[k] for k in ("setpoint_weight", "derivative_filter", "on_fresh")
             if k in settings}
    ed = settings.get("extra_dead_time", {})
    if not isinstance(ed, Mapping):
        ed = {"*": ed}

    def tune(pairs: Sequence[tuple[str, str]]) -> tuple[list[PIDLoop], list[ProcessFit]]:
        if not pairs:
            return [], []
        return tune_pid_loops(model, op, Ts, pairs, rule=rule, fit=settings.get("fit", "auto"),
                              step_fraction=settings.get("step_fraction", 0.05),
                              test_duration=settings.get("test_duration"),
                              rule_options={c: rule_kw(c) for c, _ in pairs}, loop_options=lopts,
                              extra_dead_time=ed, what=what)

    def on_fit(f: ProcessFit, cv: str, mv: str) -> PIDLoop:
        return rule_on_fit(f, cv, mv, Ts=Ts, rule=rule, rule_options={cv: rule_kw(cv)},
                           loop_options=lopts, extra_dead_time=ed, what=what)[0]

    try:
        tuned, _ = tune(to_tune)
        loops = list(given.values()) + tuned
        if structures:
            from .regulatory_settings import regulatory_from_settings

            return regulatory_from_settings(
                model, op, Ts, structures, loops=loops, tune=tune, on_fit=on_fit,
                step_fraction=settings.get("step_fraction", 0.05),
                test_duration=settings.get("test_duration"), what=what)
        return PIDController.for_model(model, loops)
    except SettingsError as exc:
        if exc.owner == what:
            raise
        raise exc.within(what) from None
