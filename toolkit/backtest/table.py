"""A backtest as people read it: the settings side by side in a fixed-width table (JSON is
:func:`toolkit.backtest.replay.backtest_json`)."""

from __future__ import annotations

from datetime import timedelta

from toolkit.backtest.replay import Backtest


def backtest_table(outcome: Backtest) -> str:
    """A fixed-width table, one row per check and setting, then the incidents each setting missed."""
    labelled = outcome.labels is not None
    head = ["check", "setting", "alerts", "per day"]
    if labelled:
        head += ["matched", "related", "decoys", "precision", "recall", "median delay", "worst delay"]
    body = []
    for row in outcome.rows:
        s = row.score
        cells = [row.check or "(all)", outcome.name(row.setting), str(s.alerts), f"{s.per_day:.2f}"]
        if labelled:
            cells += [str(s.matched), str(s.related), str(s.decoys), _fraction(s.precision),
                      f"{_fraction(s.recall)} ({s.detected}/{s.incidents})", _duration(s.median_delay),
                      _duration(s.worst_delay)]
        body.append(cells)
    numeric = {i for i, name in enumerate(head) if name not in ("check", "setting")}
    widths = [max(len(r[i]) for r in (head, *body)) for i in range(len(head))]

    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if i in numeric else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    lines = [
        f"Backtest of {', '.join(outcome.checks)}",
        f"alerts opened from {outcome.start:%Y-%m-%d %H:%M} to {outcome.end:%Y-%m-%d %H:%M} "
        f"({outcome.days:g} days of data time); earlier data warms up the baselines",
        "",
        line(head),
        "  ".join("-" * w for w in widths),
        *(line(cells) for cells in body),
    ]
    spelt = [f"  {outcome.name(s)}: {s.label}" for s in outcome.settings if outcome.name(s) != s.label]
    if spelt:
        lines += ["", "Settings:", *spelt]
    if labelled:
        missed = [(row, m) for row in outcome.rows if row.check is not None for m in row.score.missed]
        lines += ["", "precision: alerts matching an incident label of their check / alerts opened in range",
                  "recall: labelled incidents of the check starting in range that an alert found",
                  "delay: from an incident's start to the opening of its first matching alert, in data time"]
        lines += [f"missed with {outcome.name(row.setting)}: {m.check} {m.key} "
                  f"(from {m.start:%Y-%m-%d %H:%M})"
                  for row, m in missed]
    if outcome.kept:
        lines += ["", f"Scratch warehouses kept in {outcome.kept}/ (one folder per setting, backtest.json)"]
    return "\n".join(lines)


def _fraction(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f}"


def _duration(value: timedelta | None) -> str:
    """``45m``, ``2h 05m``, ``1d 03h``: data-time delays as one reads them."""
    if value is None:
        return "-"
    minutes = int(value.total_seconds() // 60)
    days, rest = divmod(minutes, 24 * 60)
    hours, minutes = divmod(rest, 60)
    if days:
        return f"{days}d {hours:02d}h"
    return f"{hours}h {minutes:02d}m" if hours else f"{minutes}m"
