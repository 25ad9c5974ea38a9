"""Bad input against the API: schemathesis generates requests from our own OpenAPI schema.

The schema is loaded from the running Django WSGI application (/api/schema/), and every
operation is exercised with schema-valid (positive) and schema-breaking (negative) data as
an anonymous visitor, a reader and a coordinator. Half of the generated read codes are
swapped for the reader's own read, so requests reach the services and not only the 404.
Checked: no 5xx at all, and every 4xx carries a JSON object with a non-empty `error`.

Budget: CAIRN_FUZZ_EXAMPLES examples per operation and mode (default 5; `make faulttest`
runs a larger budget). Seeded, so a failure repeats.
"""

from __future__ import annotations

import functools
import os

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
    """Session and CSRF cookies of a signed-in user, and the matching X-CSRFToken header."""
    client = Client()
    if user is not None:
        client.force_login(user)
    client.get("/login/")
    cookies = {name: morsel.value for name, morsel in client.cookies.items()}
    return cookies, {"X-CSRFToken": cookies.get("csrftoken", "")}


def check_response(response, label: str) -> None:
    status = response.status_code
    assert status < 500, f"{label}: {status} {response.text[:500]}"
    if 400 <= status < 500:
        body = response.json()
        assert isinstance(body, dict), f"{label}: {status} body is not an object: {body!r}"
        assert isinstance(body.get("error"), str) and body["error"].strip(), (
            f"{label}: {status} without an error message: {body!r}"
        )


def exercise(operation, mode: GenerationMode, cookies, headers, own_read: str | None) -> int:
    """Run EXAMPLES generated requests against one operation; return how many were sent."""
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
        response = case.call(cookies=cookies, headers=headers)
        sent.append(response.status_code)
        check_response(response, f"{mode.value} {case.method} {case.formatted_path}")

    run()
    return len(sent)


@pytest.mark.parametrize("who", ["anonymous", "reader", "coordinator"])
def test_it_answers_generated_requests_with_no_5xx_and_a_message_on_every_4xx(
    open_study, cast, who
) -> None:
    """Source of the inputs: schemathesis (PyPI) from the served OpenAPI 3 schema."""
    user = {"anonymous": None, "reader": cast["reader_a"], "coordinator": cast["pi"]}[who]
    own_read = None
    if who == "reader":
        own_read = str(open_study.reads.filter(reader=user).first().code)
    schema = served_schema()
    cookies, headers = session_cookies(user)
    total = 0
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 7, [op.label for op in operations]
    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            total += exercise(operation, mode, cookies, headers, own_read)
    assert total >= len(operations) * 2
