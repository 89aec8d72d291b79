"""Public functions of potfield.fields carry full type hints (DEVELOPERS.md, "Tests and benchmarks").

ruff's flake8-annotations rules (ANN001/ANN002/ANN003/ANN201/ANN204, pyproject.toml) check them in
``make lint``, but with ``ignore-fully-untyped`` (so private helpers may stay unhinted) a public
function with no hint at all would pass ruff: this test closes that gap, and resolves every hint
(including names imported under ``typing.TYPE_CHECKING``) so a misspelt type fails too.
"""

from __future__ import annotations

import ast
import importlib
import typing
from pathlib import Path

import potfield.fields

FIELDS = Path(potfield.fields.__file__).resolve().parent


def _public(name: str) -> bool:
    """Public as PEP 8 and ruff's flake8-annotations see it; special methods (``__init__``) count."""
    return not name.startswith("_") or (name.startswith("__") and name.endswith("__"))


def _module_name(path: Path) -> str:
    parts = path.relative_to(FIELDS.parent).with_suffix("").parts
    return ".".join(("potfield",) + (parts[:-1] if path.name == "__init__.py" else parts))


def _type_checking_names(tree: ast.Module, package: str) -> dict[str, object]:
    """Names imported inside ``if TYPE_CHECKING:`` blocks, imported here for real."""
    names: dict[str, object] = {}
    for node in tree.body:
        if not (isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test)):
            continue
        for stmt in node.body:
            if isinstance(stmt, ast.Import):
                for alias in stmt.names:
                    top = alias.name.split(".")[0]
                    names[alias.asname or top] = importlib.import_module(alias.name if alias.asname else top)
            elif isinstance(stmt, ast.ImportFrom):
                source = importlib.import_module("." * stmt.level + (stmt.module or ""), package)
                for alias in stmt.names:
                    names[alias.asname or alias.name] = getattr(source, alias.name)
    return names


def _functions(tree: ast.Module) -> list[tuple[str | None, ast.FunctionDef]]:
    """Public module-level functions and public methods of public classes (no closures)."""
    found: list[tuple[str | None, ast.FunctionDef]] = []
    for node in tree.body:
        if isinstance(node, ast.FunctionDef) and _public(node.name):
            found.append((None, node))
        elif isinstance(node, ast.ClassDef) and not node.name.startswith("_"):
            found.extend(
                (node.name, item)
                for item in node.body
                if isinstance(item, ast.FunctionDef) and _public(item.name)
            )
    return found


def _missing(node: ast.FunctionDef, method: bool) -> list[str]:
    args = node.args
    positional = args.posonlyargs + args.args
    if method and positional and positional[0].arg in ("self", "cls"):
        positional = positional[1:]
    params = positional + args.kwonlyargs + [a for a in (args.vararg, args.kwarg) if a is not None]
    missing = [a.arg for a in params if a.annotation is None]
    if node.returns is None:
        missing.append("return")
    return missing


def test_public_functions_of_fields_have_full_type_hints():
    files = sorted(FIELDS.rglob("*.py"))  # private modules (_numerics) included: stricter than ruff
    assert len(files) > 20
    unhinted, unresolved, checked = [], [], 0
    for path in files:
        tree = ast.parse(path.read_text())
        module_name = _module_name(path)
        module = importlib.import_module(module_name)
        package = module_name if path.name == "__init__.py" else module_name.rpartition(".")[0]
        namespace = {**vars(module), **_type_checking_names(tree, package)}
        for owner, node in _functions(tree):
            where = f"{path.relative_to(FIELDS)}: {owner + '.' if owner else ''}{node.name}"
            missing = _missing(node, owner is not None)
            if missing:
                unhinted.append(f"{where} ({', '.join(missing)})")
                continue
            if owner:  # through the class __dict__: properties and static methods as defined
                obj = vars(getattr(module, owner))[node.name]
                obj = (
                    getattr(obj, "fget", None) or getattr(obj, "func", None) or getattr(obj, "__func__", obj)
                )
            else:
                obj = getattr(module, node.name)
            try:
                typing.get_type_hints(obj, globalns=namespace)
            except Exception as err:  # a name the hints use does not resolve
                unresolved.append(f"{where}: {err!r}")
            checked += 1
    assert checked > 100  # the walk found the API (164 functions and methods when written)
    assert not unhinted, unhinted
    assert not unresolved, unresolved
