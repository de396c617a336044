"""Scoring a replay's alerts against a labels file: precision, recall, and how long after each
incident's start its first matching alert opened (data time)."""

from __future__ import annotations

import statistics
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from toolkit.backtest.labels import Label, label_matches, match_label, overlapping

_DAY = timedelta(days=1)


@dataclass
class Score:
    """What one setting's alerts were worth over ``[start, end)``; label figures None without labels."""

    alerts: int
    per_day: float
    matched: int | None = None      # alerts matching an incident label of their check
    related: int | None = None      # alerts during a labelled incident, of another check or key
    decoys: int | None = None       # alerts matching a decoy
    unlabelled: int | None = None   # alerts matching no label and overlapping no incident
    incidents: int | None = None    # incidents of the scored checks starting in range
    detected: int | None = None     # of those, found by at least one matching alert
    median_delay: timedelta | None = None
    worst_delay: timedelta | None = None
    missed: list[Label] = field(default_factory=list)

    @property
    def precision(self) -> float | None:
        return self.matched / self.alerts if self.matched is not None and self.alerts else None

    @property
    def recall(self) -> float | None:
        return self.detected / self.incidents if self.incidents else None


def score(alerts: list[dict[str, Any]], labels: list[Label] | None, checks: set[str],
          start: datetime, end: datetime) -> Score:
    """Precision, recall and detection delay of the alerts of ``checks`` opened in ``[start, end)``.

    An alert is *matched* when it matches an incident label of its check (same check, the label's
    key pairs in its key, opened between the incident's start and end); only those count for
    precision. Alerts matching a decoy, alerts during some other labelled incident (*related*) and
    alerts matching nothing are all false positives, shown apart so one can see why. Recall counts
    the incidents of ``checks`` that start in range; an incident's delay is from its start to the
    opening of its first matching alert, in data time.
    """
    scored = [a for a in alerts if a["check_name"] in checks and start <= a["opened_at"] < end]
    result = Score(len(scored), len(scored) / ((end - start) / _DAY))
    if labels is None:
        return result
    kinds = [_kind(a, labels) for a in scored]
    result.matched, result.related = kinds.count("matched"), kinds.count("related")
    result.decoys, result.unlabelled = kinds.count("decoy"), kinds.count("unlabelled")
    incidents = [lab for lab in labels
                 if lab.kind == "incident" and lab.check in checks and start <= lab.start < end]
    delays = []
    for incident in incidents:
        opened = [a["opened_at"] for a in scored if label_matches(a, incident)]
        if opened:
            delays.append(min(opened) - incident.start)
        else:
            result.missed.append(incident)
    result.incidents, result.detected = len(incidents), len(delays)
    if delays:
        result.median_delay = timedelta(seconds=statistics.median(d.total_seconds() for d in delays))
        result.worst_delay = max(delays)
    return result


def _kind(alert: dict[str, Any], labels: list[Label]) -> str:
    """The same verdict the demo's summary gives an alert."""
    label = match_label(alert, labels)
    if label is not None:
        return "matched" if label.kind == "incident" else "decoy"
    return "related" if overlapping(alert, labels) else "unlabelled"
