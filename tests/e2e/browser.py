"""Render a page in headless Chromium (Debian's package) and return the DOM after scripts ran."""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--virtual-time-budget=10000",
]


def chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def render_dom(page: Path, timeout: float = 90.0) -> str:
    exe = chromium()
    assert exe, "chromium not installed (.ci/run installs Debian's chromium package)"
    with tempfile.TemporaryDirectory() as profile:
        result = subprocess.run(
            [exe, *FLAGS, f"--user-data-dir={profile}", "--dump-dom", Path(page).resolve().as_uri()],
            capture_output=True,
            text=True,
            timeout=timeout,
        )
    return result.stdout
