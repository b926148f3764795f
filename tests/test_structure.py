"""The codebase's shape, held as tests so it cannot drift back (DEVELOPERS.md, Layout).

Rules of the project, not claims about detection: models/ is pure and never imports stream/;
no module over 500 lines; no private name (leading underscore) imported from another module;
no import cycle between modules (a package and its own submodules aside).
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
MAX_LINES = 500


def modules() -> dict[str, Path]:
    """Dotted module name (models.x, stream.y.z) -> file."""
    found = {}
    for path in sorted([*ROOT.glob("models/**/*.py"), *ROOT.glob("stream/**/*.py")]):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        found[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = path
    return found


def imports(name: str, path: Path, known: dict[str, Path]) -> list[tuple[str, str]]:
    """(module imported, name imported) for every project import in the file, lazy ones included."""
    package = name.split(".") if path.name == "__init__.py" else name.split(".")[:-1]
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if not isinstance(node, ast.ImportFrom):
            continue
        if node.level:
            base = package[:len(package) - node.level + 1]
            target = ".".join(base + ([node.module] if node.module else []))
        else:
            target = (node.module or "").removeprefix("shiftsieve.")
        if target.split(".")[0] not in ("models", "stream"):
            continue
        for alias in node.names:
            full = f"{target}.{alias.name}"
            out.append((full if full in known else target, alias.name))
    return out


MODULES = modules()
GRAPH = {name: imports(name, path, MODULES) for name, path in MODULES.items()}


def test_no_module_is_over_500_lines():
    sizes = {name: len(path.read_text().splitlines()) for name, path in MODULES.items()}
    assert {name: n for name, n in sizes.items() if n > MAX_LINES} == {}


def test_no_private_name_is_imported_from_another_module():
    private = [(name, target, what) for name, edges in GRAPH.items() for target, what in edges
               if what.startswith("_")]
    assert private == []


def test_models_never_import_stream():
    assert [(name, target) for name, edges in GRAPH.items() if name.startswith("models")
            for target, _ in edges if target.startswith("stream")] == []


def test_no_import_cycle():
    def related(a: str, b: str) -> bool:   # a package re-exports its own submodules
        return a.startswith(b + ".") or b.startswith(a + ".")

    edges = {name: {t for t, _ in targets if t in MODULES and t != name and not related(name, t)}
             for name, targets in GRAPH.items()}
    state: dict[str, int] = {}   # 1 on the stack, 2 done
    cycles = []

    def visit(node: str, stack: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(edges[node]):
            if state.get(nxt) == 1:
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt, stack + [nxt])
        state[node] = 2

    for name in sorted(edges):
        if name not in state:
            visit(name, [name])
    assert cycles == []


def test_the_checks_see_the_code():
    # Guards the guards: the walk finds the packages and their imports (an empty walk passes all).
    assert {"models.detector", "stream.pipeline", "stream.kafka"} <= set(MODULES)
    assert ("stream.engine", "Engine") in GRAPH["stream.pipeline"]
    assert any(target.startswith("models.") for target, _ in GRAPH["models.detector"])
