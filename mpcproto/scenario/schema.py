"""Scenario files: TOML text -> a validated, plain-data :class:`Scenario`.

A scenario file is *data only*: it is parsed with the standard library's TOML reader and nothing in it
is evaluated as code.  Every key is checked here; an unknown key, a wrong type or a value out of range
raises :class:`~mpcproto.exceptions.ScenarioError` whose message names the file, the key path (for
example ``disturbances.draw_off.at`` or ``criteria[2].limit``), what was expected and what was found,
with a "did you mean" hint for misspelt keys.

Checks that need the model (are the names in ``setpoints`` CVs of the model? does a signal spec make
sense?) live in :func:`mpcproto.scenario.runner.check_scenario`, which builds the model.

Every key is documented in ``docs/scenario-format.md``.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..exceptions import ScenarioError
from .._specs import plain_copy, shown as _show
from ..model import suggest
# the vocabulary and the limits stay importable from here (mpcproto.scenario.schema.TOP_KEYS...)
from .keys import CRITERION_CHECKS, DISTRIBUTIONS, TOP_KEYS, _Ctx, _split  # noqa: F401
from .sections import (MAX_CASES, MAX_DEPTH, MAX_SAMPLES, _check_depth,  # noqa: F401
                       _model_section, controllers_section, criteria_section, limits_section,
                       operating_point_section, scenario_section, signal_sections,
                       simulator_sections, study_section)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = ["Scenario", "load_scenario", "parse_scenario", "get_path", "set_path",
           "CRITERION_CHECKS", "DISTRIBUTIONS"]


# ----------------------------------------------------------------------------------------- data type
@dataclass(frozen=True)
class Scenario:
    """A validated scenario: plain data (nested dicts/lists of numbers and strings) plus its origin.

    Attributes
    ----------
    name : str
        ``scenario.name`` (defaults to the file's stem).
    data : dict
        The whole scenario with every default filled in; the sections are those of the file
        (``scenario``, ``plant``, ``controller_model``, ``operating_point``, ``controllers``,
        ``setpoints``, ``limits``, ``disturbances``, ``instruments``, ``actuators``, ``faults``,
        ``criteria``, ``study``).
    file : str
        Path of the file it came from (``"<dict>"`` when parsed from a dict).
    """

    name: str
    data: dict
    file: str = "<dict>"
    raw: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def sample_time(self) -> float:
        return self.data["scenario"]["sample_time"]

    @property
    def duration(self) -> float | None:
        return self.data["scenario"]["duration"]

    @property
    def seed(self) -> int:
        return self.data["scenario"]["seed"]

    def get(self, key: str) -> Any:
        """Value at a dotted key path (``"plant.parameters.volume"``)."""
        return get_path(self.data, key, file=self.file)

    def to_json(self) -> str:
        return json.dumps(self.data, sort_keys=True)


def _parts(key: str, file: str) -> list[str | int]:
    try:
        return _split(key)
    except (ValueError, TypeError):
        raise ScenarioError(f"expected a dotted key path such as 'plant.parameters.volume' or "
                            f"'criteria[0].limit'; found {key!r}.", file=file, key=str(key)) from None


def get_path(data: Mapping, key: str, *, file: str = "<dict>") -> Any:
    """Value at a dotted key path; ``criteria[0].limit`` indexes arrays."""
    cur: Any = data
    done: list[str] = []
    for p in _parts(key, file):
        if isinstance(p, int):
            if not isinstance(cur, list) or p >= len(cur):
                raise ScenarioError(f"expected an array with an entry {p}; found {_show(cur)}.",
                                    file=file, key=".".join(done) or key)
            cur = cur[p]
        else:
            if not isinstance(cur, Mapping) or p not in cur:
                known = list(cur) if isinstance(cur, Mapping) else []
                raise ScenarioError(
                    f"expected a key '{p}' at this place of the scenario{suggest(p, known)}; "
                    f"found none (known here: {', '.join(known) or 'nothing'}).",
                    file=file, key=key)
            cur = cur[p]
        done.append(str(p))
    return cur


def set_path(data: dict, key: str, value: Any, *, file: str = "<dict>") -> None:
    """Set the value at a dotted key path in place; missing intermediate tables are created.

    The last key must name an existing value *or* sit in a table that holds name -> value entries
    (``plant.parameters.x``, ``operating_point.mvs.x``): it is then added.
    """
    parts = _parts(key, file)
    cur: Any = data
    for p in parts[:-1]:
        if isinstance(p, int):
            if not isinstance(cur, list) or p >= len(cur):
                raise ScenarioError(f"expected an array with an entry {p}; found {_show(cur)}.",
                                    file=file, key=key)
            cur = cur[p]
        else:
            if not isinstance(cur, dict):
                raise ScenarioError(f"expected a table above '{p}'; found {_show(cur)}.",
                                    file=file, key=key)
            cur = cur.setdefault(p, {})
    last = parts[-1]
    if isinstance(last, int):
        if not isinstance(cur, list) or last >= len(cur):
            raise ScenarioError(f"expected an array with an entry {last}; found {_show(cur)}.",
                                file=file, key=key)
    elif not isinstance(cur, dict):
        raise ScenarioError(f"expected a table to hold '{last}'; found {_show(cur)}.",
                            file=file, key=key)
    cur[last] = value


# ----------------------------------------------------------------------------------------- loading
def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : str or Path
        A ``.toml`` file.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        The file cannot be read, is not valid TOML, or a key is unknown, missing or out of range.
        The message names the file, the key path, what was expected and what was found.
    """
    p = Path(path)
    if p.is_dir():
        tomls = sorted(q.name for q in p.glob("*.toml"))
        hint = (f" It holds {', '.join(tomls[:5])}{', ...' if len(tomls) > 5 else ''}: give one of "
                f"them." if tomls else " Give the path of a .toml file.")
        raise ScenarioError(f"expected a readable scenario file (TOML); found a directory.{hint}",
                            file=str(p))
    try:
        raw_bytes = p.read_bytes()
    except FileNotFoundError:
        raise ScenarioError("expected a readable scenario file (TOML); found no file at this path "
                            f"(looked in {p.resolve().parent}). Check the spelling.",
                            file=str(p)) from None
    except OSError as e:
        raise ScenarioError(f"expected a readable scenario file; found it cannot be read "
                            f"({e.strerror or e}).", file=str(p)) from None
    try:
        raw = tomllib.loads(raw_bytes.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise ScenarioError(f"expected UTF-8 text (TOML); found undecodable bytes ({e.reason} at "
                            f"byte {e.start}).", file=str(p)) from None
    except tomllib.TOMLDecodeError as e:
        raise ScenarioError(f"expected valid TOML; found a syntax error: {e}.", file=str(p)) from None
    except RecursionError:
        # the standard TOML reader recurses once per nested array / inline table
        raise ScenarioError(f"expected tables and arrays nested at most {MAX_DEPTH} deep; found "
                            f"nesting too deep for the TOML reader (hundreds of '[' or '{{').",
                            file=str(p)) from None
    if not raw:
        raise ScenarioError("expected a scenario (at least the [scenario] and [plant] tables); "
                            "found an empty file (no keys: only blanks or comments).", file=str(p))
    # a file name that is not valid UTF-8 reaches Python with surrogate escapes: the default name
    # shows those bytes as U+FFFD so that it can be written to CSV, JSON and XML
    stem = p.stem.encode("utf-8", "surrogateescape").decode("utf-8", "replace")
    return parse_scenario(raw, file=str(p), default_name=stem)
def parse_scenario(raw: Mapping, *, file: str = "<dict>", default_name: str = "scenario") -> Scenario:
    """Validate a scenario given as a (TOML-parsed) mapping; see :func:`load_scenario`.

    The sections are checked in the order of :data:`TOP_KEYS` by :mod:`.sections`.
    """
    c = _Ctx(file)
    raw = c.table(raw, "")
    _check_depth(c, raw)
    c.keys(raw, "", TOP_KEYS, required=("plant", "scenario"))
    data: dict[str, Any] = {}
    scenario_section(c, raw, data, default_name)
    # [plant] and [controller_model]: the model references (mpcproto.models.resolve)
    data["plant"] = _model_section(c, raw["plant"], "plant", required=True)
    data["controller_model"] = _model_section(c, raw.get("controller_model", {}), "controller_model",
                                              required=False)
    operating_point_section(c, raw, data)
    controllers_section(c, raw, data)
    signal_sections(c, raw, data)
    simulator_sections(c, raw, data)
    limits_section(c, raw, data)
    criteria_section(c, raw, data)
    study_section(c, raw, data)
    return Scenario(name=data["scenario"]["name"], data=data, file=file,
                    raw=plain_copy(dict(raw)))
