"""The words people read (toolkit/words.py): figures in the measure's unit, rounded for reading,
plurals, one line per event. The listings, payloads, templates and mail all say them so."""

from __future__ import annotations

import pytest

from toolkit.outputs.listings import figures
from toolkit.words import (Reading, against_text, event_line, incident_event_line, measure_text, number_text,
                           plural, printable, readable_number)


@pytest.mark.parametrize("value,shown", [
    (3226.1180000000004, "3,226"), (32.345, "32.3"), (3.2345, "3.23"), (0.012345, "0.0123"), (0.6, "0.6"),
    (100.0, "100"), (1_000_000, "1,000,000"), (0, "0"), (-2.5, "-2.5"), (None, "-"), (float("nan"), "-"),
    (float("inf"), "-"), (0.00049, "0.00049"),
])
def test_numbers_are_rounded_for_reading(value, shown: str) -> None:
    assert number_text(value) == shown


def test_binary_noise_is_dropped_from_values_kept_as_numbers() -> None:
    assert readable_number(3226.1180000000004) == 3226.118
    assert readable_number(0.1 + 0.2) == 0.3
    assert readable_number(1 / 3) == 0.333333333333


@pytest.mark.parametrize("value,reading,shown", [
    (0.0325, Reading("rate"), "3.25 %"),
    (0.6, Reading("rate"), "60 %"),
    (3226.1180000000004, Reading("quantile", "ms"), "3,226 ms"),
    (0.0277, Reading("ratio", "%"), "2.77 %"),
    (2850.5, Reading("ratio", "kbps"), "2,851 kbps"),
    (0.8123, Reading("ratio"), "0.812"),
    (None, Reading("rate"), "-"),
])
def test_values_read_in_the_measures_unit(value, reading: Reading, shown: str) -> None:
    assert measure_text(value, reading) == shown


def test_a_cusum_threshold_is_its_decision_interval() -> None:
    assert against_text(0.031, 8.1234, Reading("rate", None, "cusum")) == \
        "3.1 %, its CUSUM beyond the decision interval h = 8.12"
    assert figures({"peak_value": 0.031, "threshold": 8.1234}, Reading("rate", None, "cusum")) == ("3.1 %", "h 8.12")
    assert against_text(0.031, 0.012, Reading("rate", None, "p_chart")) == "3.1 % against a threshold of 1.2 %"


def test_plurals() -> None:
    assert [plural(n, "alert") for n in (0, 1, 2, 1024)] == ["0 alerts", "1 alert", "2 alerts", "1,024 alerts"]


def test_an_event_line_says_check_key_split_value_threshold_and_who_was_hit() -> None:
    payload = {"event": "opened", "severity": "high", "check": "title_errors",
               "key_text": "site=kids, title_id=t-1", "split_value": "DRM-LICENSE", "value": 0.6, "threshold": 0.1,
               "affected_sessions": 1, "affected_viewers": 1, "breach_windows": 1}
    assert event_line(payload, Reading("rate")) == (
        "high opened: title_errors site=kids, title_id=t-1 [DRM-LICENSE]: 60 % against a threshold of 10 %; "
        "1 session and 1 viewer affected in 1 breaching window")
    expired = dict(payload, event="closed", close_reason="expired", value=None, threshold=None, split_value=None,
                   key_text="site=kids\nfake line", affected_viewers=None, breach_windows=3, affected_sessions=40)
    assert event_line(expired, Reading("rate")) == (
        "high closed (expired): title_errors site=kids\\x0afake line: no window for its expire_after; "
        "40 sessions affected in 3 breaching windows")


def test_an_incident_line_says_its_cause_worst_value_and_size() -> None:
    payload = {"event": "updated", "severity": "medium", "status": "open", "alerts": 3, "affected_sessions": 81,
               "affected_viewers": 64, "cause": {"check": "startup_time_by_device", "key_text": "device_family=tv",
                                                 "split_value": None, "alarm": None}}
    assert incident_event_line(payload, Reading("quantile", "ms"), 5238.4, 3417.0) == (
        "medium incident grew: cause startup_time_by_device device_family=tv: at worst 5,238 ms against a "
        "threshold of 3,417 ms; 3 alerts; 81 sessions and 64 viewers affected")


def test_printable_escapes_what_could_add_a_line_or_move_the_cursor() -> None:
    assert printable("a\nb\x1b[2J\u2028c") == "a\\x0ab\\x1b[2J\\u2028c"
