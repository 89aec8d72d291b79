"""Input encodings (declared, latin-1 fallback) and an out/ that cannot be written."""

from __future__ import annotations

import errno
import json
import os

import pandas as pd
import pytest

from potfield.cli import main
from potfield.io.delimited import read_delimited


def _set_line_names(root, text: str) -> None:
    path = root / "raw" / "lines.csv"
    table = pd.read_csv(path, dtype={"line": str})
    table.loc[table["line"] == table["line"].iloc[0], "line"] = text
    return table, path


def test_latin1_file_read_with_a_warning(magnetic_survey, capsys):
    # 0xE9 is 'é' in ISO 8859-1 (latin-1) and an invalid start byte in UTF-8 (RFC 3629, s. 4)
    table, path = _set_line_names(magnetic_survey, "L\u00e9a")
    table.to_csv(path, index=False, encoding="latin-1")
    assert main(["run", str(magnetic_survey), "--until", "ingest"]) == 0
    manifest = json.loads((magnetic_survey / "out" / "manifest.json").read_text())
    warnings = manifest["stages"]["ingest"]["warnings"]
    assert len(warnings) == 1 and "read as latin-1" in warnings[0] and "lines.csv" in warnings[0]
    readings = pd.read_csv(magnetic_survey / "out" / "tables" / "readings.csv", dtype={"line": str})
    assert (readings["line"] == "L\u00e9a").any()  # decoded, not replaced by U+FFFD


def test_declared_encoding_is_used_without_warning(tmp_path):
    # cp1252 maps 0x80 to the euro sign (Microsoft code page 1252 table); latin-1 has a C1
    # control character there, so only the declared encoding gives the right text.
    path = tmp_path / "a.csv"
    path.write_bytes("NAME,V\n\u20ac1,1.5\nB,2.5\n".encode("cp1252"))
    frame = read_delimited(path, columns={"line": "NAME", "total_field": "V"}, encoding="cp1252")
    assert frame["line"].tolist() == ["\u20ac1", "B"]
    assert "warnings" not in frame.attrs
    fallback = read_delimited(path, columns={"line": "NAME", "total_field": "V"})
    assert fallback["line"].iloc[0] == "\x801" and "latin-1" in fallback.attrs["warnings"][0]


def test_utf8_file_reads_without_warning(tmp_path):
    path = tmp_path / "a.csv"
    path.write_text("NAME,V\nL\u00e9a,1.5\n", encoding="utf-8")
    frame = read_delimited(path, columns={"line": "NAME", "total_field": "V"})
    assert frame["line"].tolist() == ["L\u00e9a"] and "warnings" not in frame.attrs


def test_permission_denied_while_writing_is_one_line_and_releases_lock(magnetic_survey, capsys, monkeypatch):
    from potfield.io import atomic

    real = os.replace

    def denied(src, dst, *args, **kwargs):
        if str(dst).endswith("readings.csv"):
            raise PermissionError(errno.EACCES, "Permission denied", str(dst))
        return real(src, dst, *args, **kwargs)

    monkeypatch.setattr(atomic.os, "replace", denied)
    code = main(["run", str(magnetic_survey), "--until", "ingest"])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1
    assert "cannot write to" in lines[0] and "readings.csv" in lines[0] and "permission denied" in lines[0]
    assert not (magnetic_survey / "out" / ".lock").exists()
    monkeypatch.undo()
    assert main(["run", str(magnetic_survey), "--until", "ingest"]) == 0  # the lock was released


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root ignores permission bits")
def test_read_only_out_folder(magnetic_survey, capsys):
    out = magnetic_survey / "out"
    out.mkdir()
    out.chmod(0o555)
    try:
        code = main(["run", str(magnetic_survey), "--until", "ingest"])
    finally:
        out.chmod(0o755)
    err = capsys.readouterr().err.strip()
    assert code == 2 and "cannot write to" in err and "permission denied" in err
