"""Settings for the test suite: fast hashing, an in-memory broker, a throw-away data dir."""

from __future__ import annotations

import os
import tempfile

os.environ.setdefault("CELERY_BROKER_URL", "memory://")

from .settings import *  # noqa: F403

PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]
CAIRN_DATA_DIR = Path(tempfile.mkdtemp(prefix="cairn-test-data-"))  # noqa: F405
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {"BACKEND": "django.contrib.staticfiles.storage.StaticFilesStorage"},
}
STATIC_ROOT = Path(tempfile.mkdtemp(prefix="cairn-test-static-"))  # noqa: F405
CAIRN_UPLOAD_DIR = Path(tempfile.mkdtemp(prefix="cairn-test-uploads-"))  # noqa: F405
# Files code writes under VAR_DIR at run time (the demo's detector file) go to a temp dir;
# the paths settings.py derived from VAR_DIR at import are left as they are.
VAR_DIR = Path(tempfile.mkdtemp(prefix="cairn-test-var-"))  # noqa: F405
