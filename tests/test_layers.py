"""The house's layers: every import points down or sideways, never up, and none loops.

Read from the code (every ``import coldindex...``, including those inside functions),
so the layout in DEVELOPERS.md cannot drift from it.
"""

import ast
from pathlib import Path

import coldindex

PACKAGE = Path(coldindex.__file__).parent
# Top to bottom. A module may import modules of its own layer or of any layer below.
LAYERS = [
    {"cli"},
    {"release", "demo"},
    {"pipeline", "sources"},
    {"io.readers", "io.writers", "io.releases", "io.icefields", "io.profiles",
     "report.summary", "report.text", "report.page", "report.html", "report.figures",
     "gridded", "synthetic"},
    {"indices", "dense", "simulation", "covariates", "qc", "classify", "regimes", "skill",
     "project", "regions", "profiles", "icefields"},
    {"interpolate", "fitting", "stats", "parallel", "domain"},
    {"config", "schema", "errors", "progress", "io.files", "_version"},
]
FACES = {"", "io", "report"}  # package __init__ files


def _graph() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        name = ".".join(p for p in parts if p != "__init__")
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module and \
                    node.module.startswith("coldindex"):
                mod = node.module.removeprefix("coldindex").lstrip(".")
                if mod in FACES:  # from coldindex.io import readers
                    deps |= {f"{mod}.{a.name}".lstrip(".") for a in node.names}
                else:
                    deps.add(mod)
            elif isinstance(node, ast.Import):
                deps |= {a.name.removeprefix("coldindex").lstrip(".") for a in node.names
                         if a.name.startswith("coldindex")}
        graph[name] = {d for d in deps if d != name and d not in FACES}
    return graph


def _layer(name: str) -> int:
    for k, layer in enumerate(LAYERS):
        if name in layer:
            return k
    raise AssertionError(f"{name} has no layer; add it to LAYERS and to DEVELOPERS.md")


def test_every_module_has_a_layer_and_imports_point_down():
    graph = _graph()
    up = [f"{m} -> {d}" for m, deps in graph.items() if m not in FACES
          for d in deps if _layer(d) < _layer(m)]
    assert not up, "imports that point up: " + "; ".join(sorted(up))


def test_no_import_cycles():
    graph = _graph()
    state: dict[str, int] = {}
    cycles: list[str] = []

    def visit(m: str, path: list[str]) -> None:
        state[m] = 1
        for d in sorted(graph.get(m, ())):
            if state.get(d) == 1:
                cycles.append(" -> ".join([*path[path.index(d):], d]))
            elif d not in state:
                visit(d, [*path, d])
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m, [m])
    assert not cycles, "import cycles: " + "; ".join(cycles)


def test_computation_never_touches_the_terminal():
    graph = _graph()
    for m in graph:
        if m not in FACES and _layer(m) >= 4:
            text = (PACKAGE / (m.replace(".", "/") + ".py")).read_text(encoding="utf-8")
            assert "print(" not in text and "sys.exit" not in text, m
