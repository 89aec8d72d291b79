"""Which of potfield's own source files a module depends on, and a hash of them.

A stage's cache key must change when the code it runs changes, and only then: a change to the
report's layout must not recompute the grid. ``module_closure`` follows the import statements of
a module (top-level and function-local, absolute and relative) through potfield's own package,
transitively; ``code_hash`` hashes the files it reaches. The import graph is read from the source
text with :mod:`ast`, so nothing is imported to compute it.
"""

from __future__ import annotations

import ast
import hashlib
from functools import cache
from pathlib import Path

PACKAGE = "potfield"
ROOT = Path(__file__).resolve().parent


def _module_file(name: str, root: Path = ROOT, package: str = PACKAGE) -> Path | None:
    """The source file of module ``name`` (``package.a.b``) under ``root``, or None."""
    if name != package and not name.startswith(package + "."):
        return None
    parts = name.split(".")[1:]
    base = root.joinpath(*parts)
    if base.with_suffix(".py").is_file():
        return base.with_suffix(".py")
    if (base / "__init__.py").is_file():
        return base / "__init__.py"
    return None


def _imported_names(path: Path, name: str, package: str) -> set[str]:
    """Module names imported anywhere in ``path`` (the module ``name``), resolved to absolute."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    is_package = path.name == "__init__.py"
    here = name.split(".") if is_package else name.split(".")[:-1]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                stem = here[: len(here) - (node.level - 1)]
                base = ".".join(stem + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            found.add(base)
            # ``from pkg import sub`` may name a submodule
            found.update(f"{base}.{alias.name}" for alias in node.names if alias.name != "*")
    return {n for n in found if n == package or n.startswith(package + ".")}


def module_closure(name: str, root: Path = ROOT, package: str = PACKAGE) -> list[Path]:
    """Source files of module ``name`` and of every package module it imports, transitively.

    Parent packages' ``__init__`` files are included (Python runs them on import). Sorted.
    """
    seen: dict[str, Path] = {}
    todo = [name]
    while todo:
        current = todo.pop()
        if current in seen:
            continue
        path = _module_file(current, root, package)
        if path is None:
            continue
        seen[current] = path
        parts = current.split(".")
        todo.extend(".".join(parts[:i]) for i in range(1, len(parts)))
        todo.extend(_imported_names(path, current, package))
    return sorted(set(seen.values()))


@cache
def code_hash(name: str, version: str = "") -> str:
    """SHA-256 over the relative paths and contents of ``module_closure(name)`` (and a version)."""
    digest = hashlib.sha256(version.encode())
    for path in module_closure(name):
        digest.update(str(path.relative_to(ROOT)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()
