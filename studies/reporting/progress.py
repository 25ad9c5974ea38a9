"""Reading progress: each reader's pace and the projected date their reads are done.

Django-free: the callers pass plain times and counts.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

__all__ = ["MIN_PERIOD", "Pace", "ProgressInputError", "reader_pace", "study_completion"]

#: A reading period shorter than this counts as this long, so one quick morning does not
#: promise an absurd pace.
MIN_PERIOD = timedelta(days=1)


class ProgressInputError(ValueError):
    """A count or time that cannot be used; the message quotes it."""


@dataclass(frozen=True)
class Pace:
    """One reader's pace and projection.

    Attributes
    ----------
    submitted, remaining : int
        Reads submitted, and assigned but not yet submitted.
    reads_per_day : float or None
        Submitted reads per day over the reading period; None before the first submission.
    projected : datetime or None
        When the remaining reads should be done; ``now`` when none remain, None when there
        is no pace yet.
    """

    submitted: int
    remaining: int
    reads_per_day: float | None
    projected: datetime | None


def reader_pace(submitted_at: Sequence[datetime], remaining: int, now: datetime, *,
                started_at: datetime | None = None,
                available_from: Iterable[datetime | None] = ()) -> Pace:
    """A reader's pace and the projected completion of their remaining reads.

    Parameters
    ----------
    submitted_at : sequence of datetime
        When each of the reader's submitted reads was submitted.
    remaining : int
        Reads assigned to the reader and not yet submitted.
    now : datetime
        The present (aware, like the other times).
    started_at : datetime, optional
        When the reader began (e.g. the first read opened); defaults to the first
        submission.
    available_from : iterable of datetime or None
        When each remaining read becomes available (repeat reads wait out the washout);
        None entries are ignored.

    Returns
    -------
    Pace

    Notes
    -----
    pace = submitted / max(now - start, 1 day), in reads per day; the projection is
    now + remaining / pace, but never before the last remaining read becomes available.
    """
    if isinstance(remaining, bool) or not isinstance(remaining, int) or remaining < 0:
        raise ProgressInputError(f"remaining must be an integer >= 0, got {remaining!r}")
    times = sorted(submitted_at)
    if times and times[-1] > now:
        raise ProgressInputError(f"a submission time {times[-1]!r} lies after now {now!r}")
    if remaining == 0:
        return Pace(len(times), 0, _pace(times, now, started_at), now)
    pace = _pace(times, now, started_at)
    if pace is None:
        return Pace(0, remaining, None, None)
    done = now + timedelta(days=remaining / pace)
    later = [t for t in available_from if t is not None]
    if later:
        done = max(done, max(later))
    return Pace(len(times), remaining, pace, done)


def _pace(times: list[datetime], now: datetime, started_at: datetime | None) -> float | None:
    if not times:
        return None
    start = min(started_at or times[0], times[0])
    period = max(now - start, MIN_PERIOD)
    return len(times) / (period / timedelta(days=1))


def study_completion(paces: Iterable[Pace]) -> datetime | None:
    """The latest projection over the readers; None if a reader with reads left has no pace."""
    latest = None
    for pace in paces:
        if pace.remaining and pace.projected is None:
            return None
        if pace.projected is not None and (latest is None or pace.projected > latest):
            latest = pace.projected
    return latest
