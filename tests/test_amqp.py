"""The RabbitMQ transport: a real rabbitmq-server node and a real redis-server per test.

Comments come by a quorum queue; verdicts land once in Redis (done markers) and
are published, confirmed, to the verdicts exchange; bad messages are dead-lettered
with their reason; unacknowledged messages come back after a lost connection.
"""
from __future__ import annotations

import json

import pika
import pytest

from scorers import WordScorer
from worker.amqp import AmqpSource, amqp_consumer, message_entry
from worker.connection import connect
from worker.loader import StaticModelSource
from worker.settings import AmqpSettings, Keys, WorkerSettings
from worker.streams import Entry
from worker.validation import DeadLetter, Limits, validate

KEYS = Keys()
LIMITS = Limits()


# -- the message body, pure --------------------------------------------------------------------

def test_a_json_object_of_strings_becomes_an_entry_in_order():
    got = message_entry(b'{"id": "c1", "text": "caf\\u00e9 at noon", "site": "a.example"}', b"1-0", LIMITS)
    assert got == Entry(b"1-0", ((b"id", b"c1"), (b"text", "café at noon".encode()), (b"site", b"a.example")))


@pytest.mark.parametrize("body, detail", [
    (b"not json", "not JSON"),
    (b"\xff\xfe", "not JSON"),
    (b'["id", "c1"]', "JSON object"),
    (b'{"id": "c1", "text": 5}', "values are all strings"),
    (b'{"id": "c1", "text": "\\ud800"}', "not valid Unicode"),
], ids=["text", "bad-utf8", "array", "number", "lone-surrogate"])
def test_a_body_that_is_not_a_json_object_of_strings_is_a_malformed_dead_letter(body, detail):
    got = message_entry(body, b"1-0", LIMITS)
    assert isinstance(got, DeadLetter) and got.reason == "malformed" and detail in got.detail
    assert got.fields[0][0] == "body"  # the body is kept (cut to size) for whoever looks into it


def test_a_repeated_field_name_reaches_validation_and_is_dead_lettered():
    got = validate(message_entry(b'{"id": "c1", "text": "a", "text": "b"}', b"1-0", LIMITS), LIMITS)
    assert isinstance(got, DeadLetter) and got.reason == "duplicate_field"


@pytest.mark.parametrize("url", ["redis://127.0.0.1/", "http://broker", "guest@127.0.0.1"], ids=["redis", "http", "bare"])
def test_the_source_url_must_be_amqp(url):
    with pytest.raises(ValueError, match="amqp://"):
        AmqpSettings(url=url)


# -- against a real broker ---------------------------------------------------------------------

@pytest.fixture
def queue(request) -> str:
    """A queue of this test's own on the module's broker."""
    return f"q-{request.node.name[:60]}"


def publish(server, bodies, queue):
    connection = server.connection()
    channel = connection.channel()
    channel.confirm_delivery()
    channel.queue_declare(queue, durable=True, arguments={"x-queue-type": "quorum"})
    for body in bodies:
        channel.basic_publish("", queue, body, pika.BasicProperties(delivery_mode=2))
    connection.close()


def comment(i: int, text: str | None = None) -> bytes:
    return json.dumps({"id": f"c{i}", "text": text or f"lunch at noon number {i}", "site": "a.example"}).encode()


def bind_verdicts(server, exchange):
    """A queue bound to the verdicts exchange before any worker publishes; returns a reader of it."""
    connection = server.connection()
    channel = connection.channel()
    channel.exchange_declare(exchange, exchange_type="fanout", durable=True)
    queue = channel.queue_declare("", exclusive=True).method.queue
    channel.queue_bind(queue, exchange)

    def read():
        out = []
        while True:
            method, properties, body = channel.basic_get(queue, auto_ack=True)
            if method is None:
                return out
            out.append((properties.message_id, json.loads(body)))

    return read


def make(rabbit, redis_server, queue, **worker):
    client = connect(redis_server.url, raw_streams=True)
    settings = WorkerSettings(**{"block_ms": 50, "overlap_commit": False, "hold_floor": 0.0, "reject_floor": 0.0,
                                 "batch": 64, **worker})
    amqp = AmqpSettings(url=rabbit.url, prefetch=128, queue=queue, verdicts_exchange=f"{queue}.verdicts")
    return amqp_consumer(client=client, amqp=amqp, keys=KEYS,
                         settings=settings, model_source=StaticModelSource(model=WordScorer()), consumer="w")


def drain(c, want: int, client, *, rounds: int = 200) -> None:
    for _ in range(rounds):
        c.step()
        if client.xlen(KEYS.verdicts) + client.xlen(KEYS.deadletter) >= want:
            return
    raise AssertionError(f"only {client.xlen(KEYS.verdicts)} verdicts after {rounds} reads")


def queue_depth(server, queue) -> int:
    connection = server.connection()
    try:
        return connection.channel().queue_declare(queue, passive=True).method.message_count
    finally:
        connection.close()


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
def test_comments_by_rabbitmq_get_one_verdict_each_and_bad_ones_are_dead_lettered(rabbit_node, redis_server, queue):
    read_verdicts = bind_verdicts(rabbit_node, f"{queue}.verdicts")
    bodies = [comment(i, "free casino bonus prize" if i % 10 == 0 else None) for i in range(300)]
    publish(rabbit_node, bodies + [b"not json", b'{"text": "no id here"}'], queue)
    c = make(rabbit_node, redis_server, queue)
    c.prepare()
    client = redis_server.client()
    drain(c, 302, client)
    c.step()  # the last batch's acknowledgement is in; nothing more comes
    records = [{k.decode(): v.decode() for k, v in f.items()} for _, f in client.xrange(KEYS.verdicts)]
    assert sorted(r["id"] for r in records) == sorted(f"c{i}" for i in range(300))
    assert {r["id"]: r["action"] for r in records}["c10"] == "reject"
    dead = {f[b"reason"].decode(): f[b"source"].decode() for _, f in client.xrange(KEYS.deadletter)}
    assert dead == {"malformed": queue, "missing_id": queue}
    assert client.zscore(KEYS.held, "c0") is None and client.hget(KEYS.text("c7"), "action") == b"publish"
    published = read_verdicts()
    assert len(published) == 300 and {m for m, _ in published} == {f"{r['id']}:{r['digest']}" for r in records}
    assert all("repeat" not in body for _, body in published)
    c.source.close()
    assert queue_depth(rabbit_node, queue) == 0  # everything acknowledged: nothing comes back after the close


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
def test_a_batch_committed_but_not_acknowledged_comes_back_as_duplicates(rabbit_node, redis_server, queue):
    """A worker that dies between the Redis commit and the ack: the broker delivers again, Redis writes nothing twice."""
    read_verdicts = bind_verdicts(rabbit_node, f"{queue}.verdicts")
    publish(rabbit_node, [comment(i) for i in range(20)], queue)
    c = make(rabbit_node, redis_server, queue, batch=20)
    c.prepare()
    client = redis_server.client()
    batch = c.source.read(block=True)
    while len(batch.entries) < 20:  # the broker may hand the 20 over in more than one frame
        more = c.source.read(block=True)
        batch.entries.extend(more.entries)
        batch.token = more.token or batch.token
    scored, _ = c._score([validate(e, LIMITS) for e in batch.entries])
    c.sink.commit(batch, scored, [], model="standin0001", now=1_700_000_000.0)  # committed ...
    c.source.prepare()                                                          # ... and the connection lost
    assert client.xlen(KEYS.verdicts) == 20
    again = c.source.read(block=True)
    while len(again.entries) < 20:
        more = c.source.read(block=True)
        again.entries.extend(more.entries)
        again.deliveries = {**(again.deliveries or {}), **(more.deliveries or {})}
        again.token = more.token or again.token
    assert set(again.deliveries.values()) == {2}  # the quorum queue counted the first delivery
    result = c.process_batch(again)
    assert (result.written, result.duplicates) == (0, 20)
    assert client.xlen(KEYS.verdicts) == 20
    published = read_verdicts()
    assert len(published) == 20 and all(body["repeat"] is True for _, body in published)
    c.source.close()
    assert queue_depth(rabbit_node, queue) == 0


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
def test_a_message_delivered_too_often_is_poison(rabbit_node, redis_server, queue):
    publish(rabbit_node, [comment(1)], queue)
    c = make(rabbit_node, redis_server, queue, max_deliveries=1)
    c.prepare()
    client = redis_server.client()
    assert len(c.source.read(block=True).entries) == 1
    c.source.prepare()  # lost before it was committed
    result = c.process_batch(c.source.read(block=True))
    assert result.dead == {"poison": 1} and client.xlen(KEYS.verdicts) == 0
    dead = client.xrange(KEYS.deadletter)[0][1]
    assert dead[b"reason"] == b"poison" and b"delivered 2 times" in dead[b"detail"] and dead[b"id"] == b"c1"
    c.source.close()
    assert queue_depth(rabbit_node, queue) == 0


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
def test_lag_reports_the_messages_waiting_in_the_queue(rabbit_node, redis_server, queue):
    publish(rabbit_node, [comment(i) for i in range(5)], queue)
    source = AmqpSource(settings=AmqpSettings(url=rabbit_node.url, prefetch=1, queue=queue),
                        worker=WorkerSettings(block_ms=50), consumer="w")
    source.prepare()
    batch = source.read(block=True)
    lag = source.lag()
    assert len(batch.entries) == 1 and lag.lag == 4 and lag.pending == 0  # prefetch 1: the rest wait in the queue
    source.close()


class _Frame:
    def __init__(self, method):
        self.method = method


class _StubBroker:
    """A channel whose broker confirms the way it is told: ``plan`` maps a publish count to the frames it sends."""

    def __init__(self, plan):
        self.plan = plan
        self.sent = 0
        self._impl = self
        self.on_confirm = None
        self.pending = []

    def channel(self):
        return self

    def confirm_delivery(self, *, ack_nack_callback, callback):
        self.on_confirm = ack_nack_callback
        callback(_Frame(pika.spec.Confirm.SelectOk()))

    def basic_publish(self, exchange, routing_key, body, properties):
        self.sent += 1
        self.pending.extend(self.plan.get(self.sent, ()))

    def process_data_events(self, time_limit=0):
        frames, self.pending = self.pending, []
        for method in frames:
            self.on_confirm(_Frame(method))


@pytest.mark.parametrize("plan, refused", [
    ({3: [pika.spec.Basic.Ack(delivery_tag=3, multiple=True)]}, 0),
    ({1: [pika.spec.Basic.Ack(delivery_tag=1)], 3: [pika.spec.Basic.Ack(delivery_tag=3),
                                                   pika.spec.Basic.Ack(delivery_tag=2)]}, 0),
    ({3: [pika.spec.Basic.Ack(delivery_tag=1), pika.spec.Basic.Nack(delivery_tag=3, multiple=True)]}, 2),
], ids=["one-multiple-ack", "out-of-order-acks", "nack"])
def test_a_batch_of_verdicts_waits_once_for_every_confirm_and_a_nack_fails_it(plan, refused):
    from worker.amqp import ConfirmedPublisher
    from worker.transport import TransientError

    broker = _StubBroker(plan)
    publisher = ConfirmedPublisher(broker, timeout_s=1.0)
    messages = [(f"c{i}:d", b"{}") for i in range(3)]
    if refused:
        with pytest.raises(TransientError, match=f"refused {refused} verdict"):
            publisher.publish("x", messages)
    else:
        publisher.publish("x", messages)
    assert broker.sent == 3


def test_a_verdict_the_broker_never_confirms_fails_the_batch_in_time():
    from worker.amqp import ConfirmedPublisher
    from worker.transport import TransientError

    publisher = ConfirmedPublisher(_StubBroker({}), timeout_s=0.2)
    with pytest.raises(TransientError, match="did not confirm"):
        publisher.publish("x", [("c1:d", b"{}")])
