"""A throw-away ``redis-server`` for benchmarks run without ``--redis``.

It listens on a free loopback port, keeps nothing on disk, and is stopped
when the ``with`` block ends.
"""
from __future__ import annotations

import shutil
import socket
import subprocess
import tempfile
import time

from model.errors import SeawallError


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LocalRedis:
    """``with LocalRedis() as url:`` gives ``redis://127.0.0.1:<port>/0``."""

    def __init__(self, *, start_timeout_s: float = 10.0):
        self.start_timeout_s = start_timeout_s
        self.proc: subprocess.Popen | None = None
        self._dir = None

    def __enter__(self) -> str:
        binary = shutil.which("redis-server")
        if binary is None:
            raise SeawallError("bench: redis-server is not on PATH; install it or pass --redis URL")
        self._dir = tempfile.TemporaryDirectory(prefix="seawall-bench-redis-")
        port = free_port()
        self.proc = subprocess.Popen(
            [binary, "--bind", "127.0.0.1", "--port", str(port), "--save", "", "--appendonly", "no",
             "--dir", self._dir.name, "--protected-mode", "no", "--daemonize", "no"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        deadline = time.monotonic() + self.start_timeout_s
        while time.monotonic() < deadline:
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                    return f"redis://127.0.0.1:{port}/0"
            except OSError:
                time.sleep(0.02)
        self.__exit__(None, None, None)
        raise SeawallError(f"bench: redis-server did not start on port {port}")

    def __exit__(self, *exc) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None
        if self._dir is not None:
            self._dir.cleanup()
            self._dir = None
