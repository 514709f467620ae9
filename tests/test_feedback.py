"""Feedback in: validation, the join to the text cache, dead letters, the commands."""
from __future__ import annotations

import json
import threading

import pytest

from ops.cli import main
from worker.feedback import (
    Feedback,
    FeedbackConsumer,
    Rejected,
    join_label,
    parse_feedback,
    text_key,
)
from worker.labels import LabelRecord, parse_label, scan_labels
from worker.settings import FeedbackSettings, Keys

KEYS = Keys()


def consumer(client, **kw):
    return FeedbackConsumer(client=client, keys=KEYS, consumer="t1", settings=FeedbackSettings(block_ms=10, **kw),
                            clock=lambda: 1700000000.0)


@pytest.mark.parametrize(
    "fields, reason",
    [
        ({"label": "spam"}, "feedback_missing_id"),
        ({"id": "  ", "label": "spam"}, "feedback_missing_id"),
        ({"id": "c1"}, "feedback_unknown_label"),
        ({"id": "c1", "label": "maybe"}, "feedback_unknown_label"),
        ({"id": "c1", "label": "spam", "text": "x" * 101}, "feedback_text_too_large"),
        ({"id": b"c\xff", "label": "spam"}, "feedback_invalid_utf8"),
        ({"id": "c" * 300, "label": "ham"}, "feedback_bad_id"),
        ({"id": "c1", "label": "ham", "moderator": "m" * 200}, "feedback_bad_field"),
        ({f"f{i}": "v" for i in range(20)}, "feedback_too_many_fields"),
    ],
    ids=["no-id", "blank-id", "no-label", "unknown-label", "text-too-large", "invalid-utf8",
         "id-too-long", "moderator-too-long", "too-many-fields"],
)
def test_parse_rejects(fields, reason):
    out = parse_feedback("1-0", fields, text_max_bytes=100)
    assert isinstance(out, Rejected)
    assert out.reason == reason


def test_parse_accepts_and_normalizes():
    out = parse_feedback(b"5-1", {b"id": b"c9", b"label": b" SPAM ", b"moderator": b"mod-a"}, text_max_bytes=100)
    assert out == Feedback(stream_id="5-1", id="c9", label="spam", moderator="mod-a", reason="", text=None)


def test_join_prefers_entry_text_and_takes_site_from_cache():
    fb = Feedback(stream_id="1-0", id="c1", label="ham", text="own text")
    rec = join_label(fb, {b"text": b"cached", b"site": b"forum.example"}, now=10.0, text_max_bytes=100)
    assert rec.text == "own text" and rec.site == "forum.example" and rec.ts == "10.000"


def test_join_without_any_text_is_rejected():
    fb = Feedback(stream_id="1-0", id="c1", label="ham")
    out = join_label(fb, None, now=1.0, text_max_bytes=100)
    assert isinstance(out, Rejected) and out.reason == "feedback_no_text"


def test_consumer_labels_dead_letters_and_acks(fake_redis):
    r = fake_redis
    r.hset(text_key(KEYS, "c1"), mapping={"text": "cheap pills at pharmacy.example", "site": "news.example"})
    r.zadd(KEYS.held, {"c1": 1.0, "c2": 2.0})
    r.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "moderator": "mod-a"})
    r.xadd(KEYS.feedback, {"id": "c2", "label": "ham"})                      # no cached text
    r.xadd(KEYS.feedback, {"id": "c3", "label": "ham", "text": "thanks for the recipe"})
    r.xadd(KEYS.feedback, {"id": "c4", "label": "eggs", "text": "x"})
    c = consumer(r)
    assert c.step() == 4
    labels = [rec for _sid, rec in scan_labels(r, KEYS)]
    assert [(x.id, x.label, x.site) for x in labels] == [("c1", "spam", "news.example"), ("c3", "ham", "")]
    assert labels[0].text == "cheap pills at pharmacy.example" and labels[0].moderator == "mod-a"
    dead = r.xrange(KEYS.deadletter)
    assert [f[b"reason"] for _i, f in dead] == [b"feedback_no_text", b"feedback_unknown_label"]
    assert all(f[b"source"] == KEYS.feedback.encode() for _i, f in dead)
    assert r.zrange(KEYS.held, 0, -1) == [b"c2"]       # c1 decided; c2 stays held (no text)
    assert r.xpending(KEYS.feedback, "labellers")["pending"] == 0


def test_labelled_store_is_bounded(fake_redis):
    r = fake_redis
    for i in range(12):
        r.xadd(KEYS.feedback, {"id": f"c{i}", "label": "ham", "text": f"comment number {i}"})
    c = consumer(r, labels_max=5)
    assert c.drain() == 12
    ids = [rec.id for _s, rec in scan_labels(r, KEYS)]
    assert ids == [f"c{i}" for i in range(7, 12)]


def test_scan_labels_pages_through_chunks(fake_redis):
    for i in range(7):
        fake_redis.xadd(KEYS.labels, {"id": f"c{i}", "label": "ham", "text": "t"})
    assert [rec.id for _s, rec in scan_labels(fake_redis, KEYS, chunk=3)] == [f"c{i}" for i in range(7)]


def test_drain_reads_own_pending_after_a_crash(fake_redis):
    r = fake_redis
    r.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "text": "win a prize"})
    c = consumer(r)
    c.ensure_group()
    # The entry was read but the process died before its MULTI: it is pending.
    r.xreadgroup("labellers", "t1", {KEYS.feedback: ">"}, count=10)
    assert r.xpending(KEYS.feedback, "labellers")["pending"] == 1
    assert consumer(r).drain() == 1
    assert r.xpending(KEYS.feedback, "labellers")["pending"] == 0
    assert r.xlen(KEYS.labels) == 1


@pytest.mark.redis_server
def test_drain_claims_entries_stuck_on_a_dead_consumer(redis_client):
    r = redis_client
    r.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "text": "win a prize"})
    consumer(r).ensure_group()
    r.xreadgroup("labellers", "dead-one", {KEYS.feedback: ">"}, count=10)
    retrain = FeedbackConsumer(client=r, keys=KEYS, consumer="retrain", settings=FeedbackSettings(claim_idle_ms=0))
    assert retrain.drain() == 1
    assert r.xpending(KEYS.feedback, "labellers")["pending"] == 0
    assert r.xlen(KEYS.labels) == 1


@pytest.mark.redis_server
def test_run_thread_consumes_on_a_real_server(redis_client):
    r = redis_client
    r.hset(text_key(KEYS, "c7"), mapping={"text": "a kind reply", "site": "blog.example"})
    r.zadd(KEYS.held, {"c7": 1.0})
    stop = threading.Event()
    c = FeedbackConsumer(client=r, keys=KEYS, consumer="serve-1", settings=FeedbackSettings(block_ms=50))
    thread = threading.Thread(target=c.run, args=(stop,), daemon=True)
    thread.start()
    try:
        r.xadd(KEYS.feedback, {"id": "c7", "label": "ham", "moderator": "mod-b"})
        r.xadd(KEYS.feedback, {"id": "c8", "label": "ham"})
        for _ in range(200):
            if r.xlen(KEYS.labels) == 1 and r.xlen(KEYS.deadletter) == 1:
                break
            stop.wait(0.02)
    finally:
        stop.set()
        thread.join(timeout=5)
    assert not thread.is_alive()
    assert r.zcard(KEYS.held) == 0
    assert r.xrange(KEYS.deadletter)[0][1][b"reason"] == b"feedback_no_text"


@pytest.mark.parametrize("bad", [{"batch": 0}, {"block_ms": -1}, {"labels_max": "10"}, {"group": ""}],
                         ids=["batch-zero", "block-negative", "labels-max-str", "group-empty"])
def test_constructor_validates(fake_redis, bad):
    with pytest.raises(ValueError, match="FeedbackSettings"):
        FeedbackSettings(**bad)


@pytest.mark.redis_server
def test_feedback_and_labels_commands_round_trip(redis_server, redis_client, tmp_path, capsys):
    url = redis_server.url
    redis_client.hset(text_key(KEYS, "c1"), mapping={"text": "free crypto giveaway", "site": "s.example"})
    assert main(["feedback", "c1", "spam", "--moderator", "mod-a", "--redis", url]) == 0
    assert main(["feedback", "c2", "ham", "--text", "nice photo", "--redis", url, "--json"]) == 0
    out = capsys.readouterr().out
    assert json.loads(out.strip().splitlines()[-1])["label"] == "ham"
    FeedbackConsumer(client=redis_client, keys=KEYS).drain()
    path = tmp_path / "labels.jsonl"
    assert main(["labels", "export", str(path), "--redis", url]) == 0
    rows = [json.loads(line) for line in path.read_text().splitlines()]
    assert [(x["id"], x["label"], x["moderator"]) for x in rows] == [("c1", "spam", "mod-a"), ("c2", "ham", "")]
    redis_client.delete(KEYS.labels)
    assert main(["labels", "import", str(path), "--redis", url]) == 0
    again = [rec for _s, rec in scan_labels(redis_client, KEYS)]
    assert [(x.id, x.text, x.source) for x in again] == [("c1", "free crypto giveaway", "import"),
                                                                  ("c2", "nice photo", "import")]


@pytest.mark.parametrize(
    "line, message",
    [
        ("not json", "malformed JSON"),
        ('{"id": "c1", "label": "spam"}', "text missing"),
        ('{"id": "c1", "label": "meh", "text": "t"}', "label must be"),
        ('{"text": "t", "label": 1}', "id missing"),
    ],
    ids=["not-json", "no-text", "bad-label", "no-id"],
)
def test_labels_import_checks_the_file_before_redis(tmp_path, capsys, line, message):
    path = tmp_path / "bad.jsonl"
    path.write_text('{"id": "ok", "label": 0, "text": "fine"}\n' + line + "\n")
    # Port 1 has no server: the file is refused before any connection is tried.
    assert main(["labels", "import", str(path), "--redis", "redis://127.0.0.1:1/0"]) == 2
    err = capsys.readouterr().err
    assert message in err and "bad.jsonl:2" in err


def test_feedback_command_refuses_bad_input_before_redis(capsys):
    assert main(["feedback", " ", "spam", "--redis", "redis://127.0.0.1:1/0"]) == 2
    assert "feedback: missing id" in capsys.readouterr().err


@pytest.mark.redis_server
def test_consumer_works_on_a_client_with_raw_stream_replies(redis_server):
    from worker.connection import connect

    r = connect(redis_server.url)
    r.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "text": "buy followers"})
    r.xadd(KEYS.feedback, {"id": "c2", "label": "nope"})
    c = FeedbackConsumer(client=r, keys=KEYS, consumer="raw", settings=FeedbackSettings(claim_idle_ms=0))
    assert c.drain() == 2
    assert [rec.id for _s, rec in scan_labels(r, KEYS)] == ["c1"]
    assert r.xlen(KEYS.deadletter) == 1


def test_consumer_reports_dead_letters_to_its_observer(fake_redis):
    seen = []

    class Observer:
        def on_deadletter(self, reason):
            seen.append(reason)

    fake_redis.xadd(KEYS.feedback, {"id": "c1", "label": "maybe"})
    fake_redis.xadd(KEYS.feedback, {"id": "c2", "label": "ham"})
    fake_redis.xadd(KEYS.feedback, {"id": "c3", "label": "ham", "text": "fine"})
    FeedbackConsumer(client=fake_redis, keys=KEYS, observer=Observer()).drain()
    assert seen == ["feedback_unknown_label", "feedback_no_text"]


def test_serve_and_the_retrain_drain_get_the_same_feedback_settings_from_one_function():
    from ops.config import load_config
    from ops.labelling import feedback_settings

    config = load_config({"worker.deadletter_maxlen": 77, "retrain.backoff_cap_s": 3.0, "retrain.feedback_batch": 9},
                         environ={})
    settings = feedback_settings(config.retrain, config.worker)
    # The retrain's drain once ignored the dead-letter cap and the backoff; now both come from the Config.
    assert (settings.deadletter_maxlen, settings.backoff_cap_s, settings.batch) == (77, 3.0, 9)
    assert settings.group == config.retrain.feedback_group


def test_the_feedback_bounds_are_checked_by_the_retrain_section_too():
    from ops.settings import RetrainSettings

    with pytest.raises(ValueError, match="feedback_batch"):
        RetrainSettings(feedback_batch=0)


@pytest.mark.parametrize(
    "value, label",
    [("spam", "spam"), (" HAM ", "ham"), (1, "spam"), (0, "ham"), ("1", "spam"), (b"0", "ham")],
    ids=["spam", "ham-padded", "one", "zero", "one-string", "zero-bytes"],
)
def test_parse_label_accepts_words_and_digits(value, label):
    assert parse_label(value) == label


@pytest.mark.parametrize("value", ["maybe", "", 2, True, None, 1.0], ids=["word", "empty", "two", "bool", "none", "float"])
def test_parse_label_refuses_everything_else(value):
    with pytest.raises(ValueError, match="label must be spam, ham, 1 or 0"):
        parse_label(value)


def test_feedback_takes_a_digit_label_like_every_other_reader():
    out = parse_feedback(b"5-2", {b"id": b"c9", b"label": b"1"}, text_max_bytes=100)
    assert isinstance(out, Feedback) and out.label == "spam"


def test_a_label_record_round_trips_through_its_stream_fields(fake_redis):
    record = LabelRecord(id="c1", text="see you at the ferry", label="ham", moderator="mod-a", ts="1.000")
    fake_redis.xadd(KEYS.labels, record.as_fields())
    assert [rec for _s, rec in scan_labels(fake_redis, KEYS)] == [record]
    assert LabelRecord.from_fields({b"id": b"c2", b"label": b"eggs", b"text": b"t"}).usable is False


def test_a_label_file_on_standard_input_is_read_like_any_other(monkeypatch):
    import io

    from ops.commands.labels import read_label_file

    lines = b'{"id": "c1", "label": 1, "text": "win big\\u2028now"}\n\n{"id": "c2", "label": "ham", "text": "ok"}\n'
    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(io.BytesIO(lines)))
    records = read_label_file("-", text_max_bytes=100, now=5.0)
    assert [(r.id, r.label, r.text, r.source) for r in records] == [("c1", "spam", "win big\u2028now", "import"),
                                                                     ("c2", "ham", "ok", "import")]
