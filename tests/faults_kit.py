"""What the fault, load and security tests share beyond tests/kit.py: a real
model file, invented comments, a producer that survives outages, and counting
what reached the verdict and dead-letter streams.  The ``seawall serve``
subprocesses themselves are :class:`kit.Worker`.
"""
from __future__ import annotations

import signal
import threading
import time
from collections import Counter
from pathlib import Path

import redis

from kit import Worker, stop_all, wait_for_progress, wait_until
from worker.partitions import send_comment
from worker.settings import Keys

KEYS = Keys()

# Invented words for the comments (our own scenario: a town's allotment and cycling pages).
_WORDS = ("allotment", "tomatoes", "compost", "seedlings", "bike", "lane", "canal", "towpath", "rain", "shed",
          "swap", "marrow", "trellis", "puncture", "saddle", "bakery", "library", "choir", "harbour", "ferry")
_SPAM = ("free", "prize", "casino", "bonus", "crypto", "pills", "winner", "click")


def comment_text(i: int) -> str:
    """A short invented comment; every fifth one reads like spam."""
    pool = _SPAM if i % 5 == 0 else _WORDS
    words = [pool[(i * 7 + k * 3) % len(pool)] for k in range(6)]
    return f"post {i} " + " ".join(words)


def consumer_pending(client, name: str, keys: Keys = KEYS) -> int:
    """Entries pending on consumer ``name`` over every partition (0 when it has not read yet)."""
    total = 0
    for part in keys.parts:
        try:
            rows = client.xinfo_consumers(part.comments, keys.group)
        except redis.ResponseError:  # the group is not made yet
            continue
        total += sum(int(row["pending"]) for row in rows if _s(row["name"]) == name)
    return total


def kill_mid_batch(client, workers, rng, kill_number: int, keys: Keys = KEYS) -> tuple[str, int]:
    """SIGKILL a worker holding unacknowledged entries (any worker if none does) and start it again.

    Even kills restart it under the same name (it reads its own backlog first); odd kills under a
    new name, so the others must reclaim what the dead one held.  Returns the victim's name at the
    kill and how many entries it held then.
    """
    # Generous: on a loaded machine the workers restarted by earlier kills may take a while to load the
    # model and hold a batch again; the kill should still land mid-batch rather than on an idle worker.
    busy = wait_until(lambda: [w for w in workers if w.alive() and consumer_pending(client, w.name, keys)],
                      timeout=60, interval=0.01)
    victim = rng.choice(busy or workers)
    name, held = victim.name, consumer_pending(client, victim.name, keys)
    assert victim.kill() == -signal.SIGKILL
    base = name.split(".")[0]
    victim.start(name=name if kill_number % 2 == 0 else f"{base}.{kill_number}")
    return name, held


def kills_on_fresh_backlogs(workers, rng, *, kills: int, feed, kill) -> list:
    """Run ``kills`` kills, each on a fresh backlog: ``feed(0)``, then before kill ``k`` (1..kills) wait until
    every worker has started and ``feed(k)``; ``feed(kills + 1)`` after the last.  The kills' results, in order.

    Queued all at once, a run can be drained by a fast machine before the later kills, which then hit idle
    workers; fed in slices, every kill finds work in hand.  A worker still loading its model after the
    previous kill may hold its former self's entries without working on them, so kills wait for it.
    """
    feed(0)
    out = []
    for k in range(1, kills + 1):
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60), "a restarted worker did not start"
        feed(k)
        time.sleep(rng.uniform(0.0, 0.02))
        out.append(kill(k))
    feed(kills + 1)
    return out


def slice_of(n: int, k: int, slices: int) -> range:
    """The ``k``-th of ``slices`` consecutive slices of ``range(n)``."""
    return range(k * n // slices, (k + 1) * n // slices)


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

    def send(self, ids) -> None:
        """XADD comments ``ids`` in one pipeline (raises on a Redis error; :meth:`run` retries)."""
        pipe = self.client.pipeline(transaction=False)
        for k in ids:
            send_comment(self.client, self.keys, {"id": f"{self.prefix}{k}", "text": comment_text(k),
                                                  "site": f"site{k % 3}.example", "author": f"member{k % 97}"},
                         pipeline=pipe)
        pipe.execute()

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
                self.send(ids)
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


def start_workers(url: str, tmp_path, *, env: dict | None = None, n: int = 2) -> list[Worker]:
    """``n`` ``seawall serve`` workers named w0, w1, ... on one real model file written into ``tmp_path``."""
    model = write_model(tmp_path / "model.bin")
    return [Worker(url=url, name=f"w{i}", log_dir=tmp_path, model_path=model, env=env).start() for i in range(n)]


def wait_for_verdicts(client, n: int, *, stall_s: float = 60.0, keys: Keys = KEYS) -> Counter:
    """Wait, as long as verdicts keep coming, until ``n`` are written and nothing is pending; the count per id."""
    wait_for_progress(lambda: client.xlen(keys.verdicts) >= n and group_pending(client, keys) == 0,
                      lambda: (client.xlen(keys.verdicts), group_pending(client, keys)), stall_s=stall_s,
                      interval=0.2, what=f"{n} verdicts and nothing pending (progress: verdicts, pending)")
    return verdict_ids(client, keys)


def stop_run(producer: "Producer", workers) -> list[int]:
    """Teardown of a run: stop the producer, then every worker; the workers' exit codes."""
    producer.abort.set()
    return stop_all(workers)


def doubled(counts: Counter) -> int:
    """Verdicts beyond the first of each id."""
    return sum(v - 1 for v in counts.values() if v > 1)


def tally(counts: Counter, sent: int) -> tuple[int, int]:
    """``(lost, doubled)`` of a run that sent ``sent`` comments, from the verdicts counted per id."""
    return sent - len(counts), doubled(counts)


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


def amqp_comment(i: int, prefix: str = "c") -> bytes:
    """Comment ``i`` as the JSON body a RabbitMQ producer sends (same fields as a stream entry)."""
    import json

    return json.dumps({"id": f"{prefix}{i}", "text": comment_text(i), "site": f"site{i % 3}.example",
                       "author": f"member{i % 97}"}).encode()


class AmqpProducer(threading.Thread):
    """Publishes comments to a quorum queue with publisher confirms, surviving broker outages.

    A message whose publish was not confirmed is published again once the
    broker answers, as a careful producer would; so a comment may reach the
    queue twice, and the done markers must keep it to one verdict.
    ``accepted`` counts the ids the broker confirmed.
    """

    def __init__(self, *, url: str, n: int, rate: float, queue: str = "seawall.comments", prefix: str = "c"):
        super().__init__(name="amqp-producer", daemon=True)
        self.url, self.n, self.rate, self.queue, self.prefix = url, n, rate, queue, prefix
        self.accepted: set[str] = set()
        self.errors = 0
        self.done = threading.Event()
        self.abort = threading.Event()

    def _channel(self):
        import pika

        connection = pika.BlockingConnection(pika.URLParameters(self.url + "?connection_attempts=1&socket_timeout=2"))
        channel = connection.channel()
        channel.confirm_delivery()
        channel.queue_declare(self.queue, durable=True, arguments={"x-queue-type": "quorum"})
        return connection, channel

    def run(self) -> None:
        import pika

        t0 = time.monotonic()
        i, connection, channel = 0, None, None
        while i < self.n and not self.abort.is_set():
            pause = t0 + i / self.rate - time.monotonic()
            if pause > 0:
                time.sleep(pause)
            try:
                if channel is None:
                    connection, channel = self._channel()
                channel.basic_publish("", self.queue, amqp_comment(i, self.prefix),
                                      pika.BasicProperties(delivery_mode=2))
            except (pika.exceptions.AMQPError, OSError):
                self.errors += 1
                channel = None
                if connection is not None:
                    try:
                        connection.close()
                    except Exception:  # noqa: BLE001 - already gone
                        pass
                    connection = None
                time.sleep(0.1)
                continue
            self.accepted.add(f"{self.prefix}{i}")
            i += 1
        if connection is not None and connection.is_open:
            connection.close()
        self.done.set()


def amqp_queue_depth(url: str, queue: str = "seawall.comments") -> tuple[int, int]:
    """(messages ready, consumers) of ``queue``; unacknowledged messages are in neither."""
    import pika

    connection = pika.BlockingConnection(pika.URLParameters(url))
    try:
        method = connection.channel().queue_declare(queue, passive=True).method
        return method.message_count, method.consumer_count
    finally:
        connection.close()
