"""Reading pace and the projected completion date (hand examples)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from studies.reporting.progress import ProgressInputError, reader_pace, study_completion

NOW = datetime(2026, 3, 31, 12, 0, tzinfo=UTC)


def test_it_projects_from_the_pace_over_the_reading_period():
    """Hand example: reading began 10 days ago and 5 reads are submitted, so the pace is
    0.5 reads a day; 4 reads remain, so they take 8 more days: 8 April 2026, 12:00."""
    submitted = [NOW - timedelta(days=d) for d in (9, 7, 5, 2, 1)]
    pace = reader_pace(submitted, 4, NOW, started_at=NOW - timedelta(days=10))
    assert pace.reads_per_day == pytest.approx(0.5)
    assert pace.projected == datetime(2026, 4, 8, 12, 0, tzinfo=UTC)


def test_a_repeat_read_in_washout_holds_the_projection_back():
    """Same pace, 1 read left: 2 days at 0.5 a day, but that repeat read only becomes
    available in 6 days, so the projection is its availability."""
    submitted = [NOW - timedelta(days=d) for d in (9, 7, 5, 2, 1)]
    available = NOW + timedelta(days=6)
    pace = reader_pace(submitted, 1, NOW, started_at=NOW - timedelta(days=10),
                       available_from=[available])
    assert pace.projected == available


def test_a_short_period_counts_as_one_day():
    """3 reads in the first two hours: the period is taken as 1 day, pace 3 a day, and 6
    remaining reads take 2 days."""
    submitted = [NOW - timedelta(hours=h) for h in (2, 1, 0.5)]
    pace = reader_pace(submitted, 6, NOW)
    assert pace.reads_per_day == pytest.approx(3.0)
    assert pace.projected == NOW + timedelta(days=2)


def test_a_reader_who_has_not_submitted_has_no_projection_and_so_has_the_study():
    idle = reader_pace([], 5, NOW)
    done = reader_pace([NOW - timedelta(days=1)], 0, NOW)
    busy = reader_pace([NOW - timedelta(days=4)], 2, NOW)  # 0.25 a day: 8 days
    assert idle.projected is None and idle.reads_per_day is None
    assert done.projected == NOW
    assert study_completion([done, busy]) == NOW + timedelta(days=8)
    assert study_completion([done, busy, idle]) is None


def test_it_refuses_negative_counts_and_submissions_in_the_future():
    with pytest.raises(ProgressInputError, match="-1"):
        reader_pace([], -1, NOW)
    with pytest.raises(ProgressInputError, match="2026"):
        reader_pace([NOW + timedelta(days=1)], 1, NOW)
