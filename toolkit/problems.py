"""Errors that carry where they happened, so every message can name a file, line, check or column."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True, order=True)
class Problem:
    """One thing wrong with the project, at a place a user can open in an editor."""

    file: str
    line: int
    message: str

    def __str__(self) -> str:
        return f"{self.file}:{self.line}: {self.message}" if self.line else f"{self.file}: {self.message}"


class PlimsollError(Exception):
    """Base class: the CLI turns these into one clear line and a non-zero exit."""

    exit_code = 1


class ProjectInvalid(PlimsollError):
    """The project file or a check file is wrong; every problem found is listed (exit 2)."""

    exit_code = 2

    def __init__(self, problems: list[Problem]):
        self.problems = sorted(set(problems), key=lambda p: (p.file, p.line, p.message))
        super().__init__("\n".join(str(p) for p in self.problems))


class ChecksChanged(ProjectInvalid):
    """Every check a run was to run has changed since its windows were computed: each needs a
    rebuild, and nothing ran (exit 2, like any other invalid project)."""


class DataError(PlimsollError):
    """The lake's data cannot be read as the project says (a file, a column, a type); exit 1."""


class RunLocked(PlimsollError):
    """Another run holds the warehouse."""


def engine_message(err: BaseException) -> str:
    """The first line of an engine error. An error raised inside a Python filesystem (s3fs) reaches
    DuckDB as a whole traceback: its exception line is the message, not the word 'Traceback'."""
    lines = [line for line in str(err).strip().splitlines() if line.strip()]
    if not lines:
        return type(err).__name__
    if lines[0].startswith("Traceback (most recent call last)"):
        raised = [line for line in lines[1:] if not line.startswith((" ", "\t")) and ":" in line]
        if raised:
            return raised[0].strip()
    return lines[0].strip()


def display_path(path: Path, base: Path | None = None) -> str:
    """A path as a user would type it: relative to ``base`` (or the working folder) when inside it."""
    path = Path(path)
    for root in (base, Path.cwd()):
        if root is None:
            continue
        try:
            return str(path.resolve().relative_to(Path(root).resolve()))
        except ValueError:
            continue
    return str(path)


class WarehouseError(PlimsollError):
    """The warehouse file cannot be used as it is: another layout, read-only, not a file, a full disk."""
