"""Analysis runs: one query in, the core's tables out, idempotent, failures stored not raised."""

from __future__ import annotations

import uuid
from datetime import timedelta

import numpy as np
import pandas as pd
import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.utils import timezone

from studies.analysis.pipeline import run_analysis
from studies.constants import EventKind, Role, RunStatus
from studies.imaging.geometry import voxel_to_world
from studies.models import AnalysisRun
from studies.services import analysis_runs, placing, reads, studies


def submit_all(study, user, offset_vox=(0.0, 0.0, 0.0), absent_b=True) -> None:
    for read in study.reads.filter(reader=user).order_by("worklist_position"):
        affine = np.array(read.case.affine)
        xyz = voxel_to_world(affine, np.array([5.0, 6.0, 4.0]) + np.array(offset_vox))
        placing.record_event(read, user, placing.EventInput(
            "A", EventKind.PLACED, uuid.uuid4(), timezone.now(),
            x_mm=float(xyz[0]), y_mm=float(xyz[1]), z_mm=float(xyz[2])))
        if absent_b:
            data = placing.EventInput("B", EventKind.MARKED_ABSENT, uuid.uuid4(), timezone.now())
        else:
            xyz = voxel_to_world(affine, np.array([2.0, 2.0, 2.0]))
            data = placing.EventInput("B", EventKind.PLACED, uuid.uuid4(), timezone.now(),
                                      x_mm=float(xyz[0]), y_mm=float(xyz[1]), z_mm=float(xyz[2]))
        placing.record_event(read, user, data)
        reads.submit_read(read, user)


@pytest.fixture
def submitted_with_debounce(open_study, cast, settings, django_capture_on_commit_callbacks):
    """Both readers' reads submitted with a 45 s debounce; returns the capture context."""
    settings.CAIRN_ANALYSIS_DEBOUNCE_SECONDS = 45
    with django_capture_on_commit_callbacks(execute=True):
        submit_all(open_study, cast["reader_a"])
        submit_all(open_study, cast["reader_b"])
    return open_study


@pytest.fixture
def analysed_study(open_study, cast):
    submit_all(open_study, cast["reader_a"])
    submit_all(open_study, cast["reader_b"], offset_vox=(0.5, -0.25, 0.5), absent_b=False)
    return open_study


def test_it_reads_placements_in_one_query(analysed_study) -> None:
    with CaptureQueriesContext(connection) as queries:
        table = analysis_runs.placements_table(analysed_study)
    assert len(queries) == 1
    assert list(table.columns) == analysis_runs.PLACEMENT_COLUMNS
    assert len(table) == 12 and set(table["absent"]) == {0, 1}


def test_it_stores_the_same_tables_the_core_computes(analysed_study) -> None:
    """The stored result equals run_analysis on the same table (the core is the reference)."""
    run = analysis_runs.execute(analysis_runs.request_analysis(analysed_study).pk)
    assert run.status == RunStatus.COMPLETED and run.progress == 1.0
    expected = run_analysis(analysis_runs.placements_table(analysed_study), **run.parameters)
    for name, frame in expected.tables.items():
        stored = analysis_runs.frame_of(run.tables[name])
        assert list(stored.columns) == list(frame.columns)
        numeric = frame.select_dtypes("number").columns
        np.testing.assert_allclose(stored[numeric].to_numpy(float), frame[numeric].to_numpy(float),
                                   rtol=1e-12, equal_nan=True)


def test_it_reuses_the_stored_run_for_unchanged_inputs(analysed_study) -> None:
    first = analysis_runs.execute(analysis_runs.request_analysis(analysed_study).pk)
    again = analysis_runs.request_analysis(analysed_study)
    assert again.pk == first.pk
    assert AnalysisRun.objects.count() == 1


def test_a_duplicate_message_does_nothing(analysed_study) -> None:
    run = analysis_runs.request_analysis(analysed_study)
    analysis_runs.execute(run.pk)
    finished = AnalysisRun.objects.get(pk=run.pk).finished_at
    assert analysis_runs.execute(run.pk) is None
    assert AnalysisRun.objects.get(pk=run.pk).finished_at == finished


def test_a_run_killed_half_way_and_rerun_equals_a_clean_run(analysed_study) -> None:
    clean = analysis_runs.execute(analysis_runs.request_analysis(analysed_study).pk)
    killed = AnalysisRun.objects.create(study=analysed_study, status=RunStatus.RUNNING,
                                        parameters=clean.parameters, progress=0.4,
                                        heartbeat_at=timezone.now() - timedelta(minutes=10))
    rerun = analysis_runs.execute(killed.pk)
    assert rerun.status == RunStatus.COMPLETED and rerun.attempts == 2
    assert rerun.tables == clean.tables


def test_a_running_run_is_not_taken_over_while_its_worker_reports(analysed_study) -> None:
    """The delivery is told to come back later (the task retries after the stale period)."""
    live = AnalysisRun.objects.create(study=analysed_study, status=RunStatus.RUNNING,
                                      heartbeat_at=timezone.now())
    with pytest.raises(analysis_runs.RunBusy):
        analysis_runs.execute(live.pk)
    assert AnalysisRun.objects.get(pk=live.pk).status == RunStatus.RUNNING


def test_a_run_deferred_while_the_broker_was_down_is_sent_again(analysed_study, monkeypatch):
    from studies import tasks

    sent = []

    def broker_down(**kwargs):
        raise ConnectionError("broker unreachable")

    monkeypatch.setattr(tasks.compute_analysis, "apply_async", broker_down)
    run = analysis_runs.request_analysis(analysed_study)
    assert not analysis_runs.send(run.pk)
    run.refresh_from_db()
    assert run.status == RunStatus.PENDING and run.progress_message.startswith("deferred:")
    monkeypatch.setattr(tasks.compute_analysis, "apply_async", lambda **kw: sent.append(kw))
    assert analysis_runs.send_waiting_runs(analysed_study) == 1
    assert sent == [{"kwargs": {"run_pk": run.pk}}]
    run.refresh_from_db()
    assert run.progress_message == "queued"
    assert analysis_runs.send_waiting_runs(analysed_study) == 0
    assert not analysis_runs.send(run.pk)  # queued once: a second caller sends nothing


def test_it_marks_a_study_too_small_to_analyse_as_failed_with_the_reason(open_study, cast) -> None:
    submit_all(open_study, cast["reader_a"])
    run = analysis_runs.execute(analysis_runs.request_analysis(open_study).pk)
    assert run.status == RunStatus.FAILED
    assert "two readers" in run.reason


def test_submitting_reads_queues_at_most_one_run_per_study(open_study, cast, django_capture_on_commit_callbacks) -> None:  # noqa: E501
    with django_capture_on_commit_callbacks(execute=True):
        submit_all(open_study, cast["reader_a"])
        submit_all(open_study, cast["reader_b"])
    assert AnalysisRun.objects.filter(status=RunStatus.PENDING).count() == 1


def test_submitted_reads_fold_into_one_waiting_run_sent_when_its_debounce_has_passed(
    submitted_with_debounce, sent_tasks
) -> None:
    run = AnalysisRun.objects.get(status=RunStatus.PENDING)
    assert sent_tasks == [] and run.progress_message.startswith("waiting:")
    assert analysis_runs.send_waiting_runs(now=run.requested_at + timedelta(seconds=44)) == 0
    assert analysis_runs.send_waiting_runs(now=run.requested_at + timedelta(seconds=45)) == 1
    assert sent_tasks == [{"kwargs": {"run_pk": run.pk}}]


def test_run_now_sends_a_debounced_run_at_once(
    submitted_with_debounce, sent_tasks, django_capture_on_commit_callbacks
) -> None:
    with django_capture_on_commit_callbacks(execute=True):
        run = analysis_runs.request_analysis(submitted_with_debounce)
    assert AnalysisRun.objects.count() == 1
    assert sent_tasks == [{"kwargs": {"run_pk": run.pk}}]
    assert AnalysisRun.objects.get(pk=run.pk).progress_message == "queued"


def test_a_run_stores_the_fingerprint_of_the_rows_it_analysed(open_study, cast) -> None:
    """Reads submitted while a run waits fold into it: its digest must cover them."""
    submit_all(open_study, cast["reader_a"])
    run = analysis_runs.request_analysis(open_study)
    asked_digest = run.input_digest
    submit_all(open_study, cast["reader_b"], offset_vox=(0.5, 0.0, 0.0))
    run = analysis_runs.execute(run.pk)
    table = analysis_runs.placements_table(open_study)
    assert run.status == RunStatus.COMPLETED and run.n_placements == len(table)
    assert run.input_digest == analysis_runs.fingerprint(
        table, run.parameters, analysis_runs.code_version())
    assert run.input_digest != asked_digest


def test_it_adds_an_adaptive_read_for_a_flagged_case(open_study, cast, django_user_model) -> None:
    type(open_study).objects.filter(pk=open_study.pk).update(
        adaptive_reads=True, max_readers_per_case=3, tolerance_mm=0.5)
    open_study.refresh_from_db()
    extra = django_user_model.objects.create_user("reader_c")
    studies.add_member(open_study, extra, Role.READER)
    submit_all(open_study, cast["reader_a"])
    submit_all(open_study, cast["reader_b"], offset_vox=(4.0, 0.0, 0.0))
    run = analysis_runs.execute(analysis_runs.request_analysis(open_study).pk)
    consensus = analysis_runs.frame_of(run.tables["consensus"])
    flagged = set(consensus.loc[consensus["flagged"].astype(bool), "case"])
    assert flagged
    for case in open_study.cases.filter(pseudonym__in=flagged):
        readers = set(case.reads.values_list("reader__username", flat=True))
        if readers >= {"reader_a", "reader_b"}:
            assert "reader_c" in readers


def test_the_stored_tables_round_trip_as_frames(analysed_study) -> None:
    run = analysis_runs.execute(analysis_runs.request_analysis(analysed_study).pk)
    frame = analysis_runs.frame_of(run.tables["agreement_by_landmark"])
    assert isinstance(frame, pd.DataFrame) and set(frame["landmark"]) == {"A", "B"}


def test_a_worker_sends_the_waiting_runs_on_connecting_and_then_every_few_seconds(
    analysed_study, sent_tasks
) -> None:
    """The consumer step in cairn/celery.py sends due runs at once and sets a repeating timer."""
    from cairn.celery import SendWaitingRuns, app

    run = analysis_runs.request_analysis(analysed_study)
    AnalysisRun.objects.filter(pk=run.pk).update(progress_message="deferred: broker down")

    class Timer:
        def __init__(self):
            self.calls = []

        def call_repeatedly(self, seconds, fun):
            self.calls.append((seconds, fun))
            return self

        def cancel(self):
            self.calls.clear()

    consumer = type("Consumer", (), {"timer": Timer()})()
    assert SendWaitingRuns in app.steps["consumer"]
    step = SendWaitingRuns(parent=None)
    step.start(consumer=consumer)
    assert sent_tasks == [{"kwargs": {"run_pk": run.pk}}]
    assert [seconds for seconds, _ in consumer.timer.calls] == [SendWaitingRuns.SEND_EVERY_S]
    step.stop(consumer=consumer)
    assert consumer.timer.calls == []
