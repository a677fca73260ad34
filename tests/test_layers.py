"""The layers of DEVELOPERS.md run one way: an import graph of the package, the imports inside
functions included, has no circle and no arrow from a lower layer to a higher one."""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: layer of each module by name (higher imports lower); a module not named here is core
SERVICES = {"playback", "scan", "optimise", "optimise_report", "search_plots", "demo", "testing"}
API = {"api", "results"}
FOUNDATION = {"errors", "_json", "_atomic", "_format", "units", "_config", "plausible", "catalog", "profiles"}


def layer(module: str) -> tuple[int, str]:
    parts = module.split(".")
    top = parts[1] if len(parts) > 1 else ""
    if top in ("cli", "__main__"):
        return 6, "command line"
    if top in API:
        return 5, "public API"
    if top in SERVICES:
        return 4, "services"
    if top in ("drivers", "emulators"):
        return 3, "deliveries and emulators"
    if top == "wire":
        return 1, "wire codecs"
    if top in FOUNDATION or module == "sweepgen":
        return 0, "foundation"
    return 2, "core"


def modules() -> dict[str, Path]:
    found = {}
    for package, folder in (("sweepgen", ROOT / "sweepgen"), ("sweepgen.drivers", ROOT / "drivers")):
        for path in folder.rglob("*.py"):
            parts = list(path.relative_to(folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join([package, *parts])] = path
    return found


def imports(name: str, path: Path, known) -> set[str]:
    """Every module of the package that ``name`` imports, at module level or inside a function
    (except under ``if TYPE_CHECKING``, which never runs)."""
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    out = set()

    def resolve(dotted):
        parts = dotted.split(".")
        while parts and ".".join(parts) not in known:
            parts.pop()
        return ".".join(parts) if parts else None

    def visit(node):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            return
        if isinstance(node, ast.Import):
            out.update(resolve(a.name) for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                up = package.split(".")[:len(package.split(".")) - node.level + 1]
                base = ".".join(up + ([node.module] if node.module else []))
            out.update(resolve(f"{base}.{a.name}") or resolve(base) for a in node.names)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(ast.parse(path.read_text(encoding="utf-8")))
    return {m for m in out if m and m != name}


@pytest.fixture(scope="module")
def graph():
    known = modules()
    return {name: imports(name, path, known) for name, path in known.items()}


def test_the_graph_is_read_from_the_package(graph):
    # the graph is not empty by accident: the playback service imports the checker, the CLI the API
    assert "sweepgen.checker" in graph["sweepgen.playback"]
    assert "sweepgen.api" in graph["sweepgen.cli.simulate"] or "sweepgen" in graph["sweepgen.cli.simulate"]
    assert len(graph) > 60


def test_no_module_imports_a_higher_layer(graph):
    upward = [f"{a} ({layer(a)[1]}) imports {b} ({layer(b)[1]})"
              for a, targets in graph.items() for b in targets
              if layer(b)[0] > layer(a)[0] and a != "sweepgen" and b != "sweepgen"]
    assert upward == []


def test_no_import_circle(graph):
    # Tarjan's strongly connected components; a component of more than one module is a circle
    index, low, stack, on, circles = {}, {}, [], set(), []

    def strong(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                strong(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                circles.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            strong(v)
    assert circles == []
