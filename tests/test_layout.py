"""The package's shape: imports at the top of modules, no import cycles, a torch-free core, and floors:
no module imports from a floor above its own.

Read from the source with Python's own parser (the standard library's ``ast``), so the rules hold
for every module, including ones added later.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).parent.parent / "searcher"
LATE_ALLOWED = ("torch", "plotly", "PIL", "onnx", "onnxruntime")  # heavy libraries a command may never need


def _modules() -> dict[str, ast.Module]:
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        if "spaces" in path.parts:
            continue
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        found[name] = ast.parse(path.read_text(encoding="utf-8"), str(path))
    return found


MODULES = _modules()


def _imported(node: ast.Import | ast.ImportFrom, module: str) -> list[str]:
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    if node.level:  # relative import
        base = module.split(".")[: -node.level] if not module.endswith("__init__") else module.split(".")
        return [".".join([*base, node.module or ""]).rstrip(".")]
    return [node.module or ""]


def _top_level_imports(tree: ast.Module) -> list[ast.Import | ast.ImportFrom]:
    return [node for node in tree.body if isinstance(node, (ast.Import, ast.ImportFrom))]


@pytest.mark.parametrize("module", sorted(MODULES))
def test_imports_sit_at_the_top_except_heavy_libraries(module: str) -> None:
    late = []
    top = set(map(id, _top_level_imports(MODULES[module])))
    for node in ast.walk(MODULES[module]):
        if isinstance(node, (ast.Import, ast.ImportFrom)) and id(node) not in top:
            names = _imported(node, module)
            late += [n for n in names if n.split(".")[0] not in LATE_ALLOWED]
    assert not late, f"{module} imports {late} inside a function or block; import them at the top"


def test_no_import_cycles_inside_the_package() -> None:
    graph: dict[str, set[str]] = {}
    for module, tree in MODULES.items():
        targets = set()
        for node in _top_level_imports(tree):
            for name in _imported(node, module):
                if isinstance(node, ast.ImportFrom) and name in MODULES:
                    # `from package import name`: the name may be a submodule
                    targets |= {f"{name}.{a.name}" for a in node.names if f"{name}.{a.name}" in MODULES}
                while name and name not in MODULES:
                    name = name.rpartition(".")[0]
                if name:
                    targets.add(name)
        graph[module] = targets - {module}
    # a package's __init__ importing its own modules is how packages work; leave those edges out
    for module in graph:
        graph[module] = {t for t in graph[module] if not module.startswith(t + ".")}

    state: dict[str, int] = {}
    path: list[str] = []

    def visit(node: str) -> None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                cycle = path[path.index(nxt):] + [nxt]
                raise AssertionError("import cycle: " + " -> ".join(cycle))
            if nxt not in state:
                visit(nxt)
        path.pop()
        state[node] = 2

    for module in sorted(graph):
        if module not in state:
            visit(module)


@pytest.mark.parametrize("module", sorted(m for m in MODULES if m.startswith("searcher.core")))
def test_the_core_never_imports_torch(module: str) -> None:
    for node in ast.walk(MODULES[module]):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            assert not any(n.split(".")[0] == "torch" for n in _imported(node, module)), module


# The floors, lowest first: a module may import from its own floor and those below, never from above.
# The folder listing follows the data flow: what a candidate is and costs, its int8 arithmetic, the
# images, the torch model, what a run is and records, running it, what it produced, what ships.
FLOORS = (
    ("searcher.errors", "searcher.limits", "searcher.redact"),  # user mistakes, ceilings, secrets out of text
    ("searcher.core", "searcher.files"),  # torch-free: space, plan, cost, gate, census; files read and written safely
    ("searcher.int8",),  # integer-only arithmetic (numpy)
    ("searcher.data",),  # images in
    ("searcher.model",),  # torch: build, train
    ("searcher.run",),  # a run: its configuration, its records, its confirmation rules, its folders
    ("searcher.study",),  # running a run's studies: stores, samplers, loops, workers
    ("searcher.results",),  # what a run produced: tables, report, status, the search's outcome; census files
    ("searcher.ship",),  # export: retrain, test, the files that ship
    ("searcher.cli", "searcher.__main__", "searcher"),  # the public API and the thin shell over it
)


def floor_of(module: str) -> int:
    """Index of the floor a module belongs to (the longest package prefix that names one)."""
    best, length = None, -1
    for index, names in enumerate(FLOORS):
        for name in names:
            if (module == name or module.startswith(name + ".")) and len(name) > length:
                if name == "searcher" and module != "searcher":
                    continue
                best, length = index, len(name)
    assert best is not None, f"{module} is on no floor: add it to FLOORS"
    return best


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_import_from_a_higher_floor(module: str) -> None:
    own = floor_of(module)
    above = []
    for node in ast.walk(MODULES[module]):
        if isinstance(node, ast.ImportFrom) and not node.level and (node.module or "").startswith("searcher."):
            if floor_of(node.module) > own:
                above.append(node.module)
    assert not above, f"{module} (floor {own}: {FLOORS[own]}) imports from higher floors: {above}"


def test_the_floors_fail_an_upward_import() -> None:
    """The check itself: a core module importing the study floor is caught."""
    assert floor_of("searcher.core.cost") < floor_of("searcher.study.worker") < floor_of("searcher.results.status")
    assert floor_of("searcher.run.records") < floor_of("searcher.study.worker")
