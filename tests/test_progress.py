"""Progress of `run`, `backtest` and `demo`: a live line per check on a terminal (a real pty), and
timestamped log lines otherwise (what a scheduler captures)."""

from __future__ import annotations

import fcntl
import os
import pty
import re
import struct
import subprocess
import sys
import termios
import threading
from pathlib import Path

import pytest
from click.testing import CliRunner

from toolkit.cli import main

GOLDEN = Path(__file__).parent / "golden"
STAMP = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ"
CATALOGUE = sorted(p.stem for p in (Path(__file__).parent.parent / "checks").glob("*.yml"))
BACKTEST = ["--from", "2026-11-02", "--to", "2026-11-04", "--set", "baseline.factor=1.5"]


@pytest.fixture
def project(make_project) -> Path:
    return make_project({
        "a.yml": (GOLDEN / "startup_p90_by_site.yml").read_text(),
        "b.yml": (GOLDEN / "site_failures_p_chart.yml").read_text(),
    })


def in_terminal(args: list[str], cwd: Path, columns: int = 200) -> tuple[int, str, str]:
    """Run ``plimsoll ARGS`` with stderr on a pseudo-terminal of ``columns``; (exit, stdout, terminal)."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, columns, 0, 0))
    proc = subprocess.Popen([sys.executable, "-m", "toolkit.cli", *args], cwd=cwd, stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=slave)
    os.close(slave)
    screen = bytearray()

    def drain() -> None:
        while True:
            try:
                chunk = os.read(master, 4096)
            except OSError:  # EIO: the child closed the terminal
                return
            if not chunk:
                return
            screen.extend(chunk)

    reader = threading.Thread(target=drain)
    reader.start()
    out, _ = proc.communicate(timeout=300)
    reader.join(timeout=60)
    os.close(master)
    return proc.returncode, out.decode(), screen.decode()


def live_lines(screen: str) -> list[str]:
    """What each in-place rewrite showed: the text after every carriage return + erase-line."""
    return [part.split("\r\n")[0] for part in screen.split("\r\x1b[K")[1:]]


def per_check(names: list[str]) -> list[str]:
    """The start line of each check, in order, as the runner names them."""
    return [f"[{i}/{len(names)}] {name} …" for i, name in enumerate(names, start=1)]


# ── not a terminal: timestamped log lines ────────────────────────────────────────────────────────


def test_run_logs_one_timestamped_line_per_step(project: Path) -> None:
    result = CliRunner().invoke(main, ["run", "-p", str(project)], catch_exceptions=False)
    assert result.exit_code == 0, result.output
    log = result.stderr.splitlines()
    assert log and all(re.match(STAMP + " ", line) for line in log)
    steps = [line.split(" ", 1)[1] for line in log]
    names = ["startup_p90_by_site", "site_failures_p_chart"]
    assert [s for s in steps if s.endswith("…")] == per_check(names)
    for number, name in enumerate(names, start=1):
        assert any(re.fullmatch(rf"\[{number}/2\] {name}: 2 files, \d+ windows, \d+ alerts? opened, \d+ closed", s)
                   for s in steps)
    assert "\r" not in result.stderr and "\x1b" not in result.stderr
    assert result.stdout.startswith("run 1: 2 new files")


def test_backtest_logs_each_check_of_each_setting(project: Path) -> None:
    result = CliRunner().invoke(main, ["backtest", "startup_p90_by_site", "-p", str(project), *BACKTEST],
                                catch_exceptions=False)
    assert result.exit_code == 0, result.output
    steps = [line.split(" ", 1)[1] for line in result.stderr.splitlines()]
    assert "setting 1/2 baseline: [1/1] startup_p90_by_site …" in steps
    assert "setting 2/2 baseline.factor=1.5: [1/1] startup_p90_by_site …" in steps
    assert "\x1b" not in result.stderr


def test_demo_logs_each_catalogue_check(tmp_path: Path) -> None:
    result = CliRunner().invoke(main, ["demo", "--workdir", str(tmp_path / "d"), "--sessions", "20000"],
                                catch_exceptions=False)
    assert result.exit_code == 0, result.output
    steps = [line.split(" ", 1)[1] for line in result.stderr.splitlines() if re.match(STAMP, line)]
    assert steps[0] == "demo: generating 20,000 sessions"
    assert [s for s in steps if s.endswith("…")] == per_check(CATALOGUE)


# ── on a terminal: one line rewritten in place ───────────────────────────────────────────────────


def test_run_on_a_terminal_rewrites_one_line(project: Path) -> None:
    code, out, screen = in_terminal(["run", "-p", str(project)], project.parent)
    assert code == 0, screen
    shown = live_lines(screen)
    assert [s for s in shown if s.endswith("…")] == per_check(["startup_p90_by_site", "site_failures_p_chart"])
    assert not re.search(STAMP, screen)
    assert screen.endswith("\r\n")  # the live line is ended before the command's own output
    assert out.startswith("run 1: 2 new files")


def test_backtest_on_a_terminal_rewrites_one_line(project: Path) -> None:
    code, out, screen = in_terminal(["backtest", "startup_p90_by_site", "-p", str(project), *BACKTEST],
                                    project.parent)
    assert code == 0, screen
    shown = live_lines(screen)
    assert "setting 1/2 baseline: [1/1] startup_p90_by_site …" in shown
    assert "setting 2/2 baseline.factor=1.5: [1/1] startup_p90_by_site …" in shown
    assert "baseline.factor=1.5" in out


def test_demo_on_a_terminal_rewrites_one_line(tmp_path: Path) -> None:
    code, out, screen = in_terminal(["demo", "--workdir", "d", "--sessions", "20000"], tmp_path)
    assert code == 0, screen
    shown = live_lines(screen)
    assert shown[0] == "demo: generating 20,000 sessions"
    assert [s for s in shown if s.endswith("…")] == per_check(CATALOGUE)
    assert "Fernhill Broadcasting demo" in out


def test_a_narrow_terminal_gets_lines_cut_to_fit(project: Path) -> None:
    code, _, screen = in_terminal(["run", "-p", str(project)], project.parent, columns=30)
    assert code == 0, screen
    shown = live_lines(screen)
    assert shown and all(len(s) < 30 for s in shown)
    assert "[1/2] startup_p90_by_site …" in shown  # 26 characters: fits as it is
