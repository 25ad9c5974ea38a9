"""Saving through a network cut: events queue in memory and localStorage, survive a reload,
and reach the server exactly once each when the network is back."""

from __future__ import annotations

import json

import pytest

from tests.browser.conftest import log_in, open_read, wait_js

pytestmark = pytest.mark.browser


def pending_ids(page, code: str) -> list[str]:
    stored = page.evaluate(f"localStorage.getItem('cairn.pending.{code}')")
    return [event["client_event_id"] for event in json.loads(stored or "[]")]


def test_it_sends_events_queued_during_a_network_cut_once_each(
    page, live_server, phantom_study, cast
):
    """Cut the events endpoint (Playwright route abort), place three landmarks and reload in
    between, then restore the network with the first answer lost after the server stored it.

    Reference: the issue's rule "nothing lost, nothing doubled": the server must end with
    exactly the three events the page created, each once, under the page's own UUIDs and in
    the order they were made (the unique client_event_id makes retries idempotent).
    """
    from studies.models import PlacementEvent

    log_in(page, live_server, cast["reader_a"])
    events_url = f"**/api/v1/reads/{phantom_study.code}/events/"
    page.route(events_url, lambda route: route.abort("internetdisconnected"))
    open_read(page, live_server, phantom_study)

    page.keyboard.press("Enter")  # ORB-L at the crosshair
    page.keyboard.press("n")
    page.keyboard.press("ArrowUp")
    page.keyboard.press("Enter")  # ORB-R one slice up
    wait_js(page, "document.getElementById('rd-save').dataset.state === 'offline'")
    assert "Offline" in page.inner_text("#rd-save")
    first_two = pending_ids(page, phantom_study.code)
    assert len(first_two) == 2
    assert PlacementEvent.objects.filter(read=phantom_study).count() == 0

    page.reload()  # the events endpoint is still cut
    wait_js(page, "performance.getEntriesByName('viewer:full-ready').length > 0")
    assert "not yet saved" in page.inner_text("#rd-notice")
    assert page.evaluate(
        "cairnRead.book.get('ORB-R') !== null && cairnRead.book.get('ORB-L') !== null"
    )
    page.keyboard.press("n")
    page.keyboard.press("n")
    page.keyboard.press("Enter")  # BEAD-M
    wait_js(page, "cairnRead.queue.pending.length === 3")
    made = pending_ids(page, phantom_study.code)
    assert made[:2] == first_two

    answers = []

    def store_then_lose_answer(route):
        if not answers:
            answers.append(route.fetch().status)  # the server stores it...
            route.abort("connectionreset")  # ...but the page never hears back
        else:
            route.continue_()

    page.unroute(events_url)
    page.route(events_url, store_then_lose_answer)
    page.evaluate("window.dispatchEvent(new Event('online'))")
    wait_js(page, "cairnRead.queue.pending.length === 0", timeout=15000)
    wait_js(page, "document.getElementById('rd-save').dataset.state === 'saved'")

    assert answers == [201]
    stored = list(PlacementEvent.objects.filter(read=phantom_study).order_by("read_version"))
    assert [str(e.client_event_id) for e in stored] == made
    assert [e.landmark.code for e in stored] == ["ORB-L", "ORB-R", "BEAD-M"]
    assert page.evaluate(f"localStorage.getItem('cairn.pending.{phantom_study.code}')") is None


def test_it_shows_a_refused_event_and_stores_nothing_for_it(page, live_server, phantom_study, cast):
    """A 4xx answer (here: the read was locked elsewhere between page load and the click)
    is shown with the server's message, the event is dropped, not retried."""
    from studies.models import PlacementEvent, Read

    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, phantom_study)
    Read.objects.filter(pk=phantom_study.pk).update(status="submitted")
    page.keyboard.press("Enter")
    wait_js(page, "document.getElementById('rd-save').dataset.state === 'refused'")
    assert "submitted and is locked" in page.inner_text("#rd-notice")
    assert page.evaluate("cairnRead.queue.pending.length") == 0
    assert PlacementEvent.objects.filter(read=phantom_study).count() == 0
