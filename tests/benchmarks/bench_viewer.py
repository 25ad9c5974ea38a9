"""Reading-page benchmark: headless chromium against a real server on loopback.

Prints one JSON object per line: {"name", "value", "unit", "target"}. Builds its own
temporary var/ (SQLite, data dir), two synthetic int16 volumes (256^3 at 1 mm, and
512 x 512 x 300 at 0.5 x 0.5 x 1 mm), and serves them with gunicorn (1 worker, 8 threads)
exactly as stored at ingest (zstd, Content-Encoding when the browser accepts it). How it
measures (viewer-notes section 5):

- first image / full resolution: performance marks the page sets right after the first
  drawn image ("viewer:first-image") and after the full-resolution redraw
  ("viewer:full-ready"), relative to navigation start, in a fresh browser context per run
  (empty cache); one untimed warm-up run first; the median of the runs is reported.
- scroll work: the page's own per-frame JS work (start to end of its animation-frame
  callback, with a 1x1 read-back so the canvas work is really done) while wheel events,
  dispatched inside the page one per frame, step 100 slices in each of the three planes:
  p95 over the 300 frames.
- heap ratio: CDP Runtime.getHeapUsage (usedSize + backingStorageSize, the latter counts
  typed-array memory) after HeapProfiler.collectGarbage, over the raw volume bytes.
- api.place_p95: 200 placements made one after another in the page; each time runs from
  the page queuing the event to the page holding the server's answer.
- For context it also prints the p50 of the same samples and the machine's 1-minute load
  average when measuring started (target null: information only).
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
import uuid
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))  # run as a script: make `tests` importable

from tests.browser.chromium import CHROMIUM_ARGS, VIEWPORT  # noqa: E402

RUNS_256 = 5
RUNS_512 = 3


def emit(name: str, value: float, unit: str, target: float | None) -> None:
    print(
        json.dumps({"name": name, "value": round(value, 3), "unit": unit, "target": target}),
        flush=True,
    )


def percentile(values: list[float], pct: float) -> float:
    return float(np.percentile(np.asarray(values, dtype=float), pct))


def synthetic_volume(shape: tuple[int, int, int], spacing: tuple[float, float, float], seed: int):
    """An MR-like int16 volume: a bright shell around a softer ellipsoid, plus noise."""
    from studies.imaging.volume import Volume

    rng = np.random.default_rng(seed)
    data = np.empty(shape, dtype=np.int16)
    centre = (np.asarray(shape) - 1) / 2.0
    semi = np.asarray(shape) * 0.42
    x = ((np.arange(shape[0]) - centre[0]) / semi[0])[:, None]
    y = ((np.arange(shape[1]) - centre[1]) / semi[1])[None, :]
    for k in range(shape[2]):
        z = (k - centre[2]) / semi[2]
        r2 = x**2 + y**2 + z**2
        plane = np.where(r2 <= 0.85, 420.0, np.where(r2 <= 1.0, 900.0, 0.0))
        plane += rng.normal(0.0, 20.0, size=plane.shape)
        data[:, :, k] = np.clip(np.rint(plane), -32768, 32767).astype(np.int16)
    affine = np.diag([*spacing, 1.0])
    affine[:3, 3] = -np.asarray(spacing) * centre
    return Volume(data=data, affine=affine, modality="MR", checksum=uuid.uuid4().hex)


def build_data() -> dict:
    """Migrate a fresh database, create a study with two cases; return read codes and a cookie."""
    import django

    django.setup()
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.core.management import call_command
    from django.test import Client
    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.storage import write_case_files
    from studies.models import Read
    from studies.services import cases, studies

    call_command("migrate", verbosity=0)
    call_command("collectstatic", verbosity=0, interactive=False)
    users = get_user_model().objects
    pi = users.create_user(username="bench-pi", password="bench-pw")
    reader = users.create_user(username="bench-reader", password="bench-pw")
    study = studies.create_study(
        name="Viewer bench",
        slug="viewer-bench",
        coordinator=pi,
        readers_per_case=1,
        repeat_fraction=0.0,
        washout_days=7,
        seed=1,
    )
    studies.set_protocol(study, [{"code": f"P{n}", "name": f"Point {n}"} for n in range(1, 5)])
    labels = {}
    for label, shape, spacing in (
        ("v256", (256, 256, 256), (1.0, 1.0, 1.0)),
        ("v512", (512, 512, 300), (0.5, 0.5, 1.0)),
    ):
        volume = synthetic_volume(shape, spacing, seed=len(labels))
        stored = write_case_files(Path(settings.CAIRN_DATA_DIR), f"bench/{label}", volume)
        cases.create_case(study, stored, checksum=volume.checksum, label=label, modality="MR")
        labels[label] = int(np.prod(shape)) * 2
        del volume
    studies.add_member(study, reader, Role.READER)
    studies.open_study(study, now=timezone.now() - timezone.timedelta(days=1))
    reads = {
        r.case.label: str(r.code) for r in Read.objects.filter(reader=reader).select_related("case")
    }
    client = Client()
    client.force_login(reader)
    return {"reads": reads, "bytes": labels, "session": client.cookies["sessionid"].value}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(env: dict, port: int) -> subprocess.Popen:
    command = [
        sys.executable,
        "-m",
        "gunicorn",
        "cairn.wsgi:application",
        "--workers",
        "1",
        "--threads",
        "8",
        "--bind",
        f"127.0.0.1:{port}",
        "--log-level",
        "warning",
    ]
    server = subprocess.Popen(command, cwd=ROOT, env=env)
    deadline = time.time() + 120
    while time.time() < deadline:
        try:  # the first request imports the URLconf (slow): wait for it here, untimed
            urllib.request.urlopen(f"http://127.0.0.1:{port}/login/", timeout=60).read()
            return server
        except OSError:
            time.sleep(0.3)
    server.terminate()
    raise RuntimeError("the benchmark server did not start")


def open_read(browser, base: str, session: str, code: str):
    context = browser.new_context(viewport=VIEWPORT, device_scale_factor=1)
    context.add_cookies([{"name": "sessionid", "value": session, "url": base}])
    page = context.new_page()
    page.goto(f"{base}/read/{code}/")
    # Polled through page.evaluate: wait_for_function's eval is refused by the page's CSP.
    deadline = time.monotonic() + 60
    while not page.evaluate("performance.getEntriesByName('viewer:full-ready').length > 0"):
        if time.monotonic() > deadline:
            raise TimeoutError("the read page did not finish loading")
        page.wait_for_timeout(20)
    marks = dict(
        page.evaluate("performance.getEntriesByType('mark').map(m => [m.name, m.startTime])")
    )
    return context, page, marks


def load_times(browser, base: str, session: str, code: str, runs: int):
    first, full = [], []
    for run in range(runs + 1):
        context, page, marks = open_read(browser, base, session, code)
        if run:  # run 0 warms up the JIT and the server
            first.append(marks["viewer:first-image"])
            full.append(marks["viewer:full-ready"])
        if run < runs:
            context.close()
    return first, full, context, page


SCROLL_JS = """async () => {
  const v = cairnRead.viewer;
  v.flushForTiming = true;
  const frame = () => new Promise((resolve) => requestAnimationFrame(() => resolve()));
  const work = [];
  for (const plane of ['axial', 'coronal', 'sagittal']) {
    const pane = v.panes[plane];
    const axis = {axial: 2, coronal: 1, sagittal: 0}[plane];
    const start = [...v.cursor];
    start[axis] = Math.max(0, Math.floor(v.shape[axis] / 2) - 50);
    v.setCursor(start);
    await frame(); await frame();
    v.frameWork.length = 0;
    for (let s = 0; s < 100; s += 1) {
      pane.el.dispatchEvent(new WheelEvent('wheel', {deltaY: 100, cancelable: true}));
      await frame();
    }
    await frame();
    work.push(...v.frameWork);
  }
  v.flushForTiming = false;
  return work;
}"""

PLACE_JS = """async (count) => {
  const {book, viewer, queue} = cairnRead;
  queue.latencies.length = 0;
  const mid = viewer.shape.map((n) => Math.floor(n / 2));
  for (let s = 0; s < count; s += 1) {
    const code = book.landmarks[s % book.landmarks.length].code;
    book.place(code, viewer.toWorld([mid[0] + (s % 17) - 8, mid[1] + (s % 5), mid[2]]));
    await queue.drained(20000);
  }
  return queue.latencies.slice();
}"""


def heap_ratio(page, volume_bytes: int) -> float:
    cdp = page.context.new_cdp_session(page)
    cdp.send("HeapProfiler.enable")
    cdp.send("HeapProfiler.collectGarbage")
    usage = cdp.send("Runtime.getHeapUsage")
    return (usage["usedSize"] + usage.get("backingStorageSize", 0)) / volume_bytes


def measure(base: str, data: dict) -> None:
    from playwright.sync_api import sync_playwright

    session = data["session"]
    # Context for every figure below: other work on the machine inflates all of them.
    emit("viewer.bench.load_average_1min", os.getloadavg()[0], "processes", None)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=shutil.which("chromium"), args=CHROMIUM_ARGS)
        first, _, context, page = load_times(
            browser, base, session, data["reads"]["v256"], RUNS_256
        )
        emit("viewer.first_image_256.ms", statistics.median(first), "ms", 400)
        work = page.evaluate(SCROLL_JS)
        emit("viewer.scroll_work_p95_256.ms", percentile(work, 95), "ms", 4)
        emit("viewer.scroll_work_p50_256.ms", percentile(work, 50), "ms", None)
        latencies = page.evaluate(PLACE_JS, 200)
        emit("api.place_p95.ms", percentile(latencies, 95), "ms", 50)
        emit("api.place_p50.ms", percentile(latencies, 50), "ms", None)
        context.close()

        first, full, context, page = load_times(
            browser, base, session, data["reads"]["v512"], RUNS_512
        )
        emit("viewer.first_image_512x512x300.ms", statistics.median(first), "ms", 1500)
        emit("viewer.full_res_512x512x300.ms", statistics.median(full), "ms", 3000)
        emit("viewer.heap_512x512x300.ratio", heap_ratio(page, data["bytes"]["v512"]), "ratio", 1.5)
        work = page.evaluate(SCROLL_JS)
        emit("viewer.scroll_work_p95_512.ms", percentile(work, 95), "ms", 10)
        emit("viewer.scroll_work_p50_512.ms", percentile(work, 50), "ms", None)
        context.close()
        browser.close()


def main() -> int:
    if shutil.which("chromium") is None:
        print("bench_viewer: chromium not found (apt-get install -y chromium)", file=sys.stderr)
        return 1
    var_dir = Path(tempfile.mkdtemp(prefix="cairn-bench-viewer-"))
    env = {
        **os.environ,
        "CAIRN_VAR_DIR": str(var_dir),
        "DEBUG": "true",
        "CELERY_BROKER_URL": "memory://",
        "DJANGO_SETTINGS_MODULE": "cairn.settings",
        "PYTHONPATH": str(ROOT),
    }
    env.pop("DATABASE_URL", None)
    os.environ.update({k: v for k, v in env.items() if k != "PYTHONPATH"})
    os.environ.pop("DATABASE_URL", None)
    sys.path.insert(0, str(ROOT))
    server = None
    try:
        data = build_data()
        port = free_port()
        server = start_server(env, port)
        measure(f"http://127.0.0.1:{port}", data)
    finally:
        if server is not None:
            server.terminate()
            server.wait(timeout=20)
        shutil.rmtree(var_dir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
