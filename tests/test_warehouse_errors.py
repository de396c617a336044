"""A warehouse that cannot be written, and a lake with an awkward name: one line, never a traceback.

The real `plimsoll` command runs against a warehouse path that is a folder or a device, a warehouse
on a read-only file system, one on a full disk, a run whose publishing fails after it committed,
and a lake folder whose name holds '[' and '*'. Read-only and full file systems are tmpfs mounts
made inside a user and mount namespace (`unshare -r -m`), so no root is needed and nothing of the
machine is touched.
"""

from __future__ import annotations

import shlex
import shutil
import subprocess
from pathlib import Path

import duckdb
import pytest
from conftest import plimsoll_command

from toolkit.checks import __file__ as catalogue_init

CATALOGUE = Path(catalogue_init).parent
PROJECT = """\
warehouse: {warehouse}
checks: checks/
sources:
  sessions:
    path: "{lake}"
    session_id: session_id
    event_time: ended_at
    exclude: is_bot
"""


@pytest.fixture(scope="module")
def lake(fernhill_lake) -> Path:
    """The session's shared demo lake, read in place (the test of an odd folder name copies it)."""
    return fernhill_lake.path


def project(folder: Path, lake: Path, warehouse: str = "warehouse.duckdb") -> Path:
    (folder / "checks").mkdir(parents=True, exist_ok=True)
    for name in ("site_errors.yml", "title_errors.yml"):
        shutil.copy(CATALOGUE / name, folder / "checks" / name)
    (folder / "plimsoll.yml").write_text(PROJECT.format(warehouse=warehouse, lake=lake))
    return folder / "plimsoll.yml"


def said(result: subprocess.CompletedProcess) -> list[str]:
    """What a command said on stderr, without the timestamped progress lines."""
    assert "Traceback" not in result.stderr, result.stderr
    return [line for line in result.stderr.splitlines() if not line[:4].isdigit()]


def plimsoll(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(plimsoll_command(*args), capture_output=True, text=True, timeout=600)


def in_namespace(script: str) -> subprocess.CompletedProcess:
    """``script`` in a shell of its own user and mount namespace, where it may mount tmpfs."""
    if shutil.which("unshare") is None:
        pytest.skip("needs unshare (util-linux) for a private mount namespace")
    probe = subprocess.run(["unshare", "-r", "-m", "true"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip(f"user namespaces are not available here: {probe.stderr.decode().strip()}")
    return subprocess.run(["unshare", "-r", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=600)


def test_a_warehouse_path_that_is_a_folder_is_one_line(tmp_path: Path, lake: Path) -> None:
    (tmp_path / "wh").mkdir()
    result = plimsoll("run", "-p", str(project(tmp_path, lake, "wh")))
    assert result.returncode == 1
    assert said(result) == [f"{tmp_path / 'wh'}: is a folder; `warehouse:` in plimsoll.yml must name a file, "
                            "e.g. warehouse.duckdb"]


def test_a_warehouse_path_that_is_a_device_is_one_line(tmp_path: Path, lake: Path) -> None:
    result = plimsoll("run", "-p", str(project(tmp_path, lake, "/dev/null")))
    assert result.returncode == 1
    assert said(result) == ["/dev/null: is not a regular file (a device or a pipe); `warehouse:` in plimsoll.yml "
                            "must name a file, e.g. warehouse.duckdb"]


def test_a_warehouse_on_a_read_only_file_system_is_one_line(tmp_path: Path, lake: Path) -> None:
    ran = plimsoll("run", "-p", str(project(tmp_path / "p", lake)))
    assert ran.returncode == 0, ran.stderr
    mount = tmp_path / "ro"
    mount.mkdir()
    q = shlex.quote
    result = in_namespace(
        f"mount -t tmpfs tmpfs {q(str(mount))} && cp -r {q(str(tmp_path / 'p'))}/. {q(str(mount))} && "
        f"mount -o remount,ro {q(str(mount))} && "
        f"{shlex.join(plimsoll_command('run', '-p', str(mount / 'plimsoll.yml')))}; echo \"exit $?\" >&2; "
        # reading still works where writing cannot
        f"{shlex.join(plimsoll_command('alerts', '-p', str(mount / 'plimsoll.yml')))} >/dev/null; echo \"alerts $?\" >&2")
    assert said(result) == [f"{mount / 'warehouse.duckdb'}: cannot open the warehouse: Cannot open file "
                            f"\"{mount / 'warehouse.duckdb'}\": Read-only file system", "exit 1", "alerts 0"]


def test_a_full_disk_says_so_and_where_and_leaves_the_warehouse_as_before(tmp_path: Path, lake: Path) -> None:
    mount = tmp_path / "small"
    mount.mkdir()
    q = shlex.quote
    check = ("import duckdb, sys; c = duckdb.connect(sys.argv[1], read_only=True); "
             "print('runs', c.execute('SELECT status FROM runs').fetchall(), "
             "'windows', c.execute('SELECT count(*) FROM windows').fetchone()[0], file=sys.stderr)")
    python = str(Path(plimsoll_command()[0]).with_name("python"))
    result = in_namespace(
        f"mount -t tmpfs -o size=3m tmpfs {q(str(mount))} && cp -r {q(str(project(tmp_path / 'p', lake).parent))}/. "
        f"{q(str(mount))} && {shlex.join(plimsoll_command('run', '-p', str(mount / 'plimsoll.yml')))}; "
        f"echo \"exit $?\" >&2; {q(python)} -c {q(check)} {q(str(mount / 'warehouse.duckdb'))}")
    lines = said(result)
    assert len(lines) == 3, result.stderr
    full = f"Could not write file \"{mount / 'warehouse.duckdb'}\": No space left on device"
    # the run is rolled back; its 'failed' record is written if the full disk leaves room for it
    # (how much the rolled-back run left free depends on the warehouse's layout), else the line
    # says it could not be, and the warehouse is as before either way
    if lines[1:] == ["exit 1", "runs [('failed',)] windows 0"]:
        assert lines[0].endswith(full)
    else:
        assert lines[1:] == ["exit 1", "runs [] windows 0"]
        assert f"{full}; the run was rolled back, and its failure could not be recorded either" in lines[0]


def test_a_failed_publish_after_a_committed_run_says_the_run_is_safe(tmp_path: Path, lake: Path) -> None:
    project_file = project(tmp_path, lake)
    (tmp_path / "warehouse_tables").write_text("not a folder")
    result = plimsoll("run", "-p", str(project_file))
    assert result.returncode == 1
    assert said(result) == [f"run 1 is committed, but the copies readers use while a run holds the warehouse could "
                            f"not be written to {tmp_path / 'warehouse_tables'}: File exists: "
                            f"{tmp_path / 'warehouse_tables'}; the next run writes them again"]
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    assert con.execute("SELECT status FROM runs").fetchall() == [("ok",)]
    con.close()


def test_a_lake_folder_whose_name_holds_brackets_and_a_star_is_read(tmp_path: Path, lake: Path) -> None:
    odd = tmp_path / "lake [2026] *copy*"
    shutil.copytree(lake, odd)
    project_file = project(tmp_path / "p", odd)
    assert plimsoll("validate", "-p", str(project_file)).returncode == 0
    result = plimsoll("run", "-p", str(project_file))
    assert result.returncode == 0, result.stderr
    assert result.stdout.startswith("run 1: 21 new files,")
