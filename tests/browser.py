"""Headless Chromium, driven by its own command-line flags, for tests of pages Plimsoll writes.

One launch per page gives everything a test reads: `--dump-dom` prints the DOM after the page loaded
and ran, `--enable-logging=stderr --v=0` writes every console message (script errors, refused loads)
to stderr as ``...:CONSOLE...] "message", source: ...``, and `--screenshot` keeps a PNG of the same
load. Each launch gets a new empty profile, and the flags keep Chromium off the network, which this
machine does not have.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pytest

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0")
CONSOLE = re.compile(r":CONSOLE(?::\d+|\(\d+\))?\] (.*)$", re.M)


@dataclass
class Page:
    dom: str
    console: list[str]
    screenshot: Path


def chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if not found:
        pytest.fail("chromium is not installed: `apt-get install chromium` (.ci/run installs it)")
    return found


def open_page(page: Path, screenshot: Path, width: int = 1100, height: int = 1400) -> Page:
    """Load ``page`` from its file URL once: its DOM, every console message, and a screenshot."""
    with tempfile.TemporaryDirectory(prefix="plimsoll-chromium-") as profile:
        done = subprocess.run([chromium(), *FLAGS, f"--user-data-dir={profile}", "--dump-dom",
                               f"--screenshot={screenshot}", f"--window-size={width},{height}",
                               page.resolve().as_uri()],
                              capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert screenshot.is_file(), f"Chromium wrote no screenshot: {done.stderr[-2000:]}"
    return Page(done.stdout, CONSOLE.findall(done.stderr), screenshot)
