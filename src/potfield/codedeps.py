"""Which of potfield's own source files a module depends on, and a hash of them.

A stage's cache key must change when the code it runs changes, and only then: a change to the
report's layout must not recompute the grid. ``module_closure`` follows the import statements of
a module (top-level and function-local, absolute and relative) through potfield's own package,
transitively; ``code_hash`` hashes the files it reaches. The import graph is read from the source
text, so nothing is imported to compute it.
"""

from __future__ import annotations

import hashlib
import re
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


#: ``import a.b as c, d`` and ``from .x import (y, z)`` statements at the start of a line (also
#: inside functions). Read from the text rather than parsed with :mod:`ast`, which took ~1 s a run
#: for the ~60 files of the package; an import written inside a docstring would only add a
#: dependency (a superset: at worst an extra recompute, never a stale cache).
_IMPORT = re.compile(
    r"^[ \t]*(?:from[ \t]+(\.*)([\w.]*)[ \t]+import[ \t]+(\([^)]*\)|[^\n#;]*)|import[ \t]+([^\n#;]*))",
    re.MULTILINE,
)


def _names(text: str) -> list[str]:
    """Imported names of an import list: ``(a as b,\n c)`` -> ``["a", "c"]``."""
    text = re.sub(r"#[^\n]*", "", text).strip("()\\ \t\n")
    return [item.split()[0] for item in text.replace("\\", " ").split(",") if item.split()]


@cache
def _imported_names(path: Path, name: str, package: str) -> frozenset[str]:
    """Module names imported anywhere in ``path`` (the module ``name``), resolved to absolute.
    Read once per process (the stages of one run share most of their modules)."""
    is_package = path.name == "__init__.py"
    here = name.split(".") if is_package else name.split(".")[:-1]
    found: set[str] = set()
    for match in _IMPORT.finditer(path.read_text(encoding="utf-8")):
        dots, module, what, plain = match.groups()
        if plain is not None:
            found.update(_names(plain))
            continue
        if dots:
            stem = here[: len(here) - (len(dots) - 1)]
            base = ".".join(stem + ([module] if module else []))
        else:
            base = module
        found.add(base)
        # ``from pkg import sub`` may name a submodule
        found.update(f"{base}.{item}" for item in _names(what) if item != "*")
    return frozenset(n for n in found if n == package or n.startswith(package + "."))


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
