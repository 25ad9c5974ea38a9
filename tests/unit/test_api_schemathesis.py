"""Bad input against the API: schemathesis generates requests from our own OpenAPI schema.

The schema is loaded from the running Django WSGI application (/api/schema/), and every
operation is exercised with schema-valid (positive) and schema-breaking (negative) data as
an anonymous visitor, a reader and a coordinator. Half of the generated read codes are
swapped for the reader's own read, so requests reach the services and not only the 404.
The coordinator's study has a completed analysis, and every coordinator request carries
the real study slug and a real case code (where the path has them), and half the time a
real landmark, volume level, export format and result table name (and, in bodies, a real
run or read code, and a valid predictions file), so the analysis, adjudication, export and
detector services run on generated input too. Signed-in personas send a real CSRF token,
so their POSTs reach the views. Each persona must get past routing, CSRF and the access
check at least once on every operation on its own objects.
Checked: no 5xx at all, and every 4xx carries a JSON object with a non-empty `error`.

Budget: CAIRN_FUZZ_EXAMPLES examples per operation and mode (default 5; `make faulttest`
runs a larger budget). Seeded, so a failure repeats.
"""

from __future__ import annotations

import functools
import os
import zlib
from collections import Counter

import pytest
import schemathesis
from django.core.handlers.wsgi import WSGIHandler
from django.test import Client
from hypothesis import HealthCheck, Phase, given, seed, settings
from schemathesis import GenerationMode

EXAMPLES = int(os.environ.get("CAIRN_FUZZ_EXAMPLES", "5"))
SCHEMA_PATH = "/api/schema/?format=json"


@functools.cache
def served_schema():
    """The schema as /api/schema/ serves it (built once: generating it takes seconds)."""
    return schemathesis.openapi.from_wsgi(SCHEMA_PATH, WSGIHandler())


def session_cookies(user) -> tuple[dict[str, str], dict[str, str]]:
    """Session and CSRF cookies of a signed-in user, and the matching X-CSRFToken header.

    The CSRF cookie comes from a page with a form: the sign-in page for an anonymous
    visitor, the home page (its sign-out form) for a signed-in user, whom the sign-in page
    only redirects. Without it every POST would stop at the CSRF check (403).
    """
    client = Client()
    if user is not None:
        client.force_login(user)
    client.get("/login/" if user is None else "/")
    cookies = {name: morsel.value for name, morsel in client.cookies.items()}
    assert cookies.get("csrftoken"), f"no CSRF cookie for {user}: {sorted(cookies)}"
    return cookies, {"X-CSRFToken": cookies["csrftoken"]}


def check_response(response, label: str) -> None:
    status = response.status_code
    assert status < 500, f"{label}: {status} {response.text[:500]}"
    if 400 <= status < 500:
        body = response.json()
        assert isinstance(body, dict), f"{label}: {status} body is not an object: {body!r}"
        assert isinstance(body.get("error"), str) and body["error"].strip(), (
            f"{label}: {status} without an error message: {body!r}"
        )


#: The answers of the access helper (studies/access.py) to someone outside the study's data.
ACCESS_REFUSALS = {"no such study", "no such case", "no such read"}


def real_values(study) -> dict[str, list[str]]:
    """Real values for the coordinator's path parameters, from the analysed study."""
    run = study.analysis_runs.filter(status="completed").latest("pk")
    return {
        "slug": [study.slug],
        "case": sorted(str(code) for code in study.cases.values_list("code", flat=True)),
        "landmark": sorted(study.current_landmarks().values_list("code", flat=True)),
        "level": ["full", "coarse"],
        "fmt": ["csv", "json"],
        "name": sorted(run.tables),
    }


def real_body_values(study) -> dict[str, list[str]]:
    """Real values for body fields that name a run or a read (an adjudication decision)."""
    run = study.analysis_runs.filter(status="completed").latest("pk")
    return {
        "run": [str(run.code)],
        "source_read": sorted(str(code) for code in study.reads.values_list("code", flat=True)),
    }


def real_upload(study) -> bytes:
    """A valid detector predictions CSV for the study: the consensus points, 1 mm off in x."""
    from studies.services import analysis_runs

    run = study.analysis_runs.filter(status="completed").latest("pk")
    points = analysis_runs.frame_of(run.tables["consensus"]).dropna(subset=["x_mm"])
    points = points[["case", "landmark", "x_mm", "y_mm", "z_mm"]].assign(x_mm=points["x_mm"] + 1)
    assert len(points) >= 3, points
    return points.to_csv(index=False).encode()


#: Parameters that always take a real value (else the access check answers 404 and the
#: request never reaches a service); the others take one half of the time.
ALWAYS_REAL = {"slug", "case"}


def use_real_values(params: dict, real: dict[str, list[str]], always=ALWAYS_REAL) -> None:
    """Swap generated values for real ones, chosen by a stable hash of the generated value."""
    for name, generated in list(params.items()):
        choices = real.get(name)
        if not choices:
            continue
        pick = zlib.crc32(repr(generated).encode())
        if name in always or pick % 2 == 0:
            params[name] = choices[pick % len(choices)]


def past_access(response) -> bool:
    """The request reached the view's own work: past URL routing, CSRF and the access check.

    A 403 (CSRF, or a role refused) never counts; a 404 counts only when it is not the
    access helper's or the URL resolver's ("no API endpoint or object at ...").
    """
    if response.status_code == 403:
        return False
    if response.status_code != 404:
        return True
    error = str(response.json().get("error", ""))
    return error not in ACCESS_REFUSALS and not error.startswith("no API endpoint")


def exercise(
    operation,
    mode: GenerationMode,
    cookies,
    headers,
    own_read: str | None,
    real: dict | None = None,
    reached: Counter | None = None,
) -> int:
    """Run EXAMPLES generated requests against one operation; return how many were sent.

    `real` (coordinator only) supplies real path parameter values, under "body" real run
    and read codes for half of the body fields that name one, and under "upload" a valid
    predictions file that replaces half of the generated files; `reached` counts, per
    operation, the responses that got past the access check.
    """
    sent = []

    @seed(20261202)
    @settings(
        max_examples=EXAMPLES,
        deadline=None,
        database=None,
        phases=[Phase.explicit, Phase.generate],
        suppress_health_check=list(HealthCheck),
    )
    @given(case=operation.as_strategy(generation_mode=mode))
    def run(case) -> None:
        code = (case.path_parameters or {}).get("code")
        if own_read is not None and code is not None and str(code)[:1] in "02468ace":
            case.path_parameters["code"] = own_read
        if real is not None and isinstance(case.path_parameters, dict):
            use_real_values(case.path_parameters, real)
        body = case.body
        if real is not None and isinstance(body, dict):
            use_real_values(body, real["body"], always=())
            if "file" in body and zlib.crc32(repr(body["file"]).encode()) % 2 == 0:
                body["file"] = real["upload"]
        response = case.call(cookies=cookies, headers=headers)
        sent.append(response.status_code)
        check_response(response, f"{mode.value} {case.method} {case.formatted_path}")
        if reached is not None and past_access(response):
            reached[operation.label] += 1

    run()
    return len(sent)


def analyse(study, cast) -> None:
    """Submit every read of the open study and store a completed analysis run.

    Reader B places landmark A about 4 mm from reader A (4 voxels of 1 mm in x), beyond the
    study's 3 mm tolerance, so A is flagged on every case and decisions can be recorded.
    """
    from studies.services import analysis_runs
    from tests.unit.test_analysis_runs import submit_all

    submit_all(study, cast["reader_a"])
    submit_all(study, cast["reader_b"], offset_vox=(4.0, -0.25, 0.5), absent_b=False)
    run = analysis_runs.execute(analysis_runs.request_analysis(study).pk)
    assert run.status == "completed", run.progress_message
    flagged = analysis_runs.frame_of(run.tables["consensus"]).query("landmark == 'A'")
    assert flagged["flagged"].astype(bool).all(), flagged


@pytest.mark.parametrize("who", ["anonymous", "reader", "coordinator"])
def test_it_answers_generated_requests_with_no_5xx_and_a_message_on_every_4xx(
    open_study, cast, who
) -> None:
    """Source of the inputs: schemathesis (PyPI) from the served OpenAPI 3 schema.

    Every operation on the persona's own objects (the coordinator: the study's slug in the
    path; the reader: a read code) must have had at least one request past URL routing,
    CSRF and the access check (common practice: a fuzzer that only ever meets the
    refusals in front of a service tests nothing behind it).
    """
    user = {"anonymous": None, "reader": cast["reader_a"], "coordinator": cast["pi"]}[who]
    own_read, real, reached = None, None, Counter()
    if who == "reader":
        own_read = str(open_study.reads.filter(reader=user).first().code)
    if who == "coordinator":
        analyse(open_study, cast)
        real = {
            **real_values(open_study),
            "body": real_body_values(open_study),
            "upload": real_upload(open_study),
        }
    schema = served_schema()
    cookies, headers = session_cookies(user)
    total = 0
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 7, [op.label for op in operations]
    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            total += exercise(operation, mode, cookies, headers, own_read, real, reached)
    assert total >= len(operations) * 2
    if who == "coordinator":
        own = [op.label for op in operations if "{slug}" in op.path]
        assert len(own) >= 9, own  # analysis, adjudication, review, exports, predictions
        assert [label for label in own if not reached[label]] == []
    if who == "reader":
        own = [op.label for op in operations if "/reads/{code}/" in op.path]
        assert len(own) >= 5, own  # detail, volume, events, submit, activity
        assert [label for label in own if not reached[label]] == []


def test_the_schema_documents_the_predictions_upload_as_a_file(db) -> None:
    """OpenAPI 3.0, "Considerations for File Uploads": a file part is string, format binary."""
    components = served_schema().raw_schema["components"]["schemas"]
    upload = components["PredictionsUpload"]
    assert upload["properties"]["file"] == {"type": "string", "format": "binary"}
    assert upload["required"] == ["file"]
