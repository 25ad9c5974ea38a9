"""Security settings: password hashing, login throttling, CSP, cookies, HSTS, body limits.

Production settings are loaded in a subprocess (DEBUG=0), since the test settings swap in
a fast hasher and keep DEBUG on.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

from django.test import Client
from django.urls import reverse

ROOT = Path(__file__).resolve().parents[2]
INLINE_SCRIPT = re.compile(r"<script(?![^>]*\bsrc=)(?![^>]*application/json)[^>]*>", re.I)
EVENT_HANDLER = re.compile(r"<[^>]+\son[a-z]+\s*=", re.I)


def production_env(tmp_path: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PYTEST", "DJANGO_"))}
    env.update(
        DEBUG="0",
        SECRET_KEY="x" * 20 + "-a-long-random-looking-production-key-" + "y" * 20,
        ALLOWED_HOSTS="cairn.example.org",
        CAIRN_VAR_DIR=str(tmp_path / "var"),
        DJANGO_SETTINGS_MODULE="cairn.settings",
    )
    return env


def production_settings(tmp_path: Path, code: str) -> dict:
    """Run `code` (which prints one JSON line) with the production settings loaded."""
    script = "import django, json\ndjango.setup()\nfrom django.conf import settings\n" + code
    result = subprocess.run(
        [sys.executable, "-c", script],
        cwd=ROOT,
        env=production_env(tmp_path),
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout.strip().splitlines()[-1])


def test_it_passes_check_deploy_under_the_production_settings(tmp_path) -> None:
    """`manage.py check --deploy` reports nothing, at warning level (Django's deployment
    checklist, docs.djangoproject.com/en/5.2/howto/deployment/checklist/)."""
    result = subprocess.run(
        [sys.executable, "manage.py", "check", "--deploy", "--fail-level", "WARNING"],
        cwd=ROOT,
        env=production_env(tmp_path),
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 0, result.stdout + result.stderr
    assert "no issues" in result.stdout


def test_it_hashes_passwords_with_argon2id_in_production(tmp_path) -> None:
    """The stored hash verifies with argon2-cffi itself; "argon2$argon2id$" is Django's
    encoding of an Argon2id hash (Django docs, "Password management")."""
    values = production_settings(
        tmp_path,
        "from django.contrib.auth.hashers import make_password\n"
        "print(json.dumps({'hashers': settings.PASSWORD_HASHERS,"
        " 'encoded': make_password('correct horse battery')}))",
    )
    from argon2 import PasswordHasher

    assert values["hashers"][0] == "django.contrib.auth.hashers.Argon2PasswordHasher"
    encoded = values["encoded"]
    assert encoded.startswith("argon2$argon2id$")
    assert PasswordHasher().verify(encoded[len("argon2") :], "correct horse battery")


def test_it_sets_secure_cookies_and_hsts_in_production(tmp_path) -> None:
    """Common practice (OWASP session management cheat sheet): Secure and HttpOnly session
    cookie, Secure CSRF cookie, HSTS of at least a year, HTTPS redirect."""
    values = production_settings(
        tmp_path,
        "names = ['SESSION_COOKIE_SECURE', 'CSRF_COOKIE_SECURE', 'SESSION_COOKIE_HTTPONLY',"
        " 'SECURE_HSTS_SECONDS', 'SECURE_HSTS_INCLUDE_SUBDOMAINS', 'SECURE_SSL_REDIRECT',"
        " 'SECURE_CONTENT_TYPE_NOSNIFF', 'X_FRAME_OPTIONS']\n"
        "print(json.dumps({n: getattr(settings, n) for n in names}))",
    )
    assert values["SESSION_COOKIE_SECURE"] is True
    assert values["CSRF_COOKIE_SECURE"] is True
    assert values["SESSION_COOKIE_HTTPONLY"] is True
    assert values["SECURE_HSTS_SECONDS"] >= 31_536_000
    assert values["SECURE_HSTS_INCLUDE_SUBDOMAINS"] is True
    assert values["SECURE_SSL_REDIRECT"] is True
    assert values["SECURE_CONTENT_TYPE_NOSNIFF"] is True
    assert values["X_FRAME_OPTIONS"] == "DENY"


def test_it_sends_hsts_on_https_responses_in_production_mode(db, settings) -> None:
    """Django's SecurityMiddleware adds Strict-Transport-Security on secure requests."""
    settings.SECURE_HSTS_SECONDS = 31_536_000
    settings.SECURE_HSTS_INCLUDE_SUBDOMAINS = True
    response = Client().get(reverse("viewer-login"), secure=True)
    assert response.headers["Strict-Transport-Security"] == (
        "max-age=31536000; includeSubDomains"
    )


def test_it_locks_a_user_name_out_after_repeated_failures(cast, settings) -> None:
    """django-axes: after AXES_FAILURE_LIMIT failures even the right password is refused
    with 429 until the cool-off; the lockout is per user name and address."""
    limit = settings.AXES_FAILURE_LIMIT
    client = Client()
    url = reverse("viewer-login")
    for _ in range(limit - 1):
        response = client.post(url, {"username": "reader_a", "password": "wrong"})
        assert response.status_code == 200  # the form again, with its error
    assert client.post(url, {"username": "reader_a", "password": "wrong"}).status_code == 429
    locked = client.post(url, {"username": "reader_a", "password": "pw-reader_a"})
    assert locked.status_code == 429
    assert "Too many failed logins" in locked.content.decode()
    other = Client().post(url, {"username": "reader_b", "password": "pw-reader_b"})
    assert other.status_code == 302


def test_it_resets_the_failure_count_after_a_successful_login(cast, settings) -> None:
    limit = settings.AXES_FAILURE_LIMIT
    url = reverse("viewer-login")
    client = Client()
    for _ in range(limit - 1):
        client.post(url, {"username": "reader_a", "password": "wrong"})
    assert client.post(url, {"username": "reader_a", "password": "pw-reader_a"}).status_code == 302
    client = Client()
    for _ in range(limit - 1):
        assert client.post(url, {"username": "reader_a", "password": "no"}).status_code == 200


def _csp(response) -> dict[str, list[str]]:
    header = response.headers["Content-Security-Policy"]
    parts = [p.strip().split() for p in header.split(";") if p.strip()]
    return {p[0]: p[1:] for p in parts}


def test_it_sends_a_content_security_policy_without_inline_script(db) -> None:
    """CSP Level 3 (W3C): script-src 'self' with neither 'unsafe-inline' nor 'unsafe-eval'
    forbids inline scripts and event handlers; object-src 'none', frame-ancestors 'none'."""
    policy = _csp(Client().get(reverse("viewer-login")))
    assert policy["script-src"] == ["'self'"]
    assert policy["object-src"] == ["'none'"]
    assert policy["frame-ancestors"] == ["'none'"]
    assert policy["default-src"] == ["'self'"]
    assert "'unsafe-inline'" not in policy["style-src"]


def test_it_renders_pages_with_no_inline_script_or_event_handler(open_study, cast) -> None:
    """Every page a reader or coordinator opens keeps to the CSP: scripts come from files,
    page data only in <script type="application/json"> blocks (json_script)."""
    read = open_study.reads.filter(reader=cast["reader_a"]).first()
    pages = {
        cast["pi"]: [reverse("viewer-home"), reverse("viewer-study", args=[open_study.slug])],
        cast["reader_a"]: [reverse("viewer-home"), reverse("viewer-read", args=[read.code])],
    }
    anonymous = Client().get(reverse("viewer-login")).content.decode()
    assert not INLINE_SCRIPT.search(anonymous)
    for user, urls in pages.items():
        client = Client()
        client.force_login(user)
        for url in urls:
            response = client.get(url)
            assert response.status_code == 200, url
            html = response.content.decode()
            assert not INLINE_SCRIPT.search(html), url
            assert not EVENT_HANDLER.search(html), url
            assert "Content-Security-Policy" in response.headers


def test_it_refuses_an_oversized_api_body_before_reading_it(open_study, cast, settings) -> None:
    settings.CAIRN_REQUEST_MAX_BYTES = 1000
    read = open_study.reads.filter(reader=cast["reader_a"]).first()
    client = Client()
    client.force_login(cast["reader_a"])
    body = json.dumps({"padding": "x" * 2000})
    response = client.post(
        reverse("studies-read-events", args=[read.code]), body, content_type="application/json"
    )
    assert response.status_code == 413
    assert "over the limit of 1000 bytes" in response.json()["error"]
    assert read.events.count() == 0


def test_it_refuses_an_oversized_upload_on_a_page_with_a_message(open_study, cast, settings):
    settings.CAIRN_REQUEST_MAX_BYTES = 1000
    client = Client()
    client.force_login(cast["pi"])
    response = client.post(
        reverse("viewer-study-members", args=[open_study.slug]),
        {"username": "x" * 5000, "role": "reader"},
    )
    assert response.status_code == 413
    assert "over the limit of 1000 bytes" in response.content.decode()


def test_it_refuses_a_malformed_content_length_with_a_message(db) -> None:
    response = Client().post("/api/v1/studies/", b"{}", content_type="application/json",
                             CONTENT_LENGTH="lots")
    assert response.status_code == 400
    assert "'lots'" in response.json()["error"]



def test_it_answers_an_unknown_api_path_with_a_json_message(cast) -> None:
    """The URL resolver's own 404 (a read code that is no UUID) keeps the API's error shape."""
    client = Client()
    client.force_login(cast["reader_a"])
    response = client.get("/api/v1/reads/not-a-uuid/")
    assert response.status_code == 404
    assert response.json() == {"error": "no API endpoint or object at '/api/v1/reads/not-a-uuid/'"}
