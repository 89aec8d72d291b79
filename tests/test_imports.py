"""The import structure of potfield: every module imports, no import cycle, and the layers
(common practice for a layered package: lower layers never import the ones that use them).

Layers, lowest first: errors, kinds; io; fields; qc; stages; pipeline; cli / batch. h1's
fields-only check lives beside the fields tests; this file covers pipeline, qc, io and stages.
"""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import potfield

ROOT = Path(potfield.__file__).parent


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path) -> tuple[set[str], set[str], bool]:
    """(potfield modules imported at module level, all potfield modules imported anywhere in the
    file, whether importlib is used)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    top, every, uses_importlib = set(), set(), False

    def targets(node) -> list[str]:
        if isinstance(node, ast.Import):
            return [a.name for a in node.names]
        if node.level:
            base = package.split(".")
            base = base[: len(base) - node.level + 1]
            prefix = ".".join(base + ([node.module] if node.module else []))
        else:
            prefix = node.module or ""
        # "from . import maps" names a module; "from .x import f" names module x
        return [f"{prefix}.{a.name}" for a in node.names] + [prefix]

    def visit(node, level: int) -> None:
        nonlocal uses_importlib
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                for target in targets(child):
                    if target.split(".")[0] == "importlib":
                        uses_importlib = True
                    if target.startswith("potfield"):
                        every.add(target)
                        if level == 0:
                            top.add(target)
            # module level = not inside a function; "if TYPE_CHECKING" blocks are skipped
            if isinstance(child, ast.If) and "TYPE_CHECKING" in ast.unparse(child.test):
                continue
            inner = level + isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            visit(child, inner)

    visit(tree, 0)
    return top, every, uses_importlib


MODULES = {_module_name(p): p for p in sorted(ROOT.rglob("*.py"))}


def _resolve(target: str) -> str | None:
    """The potfield module a dotted import target refers to (or None for a name in a module)."""
    while target:
        if target in MODULES:
            return target
        target = target.rsplit(".", 1)[0] if "." in target else ""
    return None


GRAPH = {}
EVERY = {}
IMPORTLIB = set()
for _name, _path in MODULES.items():
    _top, _every, _il = _imports(_path)
    GRAPH[_name] = {m for m in map(_resolve, _top) if m and m != _name}
    EVERY[_name] = {m for m in map(_resolve, _every) if m and m != _name}
    if _il:
        IMPORTLIB.add(_name)


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one node (Tarjan 1972)."""
    index, low, stack, on, out = {}, {}, [], set(), []

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
            part = []
            while True:
                w = stack.pop()
                on.discard(w)
                part.append(w)
                if w == v:
                    break
            if len(part) > 1:
                out.append(sorted(part))

    for v in graph:
        if v not in index:
            strong(v)
    return out


def _layer(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "potfield"


def test_every_module_imports():
    for name in MODULES:
        if name == "potfield.__main__":  # runs the command line when imported
            continue
        importlib.import_module(name)


def test_no_module_level_import_cycle():
    assert _cycles(GRAPH) == []


def test_no_cycle_between_pipeline_qc_io_stages():
    # Package level, lazy imports included: qc must not reach back into pipeline or stages.
    layers = ("pipeline", "qc", "io", "stages", "cli", "batch")
    edges: dict[str, set[str]] = {layer: set() for layer in layers}
    for module, targets in EVERY.items():
        a = _layer(module)
        if a in layers:
            edges[a] |= {_layer(t) for t in targets if _layer(t) in layers and _layer(t) != a}
    assert _cycles(edges) == []


def test_lower_layers_do_not_import_higher_ones():
    forbidden = {
        "io": {"pipeline", "cli", "batch", "stages", "qc", "config"},
        "qc": {"pipeline", "cli", "batch", "stages"},
        "fields": {"pipeline", "cli", "batch"},
        "stages": {"pipeline", "cli", "batch"},
    }
    bad = [
        (module, target)
        for module, targets in EVERY.items()
        for target in targets
        if _layer(target) in forbidden.get(_layer(module), ())
    ]
    assert bad == []


def test_stages_do_not_load_each_other_through_importlib():
    assert sorted(m for m in IMPORTLIB if m.startswith("potfield.stages")) == []
