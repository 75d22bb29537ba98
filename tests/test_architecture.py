"""The layers and subjects of the code base, checked from the source (docs/architecture.md).

Every import statement of the installed package (module level and inside functions) is read
with :mod:`ast`; a name imported from a package with lazy public names is resolved to the
module that defines it (the package's ``_WHERE`` table), so the graph is the one the
interpreter really follows.  Checked:

- no import cycle between modules (common practice: a cycle makes import order matter);
- layers import only downwards: jobs -> cluster -> storage -> kernels;
- outside a kernels subject, nobody imports one of its private ``_modules`` (tests of
  internals excepted);
- storage only persists: it never imports a chunk kernel or an executor.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# folder -> dotted package (pyproject.toml package-dir)
FOLDERS = {
    "leadline": "leadline",
    "jobs": "leadline.jobs",
    "kernels": "leadline.kernels",
    "storage": "leadline.storage",
    "cluster": "leadline.cluster",
}
LAYER = {"leadline.kernels": 0, "leadline.storage": 1, "leadline.cluster": 2, "leadline.jobs": 3}


def _modules() -> dict[str, Path]:
    out = {}
    for folder, dotted in FOLDERS.items():
        for path in sorted((ROOT / folder).rglob("*.py")):
            parts = list(path.relative_to(ROOT / folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join([dotted] + parts)] = path
    return out


MODULES = _modules()


def _is_package(name: str) -> bool:
    return MODULES.get(name, Path()).name == "__init__.py"


def _lazy_table(package: str) -> dict[str, str]:
    """The ``_WHERE`` table of a package's __init__ (name -> module), if it has one."""
    tree = ast.parse(MODULES[package].read_text())
    for node in tree.body:
        if isinstance(node, ast.Assign) and any(getattr(t, "id", None) == "_WHERE" for t in node.targets):
            return {k: f"{package}.{v}" for k, v in ast.literal_eval(node.value).items()}
    return {}


def _targets(module: str, node: ast.AST) -> list[str]:
    """Modules of the tool that one import statement loads (names resolved through _WHERE)."""
    if isinstance(node, ast.Import):
        return [a.name for a in node.names if a.name in MODULES]
    assert isinstance(node, ast.ImportFrom)
    if node.level:
        base = module.split(".") if _is_package(module) else module.split(".")[:-1]
        base = base[: len(base) - (node.level - 1)]
        source = ".".join(base + ([node.module] if node.module else []))
    else:
        source = node.module or ""
    if source not in MODULES:
        return []
    out = []
    table = _lazy_table(source) if _is_package(source) else {}
    for alias in node.names:
        sub = f"{source}.{alias.name}"
        if sub in MODULES:
            out.append(sub)
        elif alias.name in table:
            out.append(table[alias.name])
        else:
            out.append(source)
    return out


def _graph() -> dict[str, set[str]]:
    graph = {}
    for name, path in MODULES.items():
        edges = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                edges.update(t for t in _targets(name, node) if t != name)
        graph[name] = edges
    return graph


GRAPH = _graph()


def _layer(module: str) -> int | None:
    for prefix, level in LAYER.items():
        if module == prefix or module.startswith(prefix + "."):
            return level
    return None


def test_the_graph_is_read():
    # guards the checks below against an empty graph (a wrong root would make them vacuous)
    assert "leadline.kernels.exact._iteration" in GRAPH
    assert "leadline.kernels.exact._chunks" in GRAPH["leadline.kernels.exact._iteration"]
    assert "leadline.storage.study" in GRAPH["leadline.cluster.checkpointed"]


def test_no_import_cycles():
    # Tarjan's strongly connected components; any component with two or more modules is a cycle
    index, low, stack, on_stack, cycles = {}, {}, [], set(), []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in sorted(GRAPH.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    for v in sorted(GRAPH):
        if v not in index:
            visit(v)
    assert cycles == []


def test_layers_import_only_downwards():
    wrong = []
    for src, targets in GRAPH.items():
        ls = _layer(src)
        for t in targets:
            lt = _layer(t)
            if ls is not None and lt is not None and lt > ls:
                wrong.append(f"{src} -> {t}")
    assert wrong == []


def _subject(module: str) -> str | None:
    parts = module.split(".")
    if parts[:2] == ["leadline", "kernels"] and len(parts) >= 3:
        return parts[2]
    return None


def test_no_private_module_of_another_subject_is_imported():
    wrong = []
    for name, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                parts = node.module.split(".")
                private = [p for p in parts if p.startswith("_") and not p.startswith("__")]
                if private and parts[:2] == ["leadline", "kernels"] and _subject(node.module) != _subject(name):
                    wrong.append(f"{name}: from {node.module} import ...")
            elif isinstance(node, ast.ImportFrom) and node.level >= 2 and node.module:
                if any(p.startswith("_") for p in node.module.split(".")):
                    wrong.append(f"{name}: from {'.' * node.level}{node.module} import ...")
    assert wrong == []


@pytest.mark.parametrize("kernel", ["leadline.kernels.exact._chunks", "leadline.kernels.exact._blocked",
                                    "leadline.kernels.sparse._growing", "leadline.cluster.executor"])
def test_storage_never_runs_a_kernel(kernel):
    assert kernel in MODULES
    storage = [m for m in GRAPH if m.startswith("leadline.storage")]
    assert [m for m in storage if kernel in GRAPH[m]] == []


def test_the_checkpointing_run_pass_composes_store_and_runner():
    edges = GRAPH["leadline.cluster.checkpointed"]
    assert "leadline.storage.study" in edges and "leadline.cluster.runners" in edges
