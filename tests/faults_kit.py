"""What the fault, load and security tests share: real ``seawall serve``
processes, a real model file, a producer that survives outages, and counting.

Every worker here is a ``python -m ops.cli serve`` subprocess (the code path
of the ``seawall`` entry point) talking to a redis-server the test started on
loopback.  Their settings come from ``SEAWALL_*`` environment variables, as an
operator would set them; the defaults below make faults show up fast: small
batches, short blocking reads, a short claim idle time and short backoff caps.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import redis

from worker.settings import Keys

KEYS = Keys()

# Fast-failing settings for workers under test (each one is a documented Seawall setting).
FAST_ENV = {
    "SEAWALL_WORKER_BATCH": "64",
    "SEAWALL_WORKER_BLOCK_MS": "100",
    "SEAWALL_WORKER_CLAIM_IDLE_MS": "800",
    "SEAWALL_WORKER_CLAIM_EVERY_S": "0.2",
    "SEAWALL_WORKER_BACKOFF_BASE_S": "0.05",
    "SEAWALL_WORKER_BACKOFF_CAP_S": "0.5",
    "SEAWALL_WORKER_RELOAD_POLL_S": "0.1",
    "SEAWALL_WORKER_SOCKET_TIMEOUT_S": "2",
    "SEAWALL_WORKER_LAG_EVERY_S": "0.5",
    "SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "0",
    "SEAWALL_RETRAIN_BACKOFF_CAP_S": "0.5",
    "SEAWALL_RETRAIN_REGISTRY_POLL_S": "0.2",
    "SEAWALL_METRICS_PORT": "0",
    "SEAWALL_LOG_LEVEL": "INFO",
}

# Invented words for the comments (our own scenario: a town's allotment and cycling pages).
_WORDS = ("allotment", "tomatoes", "compost", "seedlings", "bike", "lane", "canal", "towpath", "rain", "shed",
          "swap", "marrow", "trellis", "puncture", "saddle", "bakery", "library", "choir", "harbour", "ferry")
_SPAM = ("free", "prize", "casino", "bonus", "crypto", "pills", "winner", "click")


def clean_env(extra: dict | None = None) -> dict:
    """The environment of a child process: ours minus any SEAWALL_* setting, plus FAST_ENV and ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env.update(FAST_ENV)
    env.update(extra or {})
    return env


def comment_text(i: int) -> str:
    """A short invented comment; every fifth one reads like spam."""
    pool = _SPAM if i % 5 == 0 else _WORDS
    words = [pool[(i * 7 + k * 3) % len(pool)] for k in range(6)]
    return f"post {i} " + " ".join(words)


class Worker:
    """One ``seawall serve`` subprocess; its output goes to ``log_path``.

    Parameters
    ----------
    url : Redis URL.
    name : consumer name (``--consumer``).
    log_dir : where ``<name>.log`` files go (one per start).
    model_path : ``--model`` file; ``None`` serves the registry's active model.
    env : extra environment on top of :data:`FAST_ENV`.
    """

    def __init__(self, *, url: str, name: str, log_dir: Path, model_path=None, env: dict | None = None,
                 args=()):
        self.url = url
        self.name = name
        self.log_dir = Path(log_dir)
        self.model_path = model_path
        self.env = clean_env(env)
        self.args = list(args)
        self.proc: subprocess.Popen | None = None
        self.starts = 0
        self.logs: list[Path] = []

    def argv(self) -> list[str]:
        argv = [sys.executable, "-m", "ops.cli", "serve", "--redis", self.url, "--consumer", self.name]
        if self.model_path is not None:
            argv += ["--model", str(self.model_path)]
        return argv + self.args

    def start(self, name: str | None = None) -> "Worker":
        if name is not None:
            self.name = name
        self.starts += 1
        path = self.log_dir / f"{self.name}.{self.starts}.log"
        self.logs.append(path)
        with open(path, "wb") as log:
            self.proc = subprocess.Popen(self.argv(), stdout=log, stderr=subprocess.STDOUT, env=self.env,
                                         cwd=Path(__file__).resolve().parent.parent)
        return self

    @property
    def pid(self) -> int:
        return self.proc.pid

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def signal(self, sig: int) -> None:
        self.proc.send_signal(sig)

    def kill(self) -> int:
        """SIGKILL and reap; returns the exit status (-9)."""
        self.proc.send_signal(signal.SIGKILL)
        return self.proc.wait(timeout=10)

    def stop(self, timeout: float = 20.0) -> int:
        """SIGTERM (finish the batch in hand) and wait; returns the exit status."""
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                return self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
                raise
        return self.proc.returncode

    def started(self) -> bool:
        """The latest start has reached its read loop (signal handlers are installed by then)."""
        return bool(self.logs) and self.logs[-1].exists() and \
            f"consumer {self.name} reading" in self.logs[-1].read_text(errors="replace")

    def output(self) -> str:
        return "\n".join(p.read_text(errors="replace") for p in self.logs if p.exists())


def stop_all(workers) -> list[int]:
    """Stop every worker that is still running (teardown helper); returns their exit codes."""
    codes = []
    for w in workers:
        if w.proc is not None:
            if w.proc.poll() is None:
                w.proc.send_signal(signal.SIGCONT)  # a stalled worker must be able to see SIGTERM
            codes.append(w.stop())
    return codes


def wait_until(condition, *, timeout: float, interval: float = 0.05) -> bool:
    """Poll ``condition()`` until it is true or ``timeout`` seconds pass; returns the last result."""
    deadline = time.monotonic() + timeout
    while True:
        result = condition()
        if result or time.monotonic() >= deadline:
            return result
        time.sleep(interval)


def consumer_pending(client, name: str, keys: Keys = KEYS) -> int:
    """Entries pending on consumer ``name`` (0 when it has not read yet)."""
    try:
        rows = client.xinfo_consumers(keys.comments, keys.group)
    except redis.ResponseError:
        return 0
    for row in rows:
        if _s(row["name"]) == name:
            return int(row["pending"])
    return 0


def kill_mid_batch(client, workers, rng, kill_number: int) -> tuple[str, int]:
    """SIGKILL a worker holding unacknowledged entries (any worker if none does) and start it again.

    Even kills restart it under the same name (it reads its own backlog first); odd kills under a
    new name, so the others must reclaim what the dead one held.  Returns the victim's name at the
    kill and how many entries it held then.
    """
    busy = wait_until(lambda: [w for w in workers if w.alive() and consumer_pending(client, w.name)],
                      timeout=5, interval=0.01)
    victim = rng.choice(busy or workers)
    name, held = victim.name, consumer_pending(client, victim.name)
    assert victim.kill() == -signal.SIGKILL
    base = name.split(".")[0]
    victim.start(name=name if kill_number % 2 == 0 else f"{base}.{kill_number}")
    return name, held


def consumer_seen(client, name: str, keys: Keys = KEYS) -> bool:
    try:
        rows = client.xinfo_consumers(keys.comments, keys.group)
    except redis.ResponseError:
        return False
    return any(_s(row["name"]) == name for row in rows)


def group_pending(client, keys: Keys = KEYS) -> int:
    """XPENDING count of the workers' group."""
    return int(client.xpending(keys.comments, keys.group)["pending"])


def group_lag(client, keys: Keys = KEYS):
    for row in client.xinfo_groups(keys.comments):
        if _s(row["name"]) == keys.group:
            return row.get("lag")
    return None


def read_stream(client, stream: str, *, page: int = 5000):
    """Every entry of ``stream`` as ``(stream_id, {field: value})`` with bytes, in pages."""
    last = b"-"
    while True:
        rows = client.xrange(stream, min=last, count=page + (0 if last == b"-" else 1))
        if last != b"-":
            rows = rows[1:]
        if not rows:
            return
        yield from rows
        last = rows[-1][0]


def verdict_ids(client, keys: Keys = KEYS) -> Counter:
    """How many verdicts each comment id got."""
    return Counter(_s(fields[b"id"]) for _sid, fields in read_stream(client, keys.verdicts))


def deadletters(client, keys: Keys = KEYS) -> list[dict]:
    return [{_s(k): _s(v) for k, v in fields.items()} for _sid, fields in read_stream(client, keys.deadletter)]


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


class Producer(threading.Thread):
    """Sends comments ``id = f"{prefix}{i}"`` at about ``rate`` per second, surviving outages.

    A chunk whose XADD pipeline fails is sent again once Redis answers, as a
    site's retrying producer would; so an entry may reach the stream twice,
    and the per-id marker must keep it to one verdict.  ``accepted`` counts
    the ids whose XADD was acknowledged.
    """

    def __init__(self, *, url: str, n: int, rate: float, prefix: str = "c", chunk: int = 50, keys: Keys = KEYS):
        super().__init__(name="producer", daemon=True)
        self.client = redis.Redis.from_url(url, socket_timeout=2, socket_connect_timeout=1)
        self.n = n
        self.rate = rate
        self.prefix = prefix
        self.chunk = chunk
        self.keys = keys
        self.accepted: set[str] = set()
        self.resent_chunks = 0
        self.errors = 0
        self.done = threading.Event()
        self.abort = threading.Event()

    def run(self) -> None:
        t0 = time.monotonic()
        i = 0
        while i < self.n and not self.abort.is_set():
            due = t0 + i / self.rate
            pause = due - time.monotonic()
            if pause > 0:
                time.sleep(pause)
            ids = range(i, min(self.n, i + self.chunk))
            try:
                pipe = self.client.pipeline(transaction=False)
                for k in ids:
                    pipe.xadd(self.keys.comments, {"id": f"{self.prefix}{k}", "text": comment_text(k),
                                                   "site": f"site{k % 3}.example", "author": f"member{k % 97}"})
                pipe.execute()
            except (redis.ConnectionError, redis.TimeoutError, redis.ResponseError):
                # ResponseError: a restarting server answers LOADING while it reads its AOF.
                self.errors += 1
                self.resent_chunks += 1
                time.sleep(0.05)
                continue
            self.accepted.update(f"{self.prefix}{k}" for k in ids)
            i += len(ids)
        self.done.set()
        self.client.close()


def write_model(path, seed: int = 0) -> Path:
    """A real EmbeddingClassifier artifact (trained on the invented forum's comments) at ``path``."""
    from retrain_kit import model_bytes

    path = Path(path)
    path.write_bytes(model_bytes(seed))
    return path


def model_version(seed: int = 0) -> str:
    from model.classifier import EmbeddingClassifier
    from retrain_kit import model_bytes

    return EmbeddingClassifier.from_bytes(model_bytes(seed)).version
