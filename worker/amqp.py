"""RabbitMQ behind the transport seam: comments from a quorum queue, state and verdicts in Redis.

Producers publish each comment as a persistent message to the quorum queue
``amqp.queue`` (default ``seawall.comments``; declared durable with
``x-queue-type: quorum`` if missing), the body a JSON object with the same
fields as a stream entry: ``id``, ``text`` and optional ``site``, ``author``,
``ts``, each a string.

A worker consumes with manual acknowledgements and a prefetch of
``amqp.prefetch`` messages (basic.qos).  For each batch:

1. the verdicts are committed to Redis by the same Lua script as the Redis
   Streams transport (:class:`worker.commit.BatchCommitter` with
   ``acknowledges=False``): verdict record, text cache, hold queue, counts and
   the ``done:{id}`` marker land together, and a comment whose id and text
   already have a marker gets no second verdict;
2. each verdict is published to the fanout exchange ``amqp.verdicts_exchange``
   (default ``seawall.verdicts``) with publisher confirms, ``message_id``
   ``<comment id>:<digest>``; the batch's messages are published together and
   their confirms awaited once (:class:`ConfirmedPublisher`);
3. the batch's messages are acknowledged (one ``basic.ack`` with ``multiple``).

A worker killed between 1 and 3 leaves its messages unacknowledged; the broker
delivers them again, the done markers turn them into duplicates, and their
verdicts are published again (at least once on the exchange; consumers of it
deduplicate by ``message_id``).  Redis stays the one record: exactly one
verdict record per comment id and text.  A message delivered more than
``worker.max_deliveries`` times (the quorum queue's ``x-delivery-count``
header) is dead-lettered as ``poison``; a body that is not a JSON object of
strings is dead-lettered as ``malformed``, with its reason, in the Redis
dead-letter stream.  Any lost connection, to RabbitMQ or to Redis, drops the
channel, so the broker hands every unacknowledged message out again.
"""
from __future__ import annotations

import contextlib
import itertools
import json
import logging
import ssl
import time
from dataclasses import dataclass, field

import pika
import pika.exceptions
import pika.spec

from worker.commit import WRITTEN, BatchCommitter, Limits as CommitLimits, text_digest
from worker.redistransport import RedisState, redis_errors
from worker.settings import AmqpSettings, Keys, WorkerSettings
from worker.streams import Entry
from worker.transport import Batch, Lag, TransientError
from worker.validation import DeadLetter, Limits as InputLimits, dead_letter

log = logging.getLogger("seawall.worker")

# The quorum queue's count of earlier deliveries of a message (absent on the first one).
DELIVERY_COUNT = "x-delivery-count"
QUEUE_ARGUMENTS = {"x-queue-type": "quorum"}


@contextlib.contextmanager
def amqp_errors():
    """Turn what pika may raise mid-stream into :class:`TransientError` (the batch stays unacknowledged)."""
    try:
        yield
    except pika.exceptions.ProbableAuthenticationError as exc:
        raise TransientError("RabbitMQ refused the credentials; check the user and password in the URL") from exc
    except pika.exceptions.ChannelClosedByBroker as exc:
        raise TransientError(f"RabbitMQ closed the channel ({exc.reply_code} {exc.reply_text}); "
                             "check that the queue and exchange settings match what the broker has") from exc
    except (pika.exceptions.AMQPError, OSError) as exc:
        raise TransientError("lost connection to RabbitMQ") from exc


class _Pairs(list):
    """A JSON object's (name, value) pairs in order (a JSON array decodes to a plain list)."""


def message_entry(body: bytes, stream_id: bytes, limits: InputLimits) -> Entry | DeadLetter:
    """A message body as a stream entry (pure): a JSON object of strings, or a ``malformed`` dead letter.

    Every pair is kept in order, repeated names included, so that validation
    sees what a stream entry would have held (and dead-letters a repeated name).
    """
    def malformed(detail: str) -> DeadLetter:
        return dead_letter(Entry(stream_id, ((b"body", bytes(body)),)), "malformed", detail, limits)

    try:
        pairs = json.loads(body, object_pairs_hook=_Pairs)
    except (UnicodeDecodeError, ValueError):
        return malformed("the message body is not JSON in UTF-8")
    if type(pairs) is not _Pairs or not all(isinstance(k, str) and isinstance(v, str) for k, v in pairs):
        return malformed("the message body must be a JSON object whose values are all strings")
    try:
        fields = tuple((k.encode(), v.encode()) for k, v in pairs)
    except UnicodeEncodeError:  # a lone surrogate escaped in the JSON
        return malformed("the message body holds a string that is not valid Unicode")
    return Entry(stream_id, fields)


def connection_parameters(settings: AmqpSettings) -> pika.URLParameters:
    """Connection parameters from the URL, with the heartbeat, timeouts and the TLS CA of the settings."""
    params = pika.URLParameters(settings.url)
    params.heartbeat = settings.heartbeat_s
    params.socket_timeout = settings.connect_timeout_s
    params.blocked_connection_timeout = max(60.0, settings.connect_timeout_s)
    params.connection_attempts = 1
    if settings.url.startswith("amqps://"):
        context = ssl.create_default_context(cafile=settings.tls_ca or None)
        params.ssl_options = pika.SSLOptions(context, params.host)
    return params


class ConfirmedPublisher:
    """Publishes a batch of messages on a channel in confirm mode and waits once for the broker's confirms.

    pika's blocking channel waits for each message's confirm before the next
    publish, a round trip per verdict; the channel underneath it
    (``pika.channel.Channel``) streams publishes and reports confirms to a
    callback, so a batch costs one wait.  A nack, or no confirm within
    ``timeout_s``, raises :class:`TransientError`: the batch is not
    acknowledged, and its messages come back (their verdicts are published again).
    """

    def __init__(self, connection, *, timeout_s: float):
        self.connection = connection
        self.timeout_s = timeout_s
        self.channel = connection.channel()
        self._impl = self.channel._impl  # the blocking wrapper has no way to publish without waiting
        self._outstanding: set[int] = set()
        self._nacked = 0
        self._published = 0
        selected = []
        self._impl.confirm_delivery(ack_nack_callback=self._on_confirm, callback=selected.append)
        self._wait(lambda: bool(selected), "confirm mode")

    def _on_confirm(self, frame) -> None:
        method = frame.method
        tags = {t for t in self._outstanding if t <= method.delivery_tag} if method.multiple else {method.delivery_tag}
        self._outstanding -= tags
        if isinstance(method, pika.spec.Basic.Nack):
            self._nacked += len(tags)

    def _wait(self, done, what: str) -> None:
        deadline = time.monotonic() + self.timeout_s
        while not done():
            left = deadline - time.monotonic()
            if left <= 0:
                raise TransientError(f"RabbitMQ did not confirm {what} within {self.timeout_s:.0f}s")
            # Confirms reach a callback of the channel underneath, which does not end a blocking wait
            # early (a message delivery would): wait in short steps.
            self.connection.process_data_events(time_limit=min(left, 0.001))

    def publish(self, exchange: str, messages) -> None:
        """``messages``: ``(message_id, body)`` pairs, persistent JSON; returns once the broker confirmed all."""
        for message_id, body in messages:
            self._published += 1
            self._outstanding.add(self._published)
            self._impl.basic_publish(exchange, "", body, pika.BasicProperties(
                message_id=message_id, content_type="application/json", delivery_mode=2))
        self._wait(lambda: not self._outstanding, "the verdicts it was sent")
        if self._nacked:
            nacked, self._nacked = self._nacked, 0
            raise TransientError(f"RabbitMQ refused {nacked} verdict message(s) (nack)")


@dataclass(slots=True)
class Delivery:
    """What acknowledging a batch needs: its last delivery tag and the verdicts to publish first."""

    last_tag: int
    verdicts: list = field(default_factory=list)


class AmqpSource:
    """Comments from a RabbitMQ quorum queue (see the module docstring).

    Parameters
    ----------
    settings : ``Config.amqp``.
    worker : ``Config.worker`` (batch size, blocking time, input limits).
    consumer : this worker's name (its consumer tag).
    """

    service = "RabbitMQ"

    def __init__(self, *, settings: AmqpSettings, worker: WorkerSettings, consumer: str):
        self.settings = settings
        self.worker = worker
        self.consumer = consumer
        self.describe = f"queue {settings.queue} on RabbitMQ"
        self._limits = InputLimits.from_settings(worker)
        self._connection = None
        self._channel = None
        self._publisher: ConfirmedPublisher | None = None
        self._buffer: list = []
        self._seq = itertools.count()
        self._tags = itertools.count(1)

    # -- connection -------------------------------------------------------------------------

    def prepare(self) -> None:
        """(Re)connect: declare the queue and exchange, set the prefetch, start consuming.

        An earlier connection is closed first, so that the broker hands out
        again whatever it had delivered and was never acknowledged.
        """
        self.close()
        s = self.settings
        with amqp_errors():
            connection = pika.BlockingConnection(connection_parameters(s))
            try:
                channel = connection.channel()
                channel.queue_declare(s.queue, durable=True, arguments=QUEUE_ARGUMENTS)
                publisher = None
                if s.verdicts_exchange:
                    channel.exchange_declare(s.verdicts_exchange, exchange_type="fanout", durable=True)
                    publisher = ConfirmedPublisher(connection, timeout_s=max(30.0, s.connect_timeout_s))
                channel.basic_qos(prefetch_count=s.prefetch)
                channel.basic_consume(s.queue, self._on_message, auto_ack=False,
                                      consumer_tag=f"{self.consumer}-{next(self._tags)}")
            except BaseException:
                with contextlib.suppress(Exception):
                    connection.close()
                raise
        self._connection, self._channel, self._publisher = connection, channel, publisher
        log.info("consuming %s (prefetch %d)", self.describe, s.prefetch)

    def close(self) -> None:
        connection, self._connection, self._channel, self._publisher = self._connection, None, None, None
        self._buffer.clear()
        if connection is not None and connection.is_open:
            with contextlib.suppress(Exception):
                connection.close()

    def _on_message(self, _channel, method, properties, body) -> None:
        self._buffer.append((method.delivery_tag, properties, body))

    # -- the seam -----------------------------------------------------------------------------

    def read(self, *, block: bool = True) -> Batch:
        """Up to ``worker.batch`` delivered messages; waits up to ``worker.block_ms`` for the first."""
        if self._connection is None:
            raise TransientError("not connected to RabbitMQ")
        with amqp_errors():
            self._connection.process_data_events(time_limit=0)
            if block and not self._buffer:
                deadline = time.monotonic() + self.worker.block_ms / 1000.0
                while not self._buffer:
                    left = deadline - time.monotonic()
                    if left <= 0:
                        break
                    self._connection.process_data_events(time_limit=min(left, 0.05))
        taken = self._buffer[: self.worker.batch]
        del self._buffer[: len(taken)]
        if not taken:
            return Batch([])
        now_ms = int(time.time() * 1000)
        entries, dead, deliveries = [], [], {}
        for _tag, properties, body in taken:
            stream_id = f"{now_ms}-{next(self._seq)}".encode()
            checked = message_entry(body, stream_id, self._limits)
            if isinstance(checked, DeadLetter):
                dead.append(checked)
                continue
            entries.append(checked)
            earlier = (properties.headers or {}).get(DELIVERY_COUNT)
            if isinstance(earlier, int) and earlier > 0:
                deliveries[stream_id] = earlier + 1
        return Batch(entries, deliveries or None, token=Delivery(taken[-1][0]), dead=dead)

    def claim(self):
        """Nothing to claim: the broker hands out again what a closed connection left unacknowledged."""
        return ()

    def acknowledge(self, batch: Batch) -> None:
        """Publish the batch's verdicts (each confirmed by the broker), then acknowledge its messages."""
        delivery = batch.token
        if delivery is None:
            return
        channel = self._channel
        if channel is None:
            raise TransientError("not connected to RabbitMQ")
        with amqp_errors():
            if self._publisher is not None and delivery.verdicts:
                self._publisher.publish(self.settings.verdicts_exchange, delivery.verdicts)
            channel.basic_ack(delivery_tag=delivery.last_tag, multiple=True)

    def lag(self) -> Lag | None:
        if self._channel is None:
            return None
        with amqp_errors():
            declared = self._channel.queue_declare(self.settings.queue, passive=True)
        return Lag(int(declared.method.message_count), len(self._buffer))


class AmqpSink:
    """Commits a RabbitMQ batch to Redis (done markers decide), and readies its verdict messages.

    The messages are published by :meth:`AmqpSource.acknowledge` on the
    worker's thread (a pika connection belongs to one thread).
    """

    def __init__(self, *, client, keys: Keys, settings: WorkerSettings, queue: str):
        self.client = client
        self.committer = BatchCommitter(keys=keys, limits=CommitLimits.from_settings(settings), acknowledges=False,
                                        source=queue)

    def commit(self, batch: Batch, scored, dead, *, model: str, now: float) -> list[int]:
        with redis_errors():
            codes = self.committer.commit(self.client, scored, dead, model=model, now=now, consumer="",
                                          partition=batch.partition)
        if isinstance(batch.token, Delivery):
            batch.token.verdicts = [verdict_message(s, model, repeat=code != WRITTEN) for s, code in zip(scored, codes)]
        return codes


def verdict_message(scored, model: str, *, repeat: bool) -> tuple[str, bytes]:
    """``(message_id, body)`` of one published verdict; ``repeat`` marks one already recorded before."""
    c = scored.comment
    digest = text_digest(c.text)
    body = {"id": c.id, "site": c.site, "score": scored.score, "action": scored.action, "rule": scored.rule,
            "model": model, "digest": digest, "reasons": json.loads(scored.reasons)}
    if scored.campaign:
        body["campaign"] = scored.campaign
    if repeat:
        body["repeat"] = True
    return f"{c.id}:{digest}", json.dumps(body, separators=(",", ":")).encode()


def amqp_consumer(*, client, amqp: AmqpSettings, keys: Keys, settings: WorkerSettings, model_source, consumer: str,
                  observer=None, policies=(), clock=time.time, state=None):
    """A :class:`worker.consumer.StreamConsumer` reading RabbitMQ, with Redis (``client``) as its state store.

    ``state`` is the policies' state port (:class:`RedisState` on ``client`` when not given).
    """
    from worker.consumer import StreamConsumer

    return StreamConsumer(
        source=AmqpSource(settings=amqp, worker=settings, consumer=consumer),
        sink=AmqpSink(client=client, keys=keys, settings=settings, queue=amqp.queue),
        state=state if state is not None else RedisState(client, keys),
        keys=keys, settings=settings, model_source=model_source, observer=observer, policies=policies, clock=clock,
    )
