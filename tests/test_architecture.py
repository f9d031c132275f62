"""The package's shape: imports only downward, no private names across modules, small files.

Every import counts, those inside functions included: a function-level import
hides a cycle from the interpreter, not from the design. The floors are the
layers of DEVELOPERS.md; a module may import its own floor or lower ones.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "splice"
MAX_FILE_LINES = 500
MAX_FUNCTION_LINES = 80
MAX_LINE_LENGTH = 120  # DEVELOPERS.md and ../shared/STYLE.md

# DEVELOPERS.md "Layers": the first dotted part under splice -> floor
FLOORS = {
    "errors": 1, "fileio": 1, "folders": 1, "version": 1, "compare": 1, "copies": 1, "progress": 1, "pictures": 1,
    "limits": 1, "caches": 1,
    "warps": 2, "distort": 2, "data": 2, "imagefolder": 2, "imagefiles": 2, "recipes": 2, "models": 2,
    "sources": 3, "graph": 3,
    "schema": 3, "manifest": 4, "surgery": 4, "hooks": 4, "objects": 4,
    "store": 5,
    "verification": 6, "exporting": 6,
    "training": 7, "options": 7, "evaluation": 7, "inspection": 7, "adapt": 7,
    "api": 8, "cli": 8, "cliargs": 8, "demo": 8, "__main__": 8, "__init__": 8,
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(ROOT.rglob("*.py"))}


MODULES = _modules()


def _package_of(name: str, path: Path) -> str:
    return name if path.name == "__init__.py" else name.rpartition(".")[0]


def _resolve(importer: str, path: Path, node: ast.ImportFrom) -> str:
    if not node.level:
        return node.module or ""
    base = _package_of(importer, path).split(".")
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(name: str, path: Path, source: str | None = None):
    """``(target module, imported name or None, line)`` for every import of a splice module in ``path``."""
    tree = ast.parse(source if source is not None else path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "splice":
                    yield alias.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom):
            target = _resolve(name, path, node)
            if target.split(".")[0] != "splice":
                continue
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                if sub in MODULES:  # `from . import graph` imports the module splice.graph
                    yield sub, None, node.lineno
                else:
                    yield target, alias.name, node.lineno


def _edges() -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {name: set() for name in MODULES}
    for name, path in MODULES.items():
        for target, _, _ in _imports(name, path):
            if target in MODULES and target != name:
                edges[name].add(target)
    return edges


def _cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(edges[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(edges):
        if v not in index:
            visit(v)
    return found


def _floor(module: str) -> int:
    parts = module.split(".")
    key = parts[1] if len(parts) > 1 else "__init__"
    return FLOORS[key]


def test_the_walker_sees_function_level_imports_and_cycles():
    # a back edge hidden inside a function is still an edge, and two such edges make a cycle
    source = "def f():\n    from .b import g\n    return g\n"
    found = [(t, n) for t, n, _ in _imports("splice.a", ROOT / "a.py", source)]
    assert found == [("splice.b", "g")]
    assert _cycles({"a": {"b"}, "b": {"a"}, "c": {"a"}}) == [["a", "b"]]


def test_no_import_cycles():
    cycles = _cycles(_edges())
    assert not cycles, "import cycles (function-level imports count): " + "; ".join(" <-> ".join(c) for c in cycles)


def _private(name: str) -> bool:
    return any(part.startswith("_") and not part.startswith("__") for part in name.split("."))


def _private_imports(source: str):
    """``(line, what)`` for every import of an underscore name or from an underscore module, of any package
    (``from .probe import _run``, ``from torch.utils._pytree import ...``, ``import pkg._impl``)."""
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if _private(alias.name):
                    yield node.lineno, alias.name
        elif isinstance(node, ast.ImportFrom):
            if _private(node.module or ""):
                yield node.lineno, f"{node.module}"
            for alias in node.names:
                if _private(alias.name):
                    yield node.lineno, f"{alias.name} from {'.' * node.level}{node.module or ''}"


def test_the_private_import_walker_sees_every_kind():
    source = ("from .probe import _run, ok\nfrom torch.utils._pytree import tree_leaves\nimport pkg._impl\n"
              "import datetime as _dt\nfrom __future__ import annotations\nfrom . import _io\n")
    assert [line for line, _ in _private_imports(source)] == [1, 2, 3, 6]


def test_no_private_names_across_modules():
    # each module's underscore names are its own: a name another module needs is named without one (and kept
    # out of __all__ when it is not part of the documented API)
    offenders = [f"{path.relative_to(ROOT.parent)}:{line} imports {what}"
                 for name, path in MODULES.items()
                 for line, what in _private_imports(path.read_text(encoding="utf-8"))]
    assert not offenders, "underscore names taken from another module: " + "; ".join(offenders)


def test_imports_point_down_the_floors():
    upward = []
    for name, targets in _edges().items():
        for target in targets:
            if _floor(target) > _floor(name):
                upward.append(f"{name} (floor {_floor(name)}) imports {target} (floor {_floor(target)})")
    assert not upward, "imports that point up a floor: " + "; ".join(sorted(upward))


def test_every_module_has_a_floor():
    missing = sorted({n.split(".")[1] for n in MODULES if "." in n} - set(FLOORS))
    assert not missing, f"modules missing from the floor table (DEVELOPERS.md and FLOORS): {missing}"


@pytest.mark.parametrize("path", sorted(MODULES.values()), ids=lambda p: str(p.relative_to(ROOT.parent)))
def test_file_size(path):
    lines = len(path.read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_FILE_LINES, f"{path.name} has {lines} lines (limit {MAX_FILE_LINES}); split it by concern"


def test_line_length():
    long = [f"{path.relative_to(ROOT.parent)}:{i}" for path in MODULES.values()
            for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1) if len(line) > MAX_LINE_LENGTH]
    assert not long, f"lines over {MAX_LINE_LENGTH} characters: " + ", ".join(long)


def test_function_size():
    long = []
    for path in MODULES.values():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                if n > MAX_FUNCTION_LINES:
                    long.append(f"{path.relative_to(ROOT.parent)}:{node.lineno} {node.name} ({n} lines)")
    assert not long, f"functions over {MAX_FUNCTION_LINES} lines: " + "; ".join(long)


def test_every_package_ships_in_the_wheel():
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib

    declared = set(tomllib.loads((ROOT.parent / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    packages = {_module_name(p) for p in ROOT.rglob("__init__.py")}
    assert packages <= declared, f"packages missing from pyproject.toml: {sorted(packages - declared)}"
