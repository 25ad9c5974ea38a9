"""The results dashboard in a real browser (Debian's chromium): figures load, tables sort,
the drift alarm shows, and readers are kept out."""

from __future__ import annotations

import time

import pytest

from tests.browser.conftest import log_in

pytestmark = pytest.mark.browser


@pytest.fixture
def demo_study(transactional_db):
    """The demo study with its analysis computed (as `manage.py analyze --here` does)."""
    from studies.services import analysis_runs
    from studies.services.demo import build_demo

    study = build_demo()
    analysis_runs.execute(analysis_runs.request_analysis(study).pk)
    return study


def test_the_dashboard_loads_with_its_figures_for_the_demo_study(page, live_server,
                                                                 demo_study):
    from django.contrib.auth import get_user_model

    log_in(page, live_server, get_user_model().objects.get(username="hale"))
    response = page.goto(f"{live_server.url}/studies/{demo_study.slug}/results/")
    assert response.status == 200
    images = page.locator(".result-figure img")
    assert images.count() == 10  # distances, pair, 3 repeat, 3 drift, points, success
    images.last.scroll_into_view_if_needed()
    for i in range(images.count()):
        images.nth(i).scroll_into_view_if_needed()
    loaded = "imgs => imgs.filter(img => img.complete && img.naturalWidth > 0).length"
    deadline = time.monotonic() + 120  # the figures are drawn on request, on a busy machine
    while images.evaluate_all(loaded) < 10 and time.monotonic() < deadline:
        page.wait_for_timeout(250)
    assert images.evaluate_all(loaded) == 10
    assert page.locator("#table-readers .badge-alarm").count() >= 1  # cleo drifts (demo)
    assert page.locator("#run-status").inner_text() == "Completed"


def test_a_table_sorts_when_its_heading_is_clicked(page, live_server, demo_study):
    from django.contrib.auth import get_user_model

    log_in(page, live_server, get_user_model().objects.get(username="hale"))
    page.goto(f"{live_server.url}/studies/{demo_study.slug}/results/")
    table = page.locator("#table-agreement_by_landmark table")
    column = [c.inner_text() for c in table.locator("thead th").all()].index("mean_pairwise_mm")

    def values() -> list[float]:
        cells = table.locator(f"tbody tr td:nth-child({column + 1})").all()
        return [float(c.inner_text()) for c in cells]

    heading = table.locator("thead th").nth(column)
    heading.click()
    assert values() == sorted(values())
    assert heading.get_attribute("aria-sort") == "ascending"
    heading.click()
    assert values() == sorted(values(), reverse=True)


def test_a_reader_who_opens_a_dashboard_url_is_refused(page, live_server, phantom_study, cast):
    log_in(page, live_server, cast["reader_a"])
    slug = phantom_study.study.slug
    for path in (f"/studies/{slug}/results/", f"/studies/{slug}/report/",
                 f"/studies/{slug}/results/figures/distances.svg"):
        response = page.goto(f"{live_server.url}{path}")
        assert response.status in (403, 404), path
    log_in(page, live_server, cast["outsider"])
    assert page.goto(f"{live_server.url}/studies/{slug}/results/").status == 404
