"""Logging and progress for the command line: ``-v``/``-q``, ``out/run.log``, stage progress.

One logger, ``potfield``. The console shows INFO (a line per stage) by default, DEBUG with ``-v``
(every progress message), only warnings and errors with ``-q``. ``out/run.log`` always gets
every message with a UTC time stamp (it is a log: it is the one output that differs between
runs, with manifest.json). When the output is not a terminal (a batch job, a pipe), progress
lines carry the stage number and an estimate of the time left from the previous run's stage
times (manifest.json), or say that there is none.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from pathlib import Path

LOGGER = logging.getLogger("potfield")


class _UTCFormatter(logging.Formatter):
    converter = time.gmtime


def setup(verbosity: int = 0, log_file: Path | None = None, stream=None) -> logging.Logger:
    """Configure the ``potfield`` logger: console level from ``verbosity`` (-1 quiet, 0, 1 verbose)
    and an optional file handler at DEBUG level. Returns the logger."""
    LOGGER.handlers.clear()
    LOGGER.setLevel(logging.DEBUG)
    LOGGER.propagate = False
    console = logging.StreamHandler(stream or sys.stdout)
    console.setLevel({-1: logging.WARNING, 0: logging.INFO}.get(min(verbosity, 1), logging.DEBUG))
    console.setFormatter(logging.Formatter("%(message)s"))
    LOGGER.addHandler(console)
    if log_file is not None:  # written as NAME.partial, renamed to NAME by close()
        Path(log_file).parent.mkdir(parents=True, exist_ok=True)
        handler = _RenamingFileHandler(log_file)
        handler.setLevel(logging.DEBUG)
        handler.setFormatter(_UTCFormatter("%(asctime)sZ %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S"))
        LOGGER.addHandler(handler)
    return LOGGER


class _RenamingFileHandler(logging.FileHandler):
    """A log file written under a temporary name and renamed into place when closed, so a
    reader never sees a half-written run.log of a finished run (outputs are atomic)."""

    def __init__(self, path: Path):
        self.final = Path(path)
        super().__init__(self.final.with_name(self.final.name + ".partial"), mode="w", encoding="utf-8")

    def close(self) -> None:
        super().close()
        partial = Path(self.baseFilename)
        if partial.is_file():
            partial.replace(self.final)


def close() -> None:
    """Flush and close the handlers (run.log moves into place)."""
    for handler in list(LOGGER.handlers):
        handler.close()
        LOGGER.removeHandler(handler)


def dedupe(message: str) -> str:
    """Drop a repeated ``stage:`` prefix ("grid: grid: fitting" -> "grid: fitting")."""
    head, sep, rest = message.partition(": ")
    while sep and rest.startswith(head + ": "):
        rest = rest[len(head) + 2 :]
    return f"{head}{sep}{rest}" if sep else message


def previous_seconds(out: Path) -> dict[str, float]:
    """Stage times of the previous run (out/manifest.json), for the time-left estimate."""
    try:
        stages = json.loads((Path(out) / "manifest.json").read_text()).get("stages", {})
    except (OSError, ValueError):
        return {}
    return {
        k: float(v["seconds"])
        for k, v in stages.items()
        if isinstance(v, dict) and isinstance(v.get("seconds"), (int, float))
    }


FINAL_WORDS = ("done in", "skipped in", "unchanged", "does nothing", "marked stale")


class Progress:
    """Progress callback for :func:`potfield.pipeline.run_survey` (messages "stage: text")."""

    def __init__(
        self, order: list[str], previous: dict[str, float] | None = None, logger: logging.Logger = LOGGER
    ):
        self.order = list(order)
        self.previous = previous or {}
        self.logger = logger
        self.started = time.monotonic()

    def eta(self, stage: str) -> str:
        if stage not in self.order:
            return ""
        rest = self.order[self.order.index(stage) :]
        known = [self.previous[s] for s in rest if s in self.previous]
        if not known or len(known) < len(rest):
            return "time left unknown (no previous run)"
        return f"about {sum(known):.0f} s left (previous run)"

    def __call__(self, message: str) -> None:
        message = dedupe(message)
        stage = message.partition(": ")[0]
        index = f"[{self.order.index(stage) + 1}/{len(self.order)}] " if stage in self.order else ""
        if any(word in message for word in FINAL_WORDS):
            self.logger.info(f"{index}{message}")
        elif message.endswith(": running"):
            self.logger.info(f"{index}{message}; {self.eta(stage)}".rstrip("; "))
        else:
            self.logger.debug(f"{index}{message}")
