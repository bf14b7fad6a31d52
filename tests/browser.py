"""Test helper: render a local HTML file in Debian's headless Chromium and return the PNG."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

CHROMIUM = shutil.which("chromium")

# Flags for a closed machine: no sandbox as root, no GPU, no background network traffic.
FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
)


def screenshot(page: Path, out_png: Path, profile: Path, width: int = 1300,
               height: int = 2400) -> Path:
    """Screenshot ``page`` (a local file) into ``out_png``; raises if Chromium fails."""
    if CHROMIUM is None:
        raise RuntimeError("chromium is not installed")
    subprocess.run(
        [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", f"--screenshot={out_png}",
         f"--window-size={width},{height}", page.resolve().as_uri()],
        check=True, timeout=90, capture_output=True,
    )
    return out_png
