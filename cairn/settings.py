"""cairn settings, all read from environment variables (see DEVELOPERS.md for the table).

The defaults run a development instance with no servers to install: a SQLite file and a
Celery broker on kombu's filesystem transport, both under var/.
"""

from __future__ import annotations

from pathlib import Path
from urllib.parse import urlsplit

import dj_database_url

from .env import (
    ConfigError,
    development_secret_key,
    envbool,
    envint,
    envlist,
    envsecret,
    envstr,
)

BASE_DIR = Path(__file__).resolve().parent.parent
VAR_DIR = Path(envstr("CAIRN_VAR_DIR", str(BASE_DIR / "var")))

DEBUG = envbool("DEBUG", True)
SECRET_KEY = envsecret("SECRET_KEY")
if not SECRET_KEY:
    if not DEBUG:
        raise ConfigError("SECRET_KEY: required when DEBUG is off (or set SECRET_KEY_FILE)")
    SECRET_KEY = development_secret_key(VAR_DIR)
ALLOWED_HOSTS = envlist("ALLOWED_HOSTS", ["127.0.0.1", "localhost", "[::1]"] if DEBUG else [])
CSRF_TRUSTED_ORIGINS = envlist("CSRF_TRUSTED_ORIGINS", [])

CAIRN_DATA_DIR = Path(envstr("CAIRN_DATA_DIR", str(VAR_DIR / "data")))
CAIRN_UPLOAD_MAX_BYTES = envint("CAIRN_UPLOAD_MAX_BYTES", 2 * 1024**3)
CAIRN_UPLOAD_DIR = Path(envstr("CAIRN_UPLOAD_DIR", str(VAR_DIR / "uploads")))
# Zip archives (imports and uploads): refused beyond these limits (zip-bomb guard).
CAIRN_ZIP_MAX_BYTES = envint("CAIRN_ZIP_MAX_BYTES", 8 * 1024**3)
CAIRN_ZIP_MAX_FILES = envint("CAIRN_ZIP_MAX_FILES", 20_000)
CAIRN_ZIP_MAX_RATIO = envint("CAIRN_ZIP_MAX_RATIO", 200)
CAIRN_ID_SALT = envsecret("CAIRN_ID_SALT") or SECRET_KEY

INSTALLED_APPS = [
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "django.contrib.staticfiles",
    "rest_framework",
    "drf_spectacular",
    "drf_spectacular_sidecar",
    "studies",
    "viewer",
]

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
]

ROOT_URLCONF = "cairn.urls"
WSGI_APPLICATION = "cairn.wsgi.application"
TEMPLATES = [
    {
        "BACKEND": "django.template.backends.django.DjangoTemplates",
        "DIRS": [],
        "APP_DIRS": True,
        "OPTIONS": {
            "context_processors": [
                "django.template.context_processors.request",
                "django.contrib.auth.context_processors.auth",
                "django.contrib.messages.context_processors.messages",
            ],
        },
    },
]

# SQLite under a concurrent web server and worker: IMMEDIATE transactions remove the
# "database is locked" errors, WAL makes it faster (measured; shared stack notes).
SQLITE_OPTIONS = {
    "timeout": 20,
    "transaction_mode": "IMMEDIATE",
    "init_command": "PRAGMA journal_mode=WAL;PRAGMA synchronous=NORMAL",
}


def database_config(url: str | None) -> dict:
    """The default database from DATABASE_URL (None: a SQLite file under var/)."""
    if url is None:
        VAR_DIR.mkdir(parents=True, exist_ok=True)
        url = f"sqlite:///{VAR_DIR / 'cairn.sqlite3'}"
    try:
        config = dj_database_url.parse(url, conn_max_age=60, conn_health_checks=True)
    except Exception as error:
        raise ConfigError(f"DATABASE_URL: cannot parse {url!r}: {error}") from None
    engine = config.get("ENGINE", "")
    if engine == "django.db.backends.sqlite3":
        config["OPTIONS"] = {**SQLITE_OPTIONS, **config.get("OPTIONS", {})}
        config["CONN_MAX_AGE"] = 0
    elif engine != "django.db.backends.postgresql":
        raise ConfigError(
            f"DATABASE_URL: only sqlite:// and postgres:// are supported, got {url!r}"
        )
    elif not config.get("NAME"):
        raise ConfigError(f"DATABASE_URL: no database name in {url!r}")
    return config


DATABASES = {"default": database_config(envsecret("DATABASE_URL"))}
DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"

PASSWORD_HASHERS = [
    "django.contrib.auth.hashers.Argon2PasswordHasher",
    "django.contrib.auth.hashers.PBKDF2PasswordHasher",
]
AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator"},
    {"NAME": "django.contrib.auth.password_validation.CommonPasswordValidator"},
]
LOGIN_URL = "viewer-login"
LOGIN_REDIRECT_URL = "viewer-home"
LOGOUT_REDIRECT_URL = "viewer-login"

LANGUAGE_CODE = "en"
TIME_ZONE = "UTC"
USE_I18N = False
USE_TZ = True

STATIC_URL = "/static/"
STATIC_ROOT = VAR_DIR / "static"
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "whitenoise.storage.CompressedStaticFilesStorage"},
}

if not DEBUG:
    SESSION_COOKIE_SECURE = envbool("SECURE_COOKIES", True)
    CSRF_COOKIE_SECURE = envbool("SECURE_COOKIES", True)
    SECURE_HSTS_SECONDS = envint("SECURE_HSTS_SECONDS", 31536000)
    SECURE_SSL_REDIRECT = envbool("SECURE_SSL_REDIRECT", True)
    SECURE_PROXY_SSL_HEADER = ("HTTP_X_FORWARDED_PROTO", "https")
SESSION_COOKIE_HTTPONLY = True

REST_FRAMEWORK = {
    "DEFAULT_AUTHENTICATION_CLASSES": ["rest_framework.authentication.SessionAuthentication"],
    "DEFAULT_PERMISSION_CLASSES": ["rest_framework.permissions.IsAuthenticated"],
    "DEFAULT_SCHEMA_CLASS": "drf_spectacular.openapi.AutoSchema",
    "EXCEPTION_HANDLER": "studies.api.errors.exception_handler",
    "UNAUTHENTICATED_USER": "django.contrib.auth.models.AnonymousUser",
}
SPECTACULAR_SETTINGS = {
    "TITLE": "cairn API",
    "DESCRIPTION": "Multi-reader landmark studies on 3D medical images. Research use only.",
    "VERSION": "1",
    "SERVE_INCLUDE_SCHEMA": False,
    "SWAGGER_UI_DIST": "SIDECAR",
    "SWAGGER_UI_FAVICON_HREF": "SIDECAR",
    "REDOC_DIST": "SIDECAR",
}


def broker_settings(url: str) -> tuple[str, dict]:
    """Broker URL and transport options; filesystem:// gets its folders under var/broker."""
    scheme = urlsplit(url).scheme
    if scheme not in {"filesystem", "redis", "rediss", "amqp", "memory"}:
        raise ConfigError(
            f"CELERY_BROKER_URL: unknown scheme {scheme or url!r}; use filesystem://, redis:// "
            "or amqp://"
        )
    if scheme != "filesystem":
        return url, {"visibility_timeout": 3600}
    folder = Path(envstr("CAIRN_BROKER_DIR", str(VAR_DIR / "broker")))
    for sub in ("queue", "processed", "control"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    return url, {
        "data_folder_in": str(folder / "queue"),
        "data_folder_out": str(folder / "queue"),
        "processed_folder": str(folder / "processed"),
        "store_processed": False,
        "control_folder": str(folder / "control"),
        "polling_interval": 0.1,
    }


CELERY_BROKER_URL, CELERY_BROKER_TRANSPORT_OPTIONS = broker_settings(
    envsecret("CELERY_BROKER_URL") or "filesystem://"
)
CELERY_TASK_IGNORE_RESULT = True
# A submitted read asks for an analysis that starts this many seconds later, so reads
# submitted meanwhile fold into one run (coordinators' "run now" starts at once).
CAIRN_ANALYSIS_DEBOUNCE_SECONDS = envint("CAIRN_ANALYSIS_DEBOUNCE_SECONDS", 30)
CELERY_TASK_ACKS_LATE = True
CELERY_TASK_REJECT_ON_WORKER_LOST = True
CELERY_WORKER_PREFETCH_MULTIPLIER = 1
CELERY_TASK_TIME_LIMIT = envint("CAIRN_TASK_TIME_LIMIT", 1800)
CELERY_BROKER_CONNECTION_RETRY_ON_STARTUP = True

LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "handlers": {"console": {"class": "logging.StreamHandler"}},
    "root": {"handlers": ["console"], "level": envstr("LOG_LEVEL", "INFO")},
}

# ---------------------------------------------------------------------------------------
# Security: login throttling, Content-Security-Policy, upload limits, HTTPS
# hardening in production, and the audit log. `DEBUG=0 SECRET_KEY=... ALLOWED_HOSTS=x
# python manage.py check --deploy` is clean with these defaults.
# ---------------------------------------------------------------------------------------
from datetime import timedelta  # noqa: E402

from csp.constants import NONE, SELF, UNSAFE_INLINE  # noqa: E402

INSTALLED_APPS += ["axes", "csp", "audit"]
# The request-size guard runs before anything reads the body; axes must come last.
MIDDLEWARE.insert(1, "cairn.limits.RequestSizeLimitMiddleware")
MIDDLEWARE.insert(2, "cairn.api_errors.ApiErrorShapeMiddleware")
MIDDLEWARE += ["csp.middleware.CSPMiddleware", "axes.middleware.AxesMiddleware"]
AUTHENTICATION_BACKENDS = [
    "axes.backends.AxesStandaloneBackend",
    "django.contrib.auth.backends.ModelBackend",
]

# Throttling: after CAIRN_LOGIN_FAILURE_LIMIT failures for one user name from one address,
# that pair is refused (HTTP 429) for CAIRN_LOGIN_COOLOFF_MINUTES; a success resets it.
AXES_FAILURE_LIMIT = envint("CAIRN_LOGIN_FAILURE_LIMIT", 5)
AXES_COOLOFF_TIME = timedelta(minutes=envint("CAIRN_LOGIN_COOLOFF_MINUTES", 15))
AXES_LOCKOUT_PARAMETERS = [["username", "ip_address"]]
AXES_RESET_ON_SUCCESS = True
AXES_COOLOFF_MESSAGE = "Too many failed logins: wait a few minutes, then try again."
AXES_VERBOSE = False

# No inline script anywhere: every page loads its ES module from /static/. Style
# attributes stay allowed (the landmark badges set a colour variable inline); <style>
# elements and inline event handlers do not.
CONTENT_SECURITY_POLICY = {
    "DIRECTIVES": {
        "default-src": [SELF],
        "script-src": [SELF],
        "style-src": [SELF],
        "style-src-attr": [UNSAFE_INLINE],
        "img-src": [SELF, "data:"],
        "font-src": [SELF],
        "connect-src": [SELF],
        "worker-src": [SELF],
        "object-src": [NONE],
        "base-uri": [NONE],
        "form-action": [SELF],
        "frame-ancestors": [NONE],
    },
}

# Upload limits: a request body over CAIRN_UPLOAD_MAX_BYTES (plus room for the form) is
# refused with 413 before it is read; non-file form and JSON bodies are kept small.
DATA_UPLOAD_MAX_MEMORY_SIZE = envint("CAIRN_FORM_MAX_BYTES", 2_621_440)
DATA_UPLOAD_MAX_NUMBER_FILES = envint("CAIRN_UPLOAD_MAX_FILES", 1000)
FILE_UPLOAD_MAX_MEMORY_SIZE = 2_621_440
CAIRN_REQUEST_MAX_BYTES = CAIRN_UPLOAD_MAX_BYTES + 1024**2

CSRF_COOKIE_HTTPONLY = False  # the pages' scripts read it to send X-CSRFToken
SESSION_COOKIE_SAMESITE = "Lax"
CSRF_COOKIE_SAMESITE = "Lax"
SECURE_CONTENT_TYPE_NOSNIFF = True
SECURE_REFERRER_POLICY = "same-origin"
X_FRAME_OPTIONS = "DENY"
if not DEBUG:
    SECURE_HSTS_INCLUDE_SUBDOMAINS = envbool("SECURE_HSTS_INCLUDE_SUBDOMAINS", True)
    SECURE_HSTS_PRELOAD = envbool("SECURE_HSTS_PRELOAD", True)
