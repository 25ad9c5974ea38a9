"""Adjudication end to end: an adjudicator resolves a flagged pair on the review page (a
click in the image places the new point) and the reference set export shows it as
adjudicated; a reader who opens the review URL is refused."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from django.test import Client
from playwright.sync_api import expect

from tests.browser.conftest import log_in, pane_box
from tests.unit.results_study import analysed

pytestmark = pytest.mark.browser


@pytest.fixture
def flagged_study(transactional_db, cast, django_user_model, settings, tmp_path):
    return analysed(cast, django_user_model, Path(settings.CAIRN_DATA_DIR), tmp_path)


def test_an_adjudicator_resolves_a_flagged_pair_and_the_export_shows_it(
    page, live_server, flagged_study, cast
):
    slug = flagged_study.study.slug
    log_in(page, live_server, cast["adjudicator"])
    page.goto(f"{live_server.url}/studies/{slug}/adjudication/")
    first = page.locator("#adjudication-queue tbody tr").first
    case, landmark = first.get_attribute("data-case"), first.get_attribute("data-landmark")
    assert first.get_attribute("data-state") == "open"
    first.locator("a").click()
    # A selector wait, not wait_for_function: the page's CSP forbids eval-based predicates.
    page.wait_for_selector("#reader-app[data-state='ready']", timeout=20000)
    # Two readers, the consensus and the new point.
    assert page.evaluate("window.cairnReview.book.landmarks.length") == 4
    assert page.locator("#rv-points tr[data-point='reader']").count() == 2

    box = pane_box(page, "axial")
    page.mouse.click(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    expect(page.locator("#rv-x")).not_to_have_value("")
    assert page.locator("#rv-new").is_checked()
    typed = [float(page.input_value(sel)) for sel in ("#rv-x", "#rv-y", "#rv-z")]
    page.fill("#rv-reason", "both readers missed the tip")
    page.click("#rv-submit")
    page.wait_for_url(f"**/studies/{slug}/adjudication/")
    row = page.locator(f"#adjudication-queue tr[data-case='{case}'][data-landmark='{landmark}']")
    assert row.get_attribute("data-state") == "decided"

    client = Client()
    client.force_login(cast["pi"])
    body = client.get(f"/api/v1/studies/{slug}/export/reference_set.csv").content.decode()
    table = pd.read_csv(io.StringIO(body))
    hit = table[(table["case"] == case) & (table["landmark"] == landmark)].iloc[0]
    assert hit["method"] == "adjudicated" and hit["decision"] == "new_point"
    np.testing.assert_allclose(hit[["x_mm", "y_mm", "z_mm"]].to_numpy(float), typed, atol=1e-9)


def test_a_reader_who_opens_a_review_url_is_refused(page, live_server, flagged_study, cast):
    from studies.services.adjudication import adjudication_queue

    item = adjudication_queue(flagged_study.study)[0]
    url = f"{live_server.url}/studies/{flagged_study.study.slug}/review/{item.case_code}/B/"
    log_in(page, live_server, cast["reader_a"])
    response = page.goto(url)
    assert response.status == 403
    api = page.request.get(
        f"{live_server.url}/api/v1/studies/{flagged_study.study.slug}/review/"
        f"{item.case_code}/landmarks/B/"
    )
    assert api.status == 403
