"""How every browser test and benchmark starts Debian's chromium (shared stack notes)."""

from __future__ import annotations

import shutil

CHROMIUM = shutil.which("chromium")
# Headless, no sandbox (root in CI), and none of chromium's own network traffic: the
# machines have no internet and refuse those connections.
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
VIEWPORT = {"width": 1400, "height": 860}
