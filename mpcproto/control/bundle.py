"""Read a controller bundle back, rebuild its predictive controller, and re-run the round-trip proof.

This module uses only the model, linear and control layers (no scenario, no simulator), so a
bundle can be checked where only the bundle is: ``PredictiveController.from_bundle(DIR)`` reads
``bundle.json`` (discrete model matrices, names, operating point, settings) and builds the
controller; :func:`check_bundle` replays the recorded closed-loop run (``replay.json``: every
input the original controller was given, sample by sample, and the moves it answered) through
the rebuilt controller and compares the moves.

Why a replay proves the closed loop: a controller's moves depend only on what it is given
(measurements, DVs, targets, the applied MVs) and on its own state.  The recorded inputs are those
of the original's closed-loop run; if the rebuilt controller answers the first sample with the
same moves, the plant (deterministic, same seed) gives it the same next inputs, and so on: equal
moves on the replay are equal moves on the closed loop, and the first sample where they differ
is where the closed loops would part.  ``tests/test_export.py`` also runs the real closed loop
with the rebuilt controller on every shipped scenario.

The format is documented in ``docs/export-bundle.md``; its JSON Schema is
``mpcproto/control/bundle.schema.json`` (:func:`load_schema`).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import SettingsError

__all__ = ["FORMAT", "FORMAT_VERSION", "BUNDLE_FILE", "REPLAY_FILE", "load_schema", "read_bundle",
           "validate_bundle", "discrete_model_from_bundle", "controller_from_bundle",
           "settings_to_plain", "settings_from_plain", "replay_moves", "compare_moves",
           "sha256_of", "TOLERANCE"]

FORMAT = "mpcproto-controller-bundle"
FORMAT_VERSION = 1
BUNDLE_FILE = "bundle.json"
REPLAY_FILE = "replay.json"
SCHEMA_FILE = Path(__file__).with_name("bundle.schema.json")
#: the round trip holds when every move agrees to this fraction of its MV's scale
TOLERANCE = 1e-8

#: per-variable settings whose infinite value ("no limit") is written as null
_OPEN = {"cv": {"low": -math.inf, "high": math.inf},
         "mv": {"low": -math.inf, "high": math.inf, "max_move": math.inf}}


def sha256_of(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def load_schema() -> dict[str, Any]:
    """The JSON Schema of ``bundle.json`` (draft 2020-12), shipped with the package."""
    return json.loads(SCHEMA_FILE.read_text())


def _bundle_path(path: str | Path) -> Path:
    p = Path(path)
    return p / BUNDLE_FILE if p.is_dir() or not p.suffix else p


def read_bundle(path: str | Path) -> dict[str, Any]:
    """``bundle.json`` of the bundle directory *path* (or the file itself), checked.

    Raises :class:`SettingsError` naming the file when it is missing, not JSON, not a bundle, of a
    newer format version, or does not match the schema.
    """
    f = _bundle_path(path)
    if not f.is_file():
        raise SettingsError(file=str(f), expected=f"a controller bundle (a directory holding "
                            f"{BUNDLE_FILE}, written by 'mpcproto export')", found="no such file")
    try:
        doc = json.loads(f.read_text())
    except (ValueError, UnicodeDecodeError) as exc:
        # the JSON reader's own words say where the file breaks: shown as the found part
        raise SettingsError(file=str(f), expected="JSON",
                            found=f"a file that does not parse ({exc})") from None
    validate_bundle(doc, file=str(f))
    return doc


def validate_bundle(doc: Any, *, file: str = BUNDLE_FILE) -> str:
    """Check *doc* against the bundle format; returns how ("jsonschema" or "basic checks").

    The format name and version are checked first (a clear message for a file that is not a
    bundle at all); then the JSON Schema with the ``jsonschema`` package when it is installed,
    else the keys the controller is rebuilt from.
    """
    if not isinstance(doc, Mapping) or doc.get("format") != FORMAT:
        found = doc.get("format") if isinstance(doc, Mapping) else type(doc).__name__
        raise SettingsError(file=file, key="format", expected=repr(FORMAT), found=repr(found))
    ver = doc.get("format_version")
    if not isinstance(ver, int) or isinstance(ver, bool) or not 1 <= ver <= FORMAT_VERSION:
        raise SettingsError(file=file, key="format_version", expected=f"an int from 1 to "
                            f"{FORMAT_VERSION} (this mpcproto reads those)", found=repr(ver))
    try:
        import jsonschema
    except ImportError:
        for key in ("names", "operating_point", "model", "settings", "controller"):
            if key not in doc:
                raise SettingsError(file=file, key=key, expected=f"the key '{key}'",
                                    found=f"keys {sorted(doc)}")
        return "basic checks (install jsonschema for the full schema)"
    validator = jsonschema.Draft202012Validator(load_schema())
    errors = sorted(validator.iter_errors(doc), key=lambda e: list(map(str, e.absolute_path)))
    if errors:
        e = errors[0]
        where = ".".join(str(p) for p in e.absolute_path) or None
        more = f" ({len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
        # the schema validator's own words are the found part
        raise SettingsError(file=file, key=where, expected="a value the bundle schema allows",
                            found=f"{e.message}{more}")
    return "jsonschema"


# ------------------------------------------------------------------------------------ settings
def _plain_number(v: Any) -> Any:
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    return v


def settings_to_plain(ctl: Any) -> dict[str, Any]:
    """Every setting of a :class:`~mpcproto.control.mpc.PredictiveController`, defaults filled in,
    as JSON-able data (the keys of ``from_settings``); an infinite limit ("no limit") is null; a
    scale or move weight left to its default is the one the built controller derived (so the
    bundle rebuilds the same controller without the model's physical bounds)."""
    from .mpc_settings import CV_KEYS, DV_KEYS, MV_KEYS, SETTINGS_KEYS

    m = ctl.dmodel
    resolved = getattr(ctl, "_resolved", None) or {}
    out: dict[str, Any] = {}
    for k in SETTINGS_KEYS:
        if k in ("cv", "mv", "dv"):
            continue
        v = getattr(ctl, k)
        out[k] = dict(v) if isinstance(v, Mapping) else _plain_number(v)
    for role, names, keys in (("cv", m.cv_names, CV_KEYS), ("mv", m.mv_names, MV_KEYS),
                              ("dv", m.dv_names, DV_KEYS)):
        given = getattr(ctl, role) or {}
        scales = resolved.get(f"{role}_scale")
        table = {}
        for i, n in enumerate(names):
            row = dict(keys)
            row.update(given.get(n, {}))
            if row.get("scale", 0) is None and scales is not None:
                row["scale"] = float(scales[i])
            if role == "mv" and row["move_weight"] is None and "move_weight_per_scale" in resolved:
                row["move_weight"] = float(resolved["move_weight_per_scale"][i])
            for k, v in row.items():
                v = _plain_number(v)
                if k in _OPEN.get(role, {}) and isinstance(v, float) and math.isinf(v):
                    v = None
                row[k] = v
            table[n] = row
        out[role] = table
    return out


def settings_from_plain(settings: Mapping[str, Any]) -> dict[str, Any]:
    """Inverse of :func:`settings_to_plain`: null limits become infinite again."""
    out = dict(settings)
    for role, opens in _OPEN.items():
        table = settings.get(role)
        if not isinstance(table, Mapping):
            continue
        out[role] = {n: {k: (opens[k] if k in opens and v is None else v) for k, v in row.items()}
                     if isinstance(row, Mapping) else row for n, row in table.items()}
    return out


# ------------------------------------------------------------------------------------ rebuild
def _matrix(doc: Mapping[str, Any], key: str, rows: int, cols: int, file: str) -> np.ndarray:
    M = np.asarray(doc[key], float) if doc[key] else np.zeros((rows, cols))
    M = M.reshape(rows, cols) if M.size == rows * cols else M
    if M.shape != (rows, cols):
        raise SettingsError(file=file, key=f"model.discrete.{key}",
                            expected=f"a {rows} x {cols} matrix", found=f"shape {M.shape}")
    return M


def discrete_model_from_bundle(doc: Mapping[str, Any], *, file: str = BUNDLE_FILE) -> Any:
    """The :class:`~mpcproto.linear.DiscreteLinearModel` (with its operating point) of a bundle."""
    from ..linear import DiscreteLinearModel
    from ..operating import OperatingPoint

    names = doc["names"]
    op = doc["operating_point"]
    dsc = doc["model"]["discrete"]
    nx, nu, nd, ny = (len(dsc["state_names"]), len(names["mvs"]), len(names["dvs"]),
                      len(names["cvs"]))
    values = {}
    for role, key in (("states", "x"), ("mvs", "u"), ("dvs", "d"), ("cvs", "y")):
        given = op[role]
        missing = [n for n in names[role] if n not in given]
        if missing:
            raise SettingsError(file=file, key=f"operating_point.{role}",
                                expected=f"a value for every name in 'names.{role}'",
                                found=f"none for {missing}")
        values[key] = np.array([float(given[n]) for n in names[role]], float)
    point = OperatingPoint(model=str(op["model"]), x=values["x"], u=values["u"], d=values["d"],
                           y=values["y"], p=np.array(list(op.get("parameters", {}).values()), float),
                           state_names=tuple(names["states"]), mv_names=tuple(names["mvs"]),
                           dv_names=tuple(names["dvs"]), cv_names=tuple(names["cvs"]),
                           residual=float(op.get("residual", 0.0)), stable=op.get("stable"))
    mats = {k: _matrix(dsc, k, r, c, file) for k, r, c in (
        ("A", nx, nx), ("B", nx, nu), ("Bd", nx, nd), ("C", ny, nx), ("D", ny, nu), ("Dd", ny, nd))}
    return DiscreteLinearModel(**mats, Ts=float(dsc["sample_time"]), op=point,
                               state_names=tuple(dsc["state_names"]),
                               n_plant_states=int(dsc["plant_states"]),
                               time_unit=str(doc.get("time_unit", "s")))


def controller_from_bundle(cls: type, path: str | Path) -> Any:
    """``cls.from_settings(model of the bundle, settings of the bundle).build()``, named by its label.

    The body of ``PredictiveController.from_bundle``.  Bad settings raise the controller's own
    :class:`SettingsError`, prefixed with the bundle file.
    """
    f = _bundle_path(path)
    doc = read_bundle(f)
    dmodel = discrete_model_from_bundle(doc, file=str(f))
    try:
        ctl = cls.from_settings(dmodel, settings_from_plain(doc["settings"])).build()
    except SettingsError as exc:
        raise exc.at("settings").replace(file=str(f)) from None
    ctl.name = str(doc["controller"]["label"])
    return ctl


# ------------------------------------------------------------------------------------ replay
def encode_array(a: Any) -> Any:
    """Nested lists of an array, NaN and infinities as the strings "nan", "inf", "-inf"."""
    if a is None:
        return None
    arr = np.asarray(a, float)

    def enc(v: Any) -> Any:
        if isinstance(v, list):
            return [enc(x) for x in v]
        return v if math.isfinite(v) else ("nan" if math.isnan(v) else ("inf" if v > 0 else "-inf"))

    return enc(arr.tolist())


def decode_array(v: Any) -> np.ndarray | None:
    """Inverse of :func:`encode_array` (numpy parses "nan", "inf" and "-inf")."""
    return None if v is None else np.array(v, dtype=float)


def replay_moves(ctl: Any, replay: Mapping[str, Any]) -> tuple[np.ndarray, list[str]]:
    """Feed the recorded inputs of *replay* to *ctl* sample by sample; its moves and statuses."""
    from .base import Measurement, Targets
    from ..operating import OperatingPoint

    r = replay["reset"]
    m = ctl.dmodel
    op = OperatingPoint(model=str(r.get("model", "plant")), x=decode_array(r["x"]),
                        u=decode_array(r["u"]), d=decode_array(r["d"]), y=decode_array(r["y"]),
                        p=np.zeros(0), state_names=tuple(r.get("state_names", ())),
                        mv_names=tuple(m.mv_names), dv_names=tuple(m.dv_names),
                        cv_names=tuple(m.cv_names))
    ctl.reset(op, float(r["t0"]))
    s = replay["steps"]
    moves, status = [], []
    for k, t in enumerate(s["t"]):
        meas = Measurement(y=decode_array(s["y"][k]), taken_at=decode_array(s["taken_at"][k]),
                           fresh=np.asarray(s["fresh"][k], bool))
        targets = Targets(setpoint=decode_array(s["setpoint"][k]),
                          cv_low=decode_array(s["cv_low"][k]), cv_high=decode_array(s["cv_high"][k]),
                          mv_low=decode_array(s["mv_low"][k]), mv_high=decode_array(s["mv_high"][k]),
                          mv_rate=decode_array(s["mv_rate"][k]))
        fc = decode_array(s["dv_forecast"][k]) if s.get("dv_forecast") else None
        kw = {}
        if replay.get("readback"):
            kw["u_applied"] = decode_array(s["u_applied"][k])
        if s.get("setpoint_program"):
            kw["setpoint_program"] = decode_array(s["setpoint_program"][k])
        out = ctl.step(float(t), meas, decode_array(s["dv"][k]), targets, fc, **kw)
        moves.append(np.asarray(out.u, float).reshape(-1))
        status.append(str(out.status))
    return np.array(moves).reshape(len(moves), m.nu), status


def compare_moves(ours: np.ndarray, theirs: np.ndarray, scales: np.ndarray,
                  tolerance: float = TOLERANCE) -> dict[str, Any]:
    """Largest move difference as a fraction of each MV's scale, and where it first exceeds
    *tolerance*."""
    theirs = np.asarray(theirs, float)
    if ours.shape != theirs.shape:
        return {"passed": False, "max_deviation": None, "first_difference": None,
                "message": f"the rebuilt controller gave {ours.shape[0]} x {ours.shape[1] if ours.ndim > 1 else 0} "
                           f"moves; the record holds {theirs.shape}."}
    dev = np.abs(ours - theirs) / np.asarray(scales, float)
    dev[np.isnan(dev) & ~(np.isnan(ours) & np.isnan(theirs))] = np.inf
    dev = np.nan_to_num(dev, nan=0.0)
    worst = float(dev.max()) if dev.size else 0.0
    bad = np.argwhere(dev > tolerance)
    first = None if bad.size == 0 else {"sample": int(bad[0][0]), "mv_index": int(bad[0][1])}
    return {"passed": bool(bad.size == 0 and ours.shape[0] > 0), "max_deviation": worst,
            "first_difference": first, "message": ""}

