"""Fixtures shared by the unit tests that need a study with a completed analysis."""

from __future__ import annotations

import pytest


@pytest.fixture
def analysed(open_study, cast):
    """The open study with both readers' reads submitted and one completed analysis run.

    Returns (study, run).
    """
    from studies.constants import RunStatus
    from studies.services import analysis_runs
    from tests.unit.test_analysis_runs import submit_all

    submit_all(open_study, cast["reader_a"])
    submit_all(open_study, cast["reader_b"], offset_vox=(0.5, -0.25, 0.5), absent_b=False)
    run = analysis_runs.execute(analysis_runs.request_analysis(open_study).pk)
    assert run.status == RunStatus.COMPLETED
    return open_study, run


@pytest.fixture
def sent_tasks(monkeypatch) -> list[dict]:
    """The analysis task messages sent (apply_async keyword arguments), none really sent."""
    from studies import tasks

    sent: list[dict] = []
    monkeypatch.setattr(tasks.compute_analysis, "apply_async", lambda **kw: sent.append(kw))
    return sent
