"""A private production-like stack on loopback for `make loadtest` and `make faulttest`.

A throw-away PostgreSQL cluster (port 54329) and Redis (port 63790) of our own, never the
machine's shared ones on 5432/6379, plus gunicorn with several workers and one Celery
worker, all started from this process and stopped by it. Every process is ours: it is
started with Popen (or pg_ctl on our own data folder) and stopped by its own pid.
"""

from __future__ import annotations

import glob
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from contextlib import suppress
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PG_PORT, REDIS_PORT, WEB_PORT = 54329, 63790, 8765


def port_open(port: int, host: str = "127.0.0.1") -> bool:
    try:
        with socket.create_connection((host, port), timeout=0.5):
            return True
    except OSError:
        return False


def wait_until(check, timeout: float, what: str, interval: float = 0.2) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise RuntimeError(f"{what} did not happen within {timeout:.0f} s")
        time.sleep(interval)


def _as_postgres(args: list[str]) -> list[str]:
    """initdb and postgres refuse to run as root: run them as the postgres user then."""
    if os.geteuid() == 0:
        return ["runuser", "-u", "postgres", "--", *args]
    return args


class PrivatePostgres:
    """A PostgreSQL cluster in a temporary folder, trust auth on 127.0.0.1:PG_PORT."""

    def __init__(self, folder: Path, port: int = PG_PORT) -> None:
        bins = sorted(glob.glob("/usr/lib/postgresql/*/bin"))
        if not bins:
            raise RuntimeError("PostgreSQL server binaries not found under /usr/lib/postgresql")
        self.bin = Path(bins[-1])
        self.folder, self.port = folder, port
        self.data = folder / "data"

    def _run(self, *args: str, timeout: float = 120) -> None:
        subprocess.run(_as_postgres([str(self.bin / args[0]), *args[1:]]), check=True,
                       capture_output=True, timeout=timeout)

    def init(self) -> None:
        if port_open(self.port):
            raise RuntimeError(f"port {self.port} is taken: is an earlier run still up?")
        self.folder.mkdir(parents=True, exist_ok=True)
        if os.geteuid() == 0:
            shutil.chown(self.folder, "postgres", "postgres")
        self._run("initdb", "-D", str(self.data), "-U", "postgres", "--auth=trust", "-E", "UTF8")
        self.start()
        subprocess.run(["psql", "-h", "127.0.0.1", "-p", str(self.port), "-U", "postgres", "-c",
                        "CREATE DATABASE cairn"], check=True, capture_output=True)

    def start(self) -> None:
        options = f"-p {self.port} -k {self.folder} -c listen_addresses=127.0.0.1 -c fsync=off"
        self._run("pg_ctl", "-D", str(self.data), "-o", options, "-l",
                  str(self.folder / "server.log"), "-w", "start")

    def stop(self) -> None:
        with suppress(subprocess.CalledProcessError, FileNotFoundError):
            self._run("pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "stop")

    @property
    def url(self) -> str:
        return f"postgres://postgres@127.0.0.1:{self.port}/cairn"


class Process:
    """A child process with its log file; stopped by its own pid only."""

    def __init__(self, name: str, args: list[str], env: dict, log: Path) -> None:
        self.name, self.args, self.env, self.log = name, args, env, log
        self.popen: subprocess.Popen | None = None

    def start(self) -> None:
        handle = open(self.log, "a")
        self.popen = subprocess.Popen(self.args, cwd=ROOT, env=self.env, stdout=handle,
                                      stderr=subprocess.STDOUT, start_new_session=True)
        handle.close()

    def signal(self, sig: int) -> None:
        if self.popen is not None and self.popen.poll() is None:
            os.killpg(self.popen.pid, sig)

    def stop(self, timeout: float = 20) -> None:
        if self.popen is None:
            return
        self.signal(signal.SIGTERM)
        try:
            self.popen.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.signal(signal.SIGKILL)
            self.popen.wait()
        self.popen = None


class Stack:
    """PostgreSQL + Redis + gunicorn + a Celery worker, with the environment they share."""

    def __init__(self, web_workers: int = 4) -> None:
        self.tmp = Path(tempfile.mkdtemp(prefix="cairn-stack-"))
        os.chmod(self.tmp, 0o755)
        self.pg = PrivatePostgres(self.tmp / "pg")
        self.web_workers = web_workers
        self.env = {
            **{k: v for k, v in os.environ.items() if not k.startswith(("PYTEST", "DJANGO_"))},
            "DJANGO_SETTINGS_MODULE": "cairn.settings",
            "PYTHONPATH": str(ROOT),
            "DEBUG": "0",
            "SECRET_KEY": "load-and-fault-tests-only-" + os.urandom(16).hex(),
            "ALLOWED_HOSTS": "127.0.0.1,localhost",
            "SECURE_SSL_REDIRECT": "0",
            "SECURE_COOKIES": "0",
            "SECURE_HSTS_SECONDS": "0",
            "DATABASE_URL": self.pg.url,
            "CELERY_BROKER_URL": f"redis://127.0.0.1:{REDIS_PORT}/0",
            "CAIRN_VAR_DIR": str(self.tmp / "var"),
            "CAIRN_DATA_DIR": str(self.tmp / "data"),
            "CAIRN_LOGIN_FAILURE_LIMIT": "1000",
            "LOG_LEVEL": "WARNING",
        }
        bin_dir = Path(sys.executable).parent
        self.redis = Process("redis", ["redis-server", "--port", str(REDIS_PORT), "--bind",
                                       "127.0.0.1", "--save", "", "--appendonly", "no"],
                             self.env, self.tmp / "redis.log")
        self.web = Process("gunicorn", [str(bin_dir / "gunicorn"), "cairn.wsgi", "--bind",
                                        f"127.0.0.1:{WEB_PORT}", "--workers", str(web_workers),
                                        "--timeout", "120", "--graceful-timeout", "5", "--preload",
                                        "--access-logfile", str(self.tmp / "access.log"),
                                        "--access-logformat", "%(m)s %(U)s %(s)s %(D)s"],
                           self.env, self.tmp / "gunicorn.log")
        # nice 10: background analysis yields the CPU to web requests on this shared host.
        self.worker = Process("celery", ["nice", "-n", "10", sys.executable, "-m", "celery",
                                         "-A", "cairn", "worker",
                                         "--concurrency", "1", "--loglevel", "INFO",
                                         "--without-gossip", "--without-mingle"],
                              self.env, self.tmp / "celery.log")
        self.base_url = f"http://127.0.0.1:{WEB_PORT}"

    # -- lifecycle -------------------------------------------------------------------------

    def start(self) -> None:
        for port in (REDIS_PORT, WEB_PORT):
            if port_open(port):
                raise RuntimeError(f"port {port} is taken: is an earlier run still up?")
        self.pg.init()
        self.start_redis()
        self.manage("migrate", "--noinput")

    def start_redis(self) -> None:
        self.redis.start()
        wait_until(lambda: port_open(REDIS_PORT), 20, "Redis start")

    def start_web(self) -> None:
        self.web.start()
        wait_until(lambda: port_open(WEB_PORT), 60, "gunicorn start")
        self.warm_up()

    def warm_up(self) -> None:
        """A first request per worker loads the URL conf and the views (seconds, once)."""
        from concurrent.futures import ThreadPoolExecutor

        import requests

        def get(_: int) -> int:
            return requests.get(f"{self.base_url}/login/", timeout=300).status_code

        with ThreadPoolExecutor(self.web_workers * 2) as pool:
            statuses = list(pool.map(get, range(self.web_workers * 3)))
        if set(statuses) != {200}:
            raise RuntimeError(f"warm-up requests answered {statuses}")

    def start_worker(self) -> None:
        self.worker.start()
        wait_until(lambda: "ready." in self.worker.log.read_text(), 90, "Celery worker start")

    def stop(self) -> None:
        for process in (self.worker, self.web, self.redis):
            with suppress(Exception):
                process.stop()
        self.pg.stop()

    def cleanup(self) -> None:
        shutil.rmtree(self.tmp, ignore_errors=True)

    # -- helpers ---------------------------------------------------------------------------

    def cpu_seconds(self) -> dict[str, float]:
        """CPU seconds (user + system) used so far by each part: web, worker, db, redis, client.

        Each part is a process tree: every live process's own time plus that of the
        children it has reaped (PostgreSQL backends end and are replaced as connections
        age out; their time stays with the postmaster). Take the difference of two calls
        made while the stack is up. Two machine-wide
        figures say how far the run can be trusted: "machine" is all busy CPU time (more
        than the parts together: something else was running) and "steal" is time the
        hypervisor gave to other guests (a noisy neighbour slows every part).
        """
        import psutil

        def tree(pid: int | None) -> float:
            if pid is None:
                return 0.0
            total = 0.0
            try:
                root = psutil.Process(pid)
                for proc in [root, *root.children(recursive=True)]:
                    with suppress(psutil.Error):
                        times = proc.cpu_times()
                        total += (times.user + times.system + times.children_user
                                  + times.children_system)
            except psutil.Error:
                pass
            return total

        def pid_of(process: Process) -> int | None:
            return process.popen.pid if process.popen is not None else None

        postmaster = self.pg.data / "postmaster.pid"
        db_pid = int(postmaster.read_text().split()[0]) if postmaster.exists() else None
        me = psutil.Process()
        machine = psutil.cpu_times()
        return {
            "web": tree(pid_of(self.web)),
            "worker": tree(pid_of(self.worker)),
            "db": tree(db_pid),
            "redis": tree(pid_of(self.redis)),
            "client": sum(me.cpu_times()[:2]),
            "machine": machine.user + machine.nice + machine.system + machine.irq
            + machine.softirq,
            "steal": getattr(machine, "steal", 0.0),
        }

    def manage(self, *args: str, timeout: float = 300) -> subprocess.CompletedProcess:
        return subprocess.run([sys.executable, "manage.py", *args], cwd=ROOT, env=self.env,
                              capture_output=True, text=True, timeout=timeout)

    def script(self, module: str, *args: str, timeout: float = 300) -> dict:
        """Run `python -m module args` in the stack's environment; return its last JSON line."""
        result = subprocess.run([sys.executable, "-m", module, *args], cwd=ROOT, env=self.env,
                                capture_output=True, text=True, timeout=timeout)
        if result.returncode != 0:
            raise RuntimeError(f"{module} failed:\n{result.stderr[-3000:]}")
        return json.loads(result.stdout.strip().splitlines()[-1])

    def sql(self, query: str, params: tuple = ()) -> list[tuple]:
        import psycopg

        with psycopg.connect(self.pg.url.replace("postgres://", "postgresql://"),
                             connect_timeout=5) as conn:
            return list(conn.execute(query, params).fetchall())
