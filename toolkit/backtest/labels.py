"""Labelled incidents and decoys: the labels file, and which alerts belong to which label.

The demo writes a labels file for the incidents it plants; ``plimsoll backtest --labels`` reads the
same format to score checks against any history a team has labelled. Matching an alert to a label
is defined once, here, so the demo's summary and a backtest always agree.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from toolkit.problems import DataError

LABEL_FIELDS = ("kind", "check", "key", "start", "end", "note")
LABEL_KINDS = ("incident", "decoy")
TIME_FORMAT = "%Y-%m-%d %H:%M:%S"
READ_FORMATS = ("%Y-%m-%d %H:%M:%S", "%Y-%m-%d %H:%M", "%Y-%m-%d")  # what --from, --to and --since take too
# A decoy disturbs the data for a while after it ends: an alert opened up to a day later is its too.
DECOY_SLACK = timedelta(days=1)


@dataclass(frozen=True)
class Label:
    """One labelled incident, or a decoy that no check may alert on.

    ``check`` names the check that must find the incident (``*`` for a decoy, which no check may
    alert on); an alert belongs to the label when every ``name=value`` pair of ``key`` is in the
    alert's key and it falls in the span from ``start`` to ``end`` (data time, naive UTC).
    """

    kind: str
    check: str
    key: str
    start: datetime
    end: datetime
    note: str

    def key_pairs(self) -> dict[str, str]:
        """The key as a mapping, e.g. ``{'cdn': 'birch', 'country': 'DE'}``."""
        return parse_key(self.key)


def parse_key(key: str) -> dict[str, str]:
    """Split ``'name=value, name=value'`` into a mapping; raise ValueError on a malformed pair."""
    pairs: dict[str, str] = {}
    for part in key.split(","):
        name, sep, value = part.strip().partition("=")
        if not sep or not name.strip() or not value.strip():
            raise ValueError(f"key pair {part.strip()!r} is not name=value")
        if name.strip() in pairs:
            raise ValueError(f"key names {name.strip()!r} twice")
        pairs[name.strip()] = value.strip()
    return pairs


def write_labels(path: Path, labels: list[Label]) -> None:
    """A labels file: a header, then one row per label, times to the second."""
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out)
        writer.writerow(LABEL_FIELDS)
        for label in labels:
            writer.writerow([label.kind, label.check, label.key, label.start.strftime(TIME_FORMAT),
                             label.end.strftime(TIME_FORMAT), label.note])


def read_labels(path: Path) -> list[Label]:
    """Read a labels file; any malformed row raises DataError naming the file and line."""
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8") as src:
            reader = csv.reader(src)
            header = next(reader, None)
            if header is None or tuple(header) != LABEL_FIELDS:
                raise DataError(f"{path}:1: expected the header {','.join(LABEL_FIELDS)}, got {header}")
            return [_parse_label(path, reader.line_num, row) for row in reader if row]
    except (OSError, UnicodeDecodeError) as err:
        raise DataError(f"{path}: cannot read labels: {err}") from None


def _parse_label(path: Path, line: int, row: list[str]) -> Label:
    if len(row) != len(LABEL_FIELDS):
        raise DataError(f"{path}:{line}: expected {len(LABEL_FIELDS)} fields, got {len(row)}")
    kind, check, key, start, end, note = row
    where = f"{path}:{line}"
    if kind not in LABEL_KINDS:
        raise DataError(f"{where}: kind must be one of {', '.join(LABEL_KINDS)}, got {kind!r}")
    if (kind == "decoy") != (check == "*"):
        raise DataError(f"{where}: a decoy has check '*' and an incident names its check")
    try:
        parse_key(key)
    except ValueError as exc:
        raise DataError(f"{where}: key: {exc}") from None
    times = []
    for column, text in (("start", start), ("end", end)):
        found = _time(text.strip())
        if found is None:
            raise DataError(f"{where}: {column} {text!r} is not YYYY-MM-DD, YYYY-MM-DD HH:MM or "
                            "YYYY-MM-DD HH:MM:SS") from None
        times.append(found)
    if times[1] <= times[0]:
        raise DataError(f"{where}: end {end} is not after start {start}")
    return Label(kind, check, key, times[0], times[1], note)


def _time(text: str) -> datetime | None:
    for form in READ_FORMATS:
        try:
            return datetime.strptime(text, form)
        except ValueError:
            continue
    return None


def key_pairs(text: str) -> dict[str, str]:
    """An alert's ``key_text`` (``"cdn=birch, country=DE"``, empty for no key) as a mapping."""
    pairs = {}
    for part in filter(None, (p.strip() for p in text.split(","))):
        name, _, value = part.partition("=")
        pairs[name.strip()] = value.strip()
    return pairs


def label_matches(alert: dict[str, Any], label: Label) -> bool:
    """Same check (a decoy's '*' is any), every labelled key pair present, opened in the span.

    A decoy's span is widened by :data:`DECOY_SLACK`: an alert it provokes a little later is still
    a false alarm caused by it.
    """
    if label.check not in ("*", alert["check_name"]):
        return False
    have = key_pairs(alert["key_text"] or "")
    if any(have.get(k) != v for k, v in label.key_pairs().items()):
        return False
    end = label.end + (DECOY_SLACK if label.kind == "decoy" else timedelta(0))
    return label.start <= alert["opened_at"] <= end


def match_label(alert: dict[str, Any], labels: list[Label]) -> Label | None:
    """The first label the alert matches (labels are in start order), or None."""
    return next((lab for lab in labels if label_matches(alert, lab)), None)


def overlapping(alert: dict[str, Any], labels: list[Label]) -> Label | None:
    """An incident the alert's breaching windows overlap in data time, whatever its check or key."""
    return next((lab for lab in labels if lab.kind == "incident"
                 and alert["breach_started_at"] < lab.end and alert["last_breach_at"] > lab.start), None)
