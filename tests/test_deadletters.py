"""Dead letters an operator can act on: logged at WARNING (one line per reason per interval,
with counts), details that name the fields an entry had, and feedback dead letters that keep
everything the moderator sent."""
from __future__ import annotations

import logging

import pytest

from kit import Clock
from ops.cli import main
from worker.connection import raw_stream_replies
from worker.redistransport import redis_consumer
from worker.deadletters import DeadLetterLog
from worker.feedback import FeedbackConsumer
from worker.loader import StaticModelSource
from worker.settings import Keys, WorkerSettings
from worker.streams import Entry
from worker.validation import Limits, validate
from scorers import WordScorer

KEYS = Keys()


def warnings(caplog) -> list[str]:
    return [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING and "dead letters" in r.getMessage()]


def test_one_line_per_reason_per_interval_with_counts(caplog):
    clock = Clock(100.0)
    log = DeadLetterLog(logger=logging.getLogger("test.deadletters"), source="s:comments", deadletter="s:deadletter",
                        interval_s=60, clock=clock)
    caplog.set_level(logging.WARNING, logger="test.deadletters")
    log.add("missing_text", "first detail")
    for i in range(57):
        log.add("missing_text", f"detail {i}")
    log.add("empty_text", "text is empty")
    log.flush()
    assert warnings(caplog) == [
        "dead letters from s:comments: 1 x missing_text (latest: first detail); at most one line per reason every "
        "60s, the entries are in s:deadletter",
        "dead letters from s:comments: 1 x empty_text (latest: text is empty); at most one line per reason every "
        "60s, the entries are in s:deadletter",
    ]
    caplog.clear()
    clock.t += 59
    log.flush()
    assert warnings(caplog) == []             # still inside the interval: counted, not logged
    clock.t += 1
    log.flush()
    (line,) = warnings(caplog)                # the interval is over: one line with the count
    assert line.startswith("dead letters from s:comments: 57 x missing_text (latest: detail 56)")
    caplog.clear()
    clock.t += 61
    log.flush()
    assert warnings(caplog) == []             # nothing new: nothing to say


@pytest.mark.parametrize(
    "fields, detail",
    [
        ({"id": "c1", "body": "hello"},
         "required field 'text' is missing; the entry has fields 'body', 'id'"),
        ({"ID": "c1", "TEXT": "hello"},
         "required field 'id' is missing or empty; the entry has fields 'ID', 'TEXT'; field names are "
         "case-sensitive: send 'id', not 'ID'"),
        ({"id": "c1", "Text": "hello"},
         "required field 'text' is missing; the entry has fields 'Text', 'id'; field names are case-sensitive: "
         "send 'text', not 'Text'"),
        ({"id": "c1"}, "required field 'text' is missing; the entry has field 'id'"),
    ],
    ids=["body", "upper-case", "capitalised", "id-only"],
)
def test_missing_field_details_name_the_fields_that_were_there(fields, detail):
    entry = Entry(b"1-0", tuple((k.encode(), v.encode()) for k, v in fields.items()))
    assert validate(entry, Limits()).detail == detail


def test_eight_bad_entries_make_one_warning_per_reason_and_no_comment_text(fake_redis, caplog):
    client = raw_stream_replies(fake_redis)
    secret = "ferrytimetable"  # a word of the comments' text: it must not reach the log
    for i in range(5):
        client.xadd(KEYS.comments, {"id": f"b{i}", "body": f"{secret} {i}"})
    client.xadd(KEYS.comments, {"ID": "u1", "TEXT": secret})
    client.xadd(KEYS.comments, {"id": "e1", "text": "   "})
    client.xadd(KEYS.comments, {"id": "e2", "text": "  "})
    consumer = redis_consumer(client=client, keys=KEYS, settings=WorkerSettings(block_ms=5, overlap_commit=False),
                              model_source=StaticModelSource(model=WordScorer()), consumer="w1")
    consumer.prepare()
    caplog.set_level(logging.WARNING, logger="seawall.worker")
    consumer.step()
    lines = warnings(caplog)
    assert client.xlen(KEYS.deadletter) == 8
    assert len(lines) == 3  # missing_text, missing_id, empty_text: the first of each at once
    assert any("1 x missing_text (latest: required field 'text' is missing; the entry has fields 'body', 'id')"
               in line for line in lines)
    assert any("1 x missing_id" in line and "send 'id', not 'ID'" in line for line in lines)
    assert not any(secret in line for line in lines)


def test_feedback_dead_letters_keep_every_field_the_moderator_sent(fake_redis, caplog):
    sent = {"id": "c-9999", "label": "spam", "moderator": "mod-ana", "reason": "same ferry offer as yesterday",
            "ticket": "T-17"}
    fake_redis.xadd(KEYS.feedback, sent)
    caplog.set_level(logging.WARNING)
    FeedbackConsumer(client=fake_redis, keys=KEYS).drain()
    (_sid, raw), = fake_redis.xrange(KEYS.deadletter)
    dead = {k.decode(): v.decode() for k, v in raw.items()}
    assert dead["reason"] == "feedback_no_text" and "send the text with the label" in dead["detail"]
    assert dead["orig_reason"] == sent["reason"]  # the moderator's note survives beside Seawall's reason
    assert {k: dead[k] for k in ("id", "label", "moderator", "ticket")} == {k: sent[k] for k in
                                                                            ("id", "label", "moderator", "ticket")}
    assert dead["source"] == KEYS.feedback
    assert any("1 x feedback_no_text" in line for line in warnings(caplog))


@pytest.mark.redis_server
def test_feedback_for_an_id_without_cached_text_fails_unless_text_is_given(redis_server, redis_client, capsys):
    url = redis_server.url
    assert main(["feedback", "c-9999", "spam", "--redis", url]) == 2
    err = capsys.readouterr().err
    assert err.startswith("seawall feedback: error: feedback: no cached text for comment 'c-9999'")
    assert "--text" in err
    assert redis_client.xlen(KEYS.feedback) == 0  # nothing was sent
    assert main(["feedback", "c-9999", "spam", "--text", "Cheap ferry tickets at tickets.example", "--redis",
                 url]) == 0
    redis_client.hset(KEYS.text("c-1"), mapping={"text": "Is the ferry running on Sunday?"})
    assert main(["feedback", "c-1", "ham", "--redis", url]) == 0
    assert redis_client.xlen(KEYS.feedback) == 2
