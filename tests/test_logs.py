"""Command-line logging: -v/-q, out/run.log, progress lines with stage number and time left."""

from __future__ import annotations

import shutil
from pathlib import Path

from potfield import logs
from potfield.cli import build_parser, main

DEMO = Path(__file__).resolve().parents[1] / "surveys" / "demo-observatory"


def test_dedupe_and_time_left():
    assert logs.dedupe("grid: grid: cross-validating") == "grid: cross-validating"
    assert logs.dedupe("grid: fitting") == "grid: fitting"
    progress = logs.Progress(["ingest", "grid"], {"ingest": 2.0, "grid": 10.0})
    assert progress.eta("ingest") == "about 12 s left (previous run)"
    assert "unknown" in logs.Progress(["ingest", "grid"], {"grid": 1.0}).eta("ingest")


def test_run_writes_run_log_and_quiet_prints_nothing(tmp_path, capsys):
    root = tmp_path / "obs"
    shutil.copytree(DEMO, root, ignore=shutil.ignore_patterns("out"))
    assert main(["run", str(root), "-q"]) == 0
    assert capsys.readouterr().out == ""  # -q: no progress, no summary when nothing failed
    log = (root / "out" / "run.log").read_text()
    assert "[1/5] ingest: running" in log and "[5/5] report: done in" in log
    assert "DEBUG" in log  # the log keeps every message, whatever the console level
    assert main(["run", str(root)]) == 0  # not a terminal: one line per stage
    out = capsys.readouterr().out
    assert "[3/5] reference: unchanged, reused" in out and "DEBUG" not in out


def test_every_command_has_a_description_and_an_example():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    for name, command in sub.choices.items():
        assert command.description and "example:" in command.epilog, name
        assert f"potfield {name}" in command.epilog
    args = parser.parse_args(["run", "x", "-v", "-v"])
    assert args.verbose == 2 and args.quiet is False
