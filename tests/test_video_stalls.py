"""`plimsoll explain` scored on real, labelled, open data: the 90 video-stall cases in
tests/data/video_stalls (source and licence in tests/video_stalls.py and the LICENSE beside the data).

Each case is a lake of its own; its labelled minute is explained against the minutes before it. The
figures below are what the method reached when it was written (see DEVELOPERS.md); the test fails if
a change brings any of them lower. For comparison on all 135 published cases (not only these 90): a
re-implementation of the dataset's authors' method measured top-5 0.904, and a plain
expectation-based scan ranked by its score top-1 0.681, top-3 0.889, top-5 0.926 (the dataset's
README; not published figures).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from video_stalls import score_all

REACHED = {"top1": 0.777, "top3": 0.9, "top5": 0.944, "f1": 0.70}


@pytest.mark.slow
def test_the_labelled_cause_is_found_on_real_stall_data(tmp_path: Path) -> None:
    outcomes, figures = score_all(tmp_path)
    assert len(outcomes) == 90
    for name, floor in REACHED.items():
        assert figures[name] >= floor, (name, figures)
