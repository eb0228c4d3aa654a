"""The package's import structure: no circle of imports, and no layer imports a higher one.

Every import of a module of the package counts, at the top of a file or inside a function (a lazy
import is still a dependency).  The layers are those of DEVELOPERS.md's module map; a new module
must be given its layer here.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "mpcproto"

#: module prefix -> layer (the longest matching prefix decides)
LAYERS = {
    "mpcproto.exceptions": 0, "mpcproto._version": 0, "mpcproto._deps": 0, "mpcproto.validation": 0,
    "mpcproto._specs": 1, "mpcproto.model": 1, "mpcproto.models": 1, "mpcproto.trajectory": 1,
    "mpcproto.layout": 1,
    "mpcproto.operating": 2, "mpcproto.linear": 2, "mpcproto.stepper": 2, "mpcproto.responses": 2,
    "mpcproto.target_problem": 2, "mpcproto.realization": 2, "mpcproto.step_fit": 2,
    "mpcproto.design": 2, "mpcproto.continuation": 2,
    "mpcproto.control": 3,
    "mpcproto.sim": 4,
    "mpcproto.analysis": 5,
    "mpcproto.store": 6, "mpcproto.compare": 6, "mpcproto.scenario": 6, "mpcproto.report": 6,
    "mpcproto.export": 6,
    "mpcproto.cli": 7,
    "mpcproto": 8,          # the public namespace re-exports everything
}


#: upward imports known and not yet removed (a ratchet: a new one fails the test, and a removed one
#: must be taken off this list).  Empty: the closed-loop step tests of the control layer (a
#: cascade's outer loop tuned on the closed inner loop, an MPC identified over closed flow loops)
#: step the layer-2 plant stepper themselves (mpcproto/control/step_tests.py).
KNOWN_UPWARD: set[tuple[str, str]] = set()


def _modules() -> dict[str, Path]:
    out = {}
    for p in ROOT.rglob("*.py"):
        parts = list(p.relative_to(ROOT.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


MODULES = _modules()


def _targets(mod: str, node: ast.AST) -> list[str]:
    if isinstance(node, ast.Import):
        return [a.name for a in node.names if a.name in MODULES]
    assert isinstance(node, ast.ImportFrom)
    if node.level:
        base = mod.split(".")
        if MODULES[mod].name != "__init__.py":
            base = base[:-1]
        base = base[:len(base) - (node.level - 1)]
        name = ".".join(base + ([node.module] if node.module else []))
    else:
        name = node.module or ""
    subs = [f"{name}.{a.name}" for a in node.names if f"{name}.{a.name}" in MODULES]
    # `from . import a` runs the package's __init__ as well: an edge to the package too
    return ([name] if name in MODULES else []) + subs


def _graph() -> dict[str, set[str]]:
    g = {}
    for mod, path in MODULES.items():
        deps = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                deps.update(t for t in _targets(mod, node) if t != mod)
        g[mod] = deps
    return g


def _layer(mod: str) -> int:
    best = max((k for k in LAYERS if mod == k or mod.startswith(k + ".")), key=len, default=None)
    if best is None:
        pytest.fail(f"module {mod} has no layer in tests/test_architecture.py::LAYERS")
    return LAYERS[best]


def test_every_module_has_a_layer():
    for mod in MODULES:
        _layer(mod)


def test_no_layer_imports_a_higher_one():
    upward = {(m, d) for m, deps in _graph().items() for d in deps if _layer(d) > _layer(m)}
    bad = [f"{m} (layer {_layer(m)}) imports {d} (layer {_layer(d)})"
           for m, d in sorted(upward - KNOWN_UPWARD)]
    assert not bad, "upward imports:\n" + "\n".join(bad)
    gone = sorted(KNOWN_UPWARD - upward)
    assert not gone, f"no longer imported upward (take them off KNOWN_UPWARD): {gone}"


def test_no_circle_of_imports():
    g = _graph()
    # a package's __init__ re-exporting its own submodules is not a circle: drop package -> own
    # submodule edges (the submodules must then not import the package itself, checked below)
    for m in g:
        g[m] = {d for d in g[m] if not d.startswith(m + ".")}
    state: dict[str, int] = {}
    stack: list[str] = []
    cycles: list[list[str]] = []

    def visit(m: str) -> None:
        state[m] = 1
        stack.append(m)
        for d in sorted(g[m]):
            if state.get(d) == 1:
                cycles.append(stack[stack.index(d):] + [d])
            elif d not in state:
                visit(d)
        stack.pop()
        state[m] = 2

    for m in sorted(g):
        if m not in state:
            visit(m)
    assert not cycles, "circles of imports:\n" + "\n".join(" -> ".join(c) for c in cycles)


def test_no_module_imports_its_own_package():
    # a submodule that imports its package (`from . import x`, `from .. import y`) closes a circle
    # with the package's __init__, which imports its submodules
    bad = [f"{m} imports {d}" for m, deps in _graph().items() for d in sorted(deps)
           if m.startswith(d + ".")]
    assert not bad, "\n".join(bad)
