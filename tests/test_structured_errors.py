"""Every refusal of the package carries its place as fields, not only as text (issue: one
validation and error layer).

A ``raise SettingsError("...")`` / ``ModelError("...")`` / ``ScenarioError("...")`` with free text
only and no ``owner=`` / ``key=`` / ``file=`` keyword is an error a caller could place only by
reading its text back.  This test finds them in the source (by the syntax tree) and holds them to
the list below, which may only shrink; ``fail(...)`` / ``check(...)`` / ``validate(...)`` of
:mod:`mpcproto.validation` build structured errors and are not counted.  Common practice, no
source: a ratchet that fails when a new unplaced refusal is written.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from mpcproto.exceptions import ScenarioError, SettingsError

PKG = Path(__file__).resolve().parents[1] / "mpcproto"
ERRORS = {"SettingsError", "ModelError", "ScenarioError", "OperatingPointError"}
PLACING = {"owner", "key", "file"}

#: Files allowed free-text refusals, with at most this many (lower it as they are converted).
#: What is left: the model layer's ModelError checks of a model's own definition (raised while a
#: model is written in Python, placed at the model's section by models/resolve.py when they come
#: from a scenario), and OperatingPointError results of a steady-state search (outcomes of a
#: solve, not input checks).
ALLOWED: dict[str, int] = {
    "mpcproto/continuation.py": 1,
    "mpcproto/layout.py": 5,
    "mpcproto/model.py": 11,
    "mpcproto/models/library.py": 1,
    "mpcproto/models/transfer_matrix.py": 5,
    "mpcproto/models/transfer_table.py": 3,
    "mpcproto/operating.py": 5,
    "mpcproto/target_problem.py": 1,
}


def _unplaced(path: Path) -> list[int]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    lines = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Raise) or not isinstance(node.exc, ast.Call):
            continue
        f = node.exc.func
        name = f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else ""
        if name not in ERRORS:
            continue
        kws = {k.arg for k in node.exc.keywords}
        if None in kws or kws & PLACING:     # **fields passes them on; a keyword places it
            continue
        lines.append(node.lineno)
    return lines


def _census() -> dict[str, list[int]]:
    out = {}
    for p in sorted(PKG.rglob("*.py")):
        found = _unplaced(p)
        if found:
            out[p.relative_to(PKG.parent).as_posix()] = found
    return out


def test_no_new_unplaced_refusal():
    census = _census()
    over = {f: lines for f, lines in census.items() if len(lines) > ALLOWED.get(f, 0)}
    assert not over, ("refusals with free text only (give them owner=/key=, or use "
                      "validation.fail/check): " + "; ".join(f"{f} lines {v}" for f, v in over.items()))


def test_the_ratchet_is_tight():
    # a file converted since must leave the list (else the list hides new free-text refusals)
    census = _census()
    loose = {f: (n, len(census.get(f, []))) for f, n in ALLOWED.items() if len(census.get(f, [])) < n}
    assert not loose, f"lower ALLOWED for: {loose} (allowed, now)"


def test_the_census_sees_both_forms(tmp_path):
    # the finder itself: a free-text raise is counted, a placed one and fail(...) are not
    src = tmp_path / "m.py"
    src.write_text("def f(x):\n"
                   "    if x:\n        raise SettingsError('free text')\n"
                   "    if x > 1:\n        raise SettingsError('t', owner='F', key='x')\n"
                   "    raise fail('F', 'x', 'a number', x)\n", encoding="utf-8")
    assert _unplaced(src) == [3]


def test_a_placed_error_keeps_its_fields_through_at_and_in_file():
    e = SettingsError(owner="PIDLoop", key="gain", expected="a number", found="'x'")
    s = e.at("controllers.pid.loops[0]").in_file("plant.toml")
    assert isinstance(s, ScenarioError)
    assert (s.file, s.key, s.expected, s.found) == ("plant.toml", "controllers.pid.loops[0].gain",
                                                    "a number", "'x'")
    with pytest.raises(ScenarioError, match=r"plant\.toml: key 'controllers\.pid\.loops\[0\]\.gain'"):
        raise s
