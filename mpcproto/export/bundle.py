"""The round-trip proof of an export bundle (``mpcproto export --check``), and the bundle's reading
functions, which live on the control layer (:mod:`mpcproto.control.bundle`) so that
``PredictiveController.from_bundle`` needs nothing above it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from ..control.bundle import (BUNDLE_FILE, FORMAT, FORMAT_VERSION, REPLAY_FILE, SCHEMA_FILE,
                              TOLERANCE, _bundle_path, compare_moves, controller_from_bundle,
                              decode_array, discrete_model_from_bundle, encode_array,
                              load_schema, read_bundle, replay_moves, settings_from_plain,
                              settings_to_plain, sha256_of, validate_bundle)
from ..control.mpc import PredictiveController
from ..exceptions import MpcprotoError, SettingsError

__all__ = ["BUNDLE_FILE", "FORMAT", "FORMAT_VERSION", "REPLAY_FILE", "SCHEMA_FILE", "TOLERANCE",
           "check_bundle", "compare_moves", "controller_from_bundle", "decode_array",
           "discrete_model_from_bundle", "encode_array", "load_schema", "read_bundle",
           "replay_moves", "settings_from_plain", "settings_to_plain", "sha256_of",
           "validate_bundle"]


def check_bundle(path: str | Path, *, tolerance: float = TOLERANCE, cls: type | None = None
                 ) -> dict[str, Any]:
    """Re-run the round-trip proof of a bundle from the bundle alone.

    1. ``bundle.json`` is read and checked against its schema;
    2. every file listed under ``files`` must still have its recorded SHA-256;
    3. the controller is rebuilt (``PredictiveController.from_bundle``) and the recorded run
       (``replay.json``) is replayed through it: every move must equal the original's to
       *tolerance* x the MV's ``scale``.

    Returns ``{"passed", "schema", "files", "samples", "max_deviation", "first_difference",
    "tolerance", "message"}``; ``passed`` is False unless every step held (a missing replay is
    a failure, not a pass).
    """
    if cls is None:
        cls = PredictiveController
    root = _bundle_path(path).parent
    f = root / BUNDLE_FILE
    doc = read_bundle(f)
    report: dict[str, Any] = {"passed": False, "schema": validate_bundle(doc, file=str(f)),
                              "files": {}, "samples": 0, "max_deviation": None,
                              "first_difference": None, "tolerance": float(tolerance), "message": ""}
    problems = []
    for name, digest in (doc.get("files") or {}).items():
        p = root / name
        ok = p.is_file() and sha256_of(p) == digest
        report["files"][name] = ok
        if not ok:
            problems.append(f"{name} {'is missing' if not p.is_file() else 'was changed after export'}")
    rp = root / REPLAY_FILE
    if not rp.is_file():
        report["message"] = f"{rp}: the recorded run is missing; nothing to compare with."
        return report
    try:
        replay = json.loads(rp.read_text())
    except ValueError as exc:
        # the JSON reader's own words (a foreign text) say where the file breaks
        raise SettingsError(file=str(rp), expected="JSON",
                            found=f"a file that does not parse ({exc})") from None
    ctl = cls.from_bundle(root)
    try:
        ours, _ = replay_moves(ctl, replay)
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        if isinstance(exc, MpcprotoError):
            raise
        # Python's own words for the broken entry (a foreign exception's text) close the message
        raise SettingsError(file=str(rp), expected="the recorded run written by 'mpcproto export'",
                            found=f"a record that cannot be replayed ({type(exc).__name__}: "
                                  f"{exc})") from None
    scales = ctl._resolved["mv_scale"]      # as the rebuilt controller uses them
    cmp = compare_moves(ours, decode_array(replay["steps"]["u"]).reshape(-1, ctl.dmodel.nu)
                        if replay["steps"]["u"] else np.zeros((0, ctl.dmodel.nu)),
                        np.asarray(scales, float), tolerance)
    report.update(samples=int(ours.shape[0]), max_deviation=cmp["max_deviation"],
                  first_difference=cmp["first_difference"])
    if cmp["first_difference"] is not None:
        k, j = cmp["first_difference"]["sample"], cmp["first_difference"]["mv_index"]
        problems.append(f"the rebuilt controller's move of '{ctl.dmodel.mv_names[j]}' differs at "
                        f"sample {k} (t = {replay['steps']['t'][k]:g}) by more than {tolerance:g} "
                        f"of its scale")
    if cmp["message"]:
        problems.append(cmp["message"])
    if ours.shape[0] == 0:
        problems.append("the recorded run has no samples")
    report["passed"] = not problems and cmp["passed"]
    report["message"] = "; ".join(problems)
    return report
