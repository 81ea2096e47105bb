"""The tree is the architecture: one folder a stage, imports only downwards, no cycles.

The layers, lowest first (docs/architecture.md draws the same map):
a module may import from its own layer's package and from lower layers,
never from a higher one.  networkx (a general-purpose graph library) finds
the cycles.
"""

import ast
from pathlib import Path

import networkx as nx

PACKAGE = Path(__file__).resolve().parents[1] / "closurecheck"

# Lowest first.  Top-level modules are their own "stage".
LAYERS = [
    {"_version", "errors"},
    {"core"},
    {"io"},
    {"simulation", "frontend", "registration", "graph"},
    {"runners", "calibration", "verification"},
    {"reporting"},
    {"config"},
    {"pipeline"},
    {"cli", "__main__", "__init__"},
]
RANK = {stage: k for k, layer in enumerate(LAYERS) for stage in layer}


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).with_suffix("")
        yield ".".join(("closurecheck",) + rel.parts).removesuffix(".__init__"), path


def _imports(module: str, path: Path):
    """Absolute names of the closurecheck modules ``module`` imports (anywhere in the file)."""
    is_pkg = path.name == "__init__.py"
    package = module if is_pkg else module.rsplit(".", 1)[0]
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if not target.startswith("closurecheck"):
                continue
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                yield sub if (PACKAGE.parent / (sub.replace(".", "/") + ".py")).exists() or \
                    (PACKAGE.parent / sub.replace(".", "/")).is_dir() else target
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("closurecheck"):
                    yield alias.name


def _stage(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _graph():
    g = nx.DiGraph()
    for module, path in _modules():
        g.add_node(module)
        for target in _imports(module, path):
            if target != module:
                g.add_edge(module, target)
    return g


def test_every_stage_is_a_folder_and_every_module_has_a_layer():
    stages = {_stage(m) for m, _ in _modules()}
    assert stages <= set(RANK), f"modules outside the layer map: {sorted(stages - set(RANK))}"
    for stage in ("core", "io", "frontend", "registration", "runners", "graph", "verification", "simulation",
                  "reporting", "calibration"):
        assert (PACKAGE / stage / "__init__.py").exists()


def test_no_import_cycle():
    g = _graph()
    cycles = list(nx.simple_cycles(g))
    assert not cycles, f"import cycles: {cycles[:3]}"


def test_imports_only_go_down_the_layers():
    upward = []
    for a, b in _graph().edges:
        sa, sb = _stage(a), _stage(b)
        if sa != sb and RANK[sb] > RANK[sa]:
            upward.append(f"{a} -> {b}")
    assert not upward, "upward imports:\n" + "\n".join(upward)


def test_stages_of_one_layer_do_not_import_each_other():
    # simulation, frontend, registration and graph are independent of each
    # other; so are runners and verification.
    sideways = [f"{a} -> {b}" for a, b in _graph().edges
                if _stage(a) != _stage(b) and RANK[_stage(a)] == RANK[_stage(b)] and RANK[_stage(a)] in (3, 4)]
    assert not sideways, "imports between stages of one layer:\n" + "\n".join(sideways)
