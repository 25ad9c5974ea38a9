"""Build the demo study, then serve it with one Celery worker until Ctrl-C."""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

from django.conf import settings
from django.core.management.base import BaseCommand

from studies.services.demo import (
    COORDINATOR,
    DEMO_PASSWORD,
    DETECTOR_FILE,
    NEWCOMER,
    READERS,
    build_demo,
)

ADDRESS = "127.0.0.1:8000"


def _interrupt(signum, frame) -> None:
    raise KeyboardInterrupt


class Command(BaseCommand):
    help = "Build the demo study (idempotent) and serve it with a Celery worker."

    def add_arguments(self, parser) -> None:
        parser.add_argument("--no-serve", action="store_true", help="only build the demo data")
        parser.add_argument("--address", default=ADDRESS, help=f"host:port (default {ADDRESS})")

    def handle(self, *args, **options) -> None:
        self.stdout.write("Building the demo study (synthetic phantoms, invented readers)...")
        study = build_demo(stdout=self.stdout)
        self.stdout.write(
            self.style.SUCCESS(f"Demo study ready: {study.name} ({study.cases.count()} cases)")
        )
        if options["no_serve"]:
            return
        self._serve(options["address"])

    def _logins(self, address: str) -> None:
        self.stdout.write(f"\ncairn demo at http://{address}/  (research use only)\n")
        self.stdout.write(f"All demo passwords: {DEMO_PASSWORD}")
        self.stdout.write(f"  coordinator + adjudicator: {COORDINATOR[0]}")
        for reader in READERS:
            self.stdout.write(f"  reader with simulated reads: {reader.username}")
        self.stdout.write(f"  reader with a fresh worklist: {NEWCOMER[0]}")
        detector = Path(settings.VAR_DIR) / "demo" / DETECTOR_FILE
        self.stdout.write(f"A simulated detector's predictions to upload: {detector}")
        self.stdout.write("Press Ctrl-C to stop the web server and the worker.\n")

    def _serve(self, address: str) -> None:
        # Ctrl-C or a plain `kill` both stop the demo (SIGINT may arrive ignored when started
        # from a script, so put the default handler back).
        signal.signal(signal.SIGINT, signal.default_int_handler)
        signal.signal(signal.SIGTERM, _interrupt)
        python = sys.executable
        children = [
            subprocess.Popen([python, "manage.py", "runserver", address, "--noreload"]),
            subprocess.Popen(
                [
                    python,
                    "-m",
                    "celery",
                    "-A",
                    "cairn",
                    "worker",
                    "--pool=solo",
                    "--loglevel=INFO",
                    "--hostname=demo@%h",
                ]
            ),
        ]
        self._logins(address)
        try:
            while all(child.poll() is None for child in children):
                time.sleep(0.5)
            self.stderr.write("a demo process stopped; shutting down the other")
        except KeyboardInterrupt:
            self.stdout.write("\nStopping...")
        finally:
            for child in children:
                if child.poll() is None:
                    child.terminate()
            for child in children:
                try:
                    child.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    child.kill()
