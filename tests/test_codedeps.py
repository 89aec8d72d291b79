"""Per-stage code hashes: a stage's key changes with the code it imports, and only with that."""

from __future__ import annotations

from potfield.codedeps import _module_file, module_closure


def _package(tmp_path):
    pkg = tmp_path / "toy"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "a.py").write_text("from .sub import b\n\ndef f():\n    from toy import d\n")
    (pkg / "sub" / "b.py").write_text("from ..c import VALUE\n")
    (pkg / "c.py").write_text("VALUE = 1\n")
    (pkg / "d.py").write_text("import numpy\n")
    (pkg / "e.py").write_text("X = 2\n")
    return pkg


def test_closure_follows_relative_absolute_and_local_imports(tmp_path):
    pkg = _package(tmp_path)
    files = {p.relative_to(pkg).as_posix() for p in module_closure("toy.a", root=pkg, package="toy")}
    # the transitive import closure, as any build tool computes it (common practice)
    assert files == {"__init__.py", "a.py", "sub/__init__.py", "sub/b.py", "c.py", "d.py"}
    assert _module_file("numpy", root=pkg, package="toy") is None


def test_stage_closures_of_the_real_package():
    def names(stage):
        return {p.name for p in module_closure(f"potfield.stages.{stage}")}

    assert "eqsources" not in " ".join(names("ingest"))
    assert "noise.py" in names("clean") and "igrf.py" not in names("clean")
    assert "igrf.py" in names("reference")
