"""`manage.py demo` serves the demo with a worker and stops both cleanly on Ctrl-C (SIGINT)."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import time
import urllib.request

import psutil
import pytest

from .stack import ROOT, Stack, wait_for


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def answers(url: str) -> bool:
    try:
        with urllib.request.urlopen(url, timeout=2) as response:
            return response.status == 200
    except OSError:
        return False


@pytest.mark.slow
def test_it_serves_the_demo_and_stops_web_server_and_worker_on_ctrl_c(tmp_path) -> None:
    stack = Stack(tmp_path, f"sqlite:///{tmp_path / 'demo.sqlite3'}", "filesystem://")
    stack.manage("migrate", "--noinput")
    port = free_port()
    log = open(tmp_path / "demo.log", "w")
    demo = subprocess.Popen([sys.executable, "manage.py", "demo", "--address", f"127.0.0.1:{port}"],
                            cwd=ROOT, env=stack.env, stdout=log, stderr=subprocess.STDOUT)
    try:
        wait_for(lambda: answers(f"http://127.0.0.1:{port}/login/"), timeout=240, interval=1)
        wait_for(lambda: "ready." in (tmp_path / "demo.log").read_text(), timeout=60)
        children = psutil.Process(demo.pid).children()
        assert len(children) == 2
        text = (tmp_path / "demo.log").read_text()
        assert f"http://127.0.0.1:{port}/" in text and "cairn-demo" in text
        demo.send_signal(signal.SIGINT)
        assert demo.wait(timeout=30) == 0
        time.sleep(0.5)
        assert not [c for c in children if c.is_running() and c.status() != psutil.STATUS_ZOMBIE]
    finally:
        if demo.poll() is None:
            demo.kill()
        log.close()
