"""After promote, rollback and retrain, the held comments are re-scored even with no RQ worker,
and the command says which way it went and how many comments it re-scored."""
from __future__ import annotations

import json

import pytest
from rq import Queue

from ops.cli import main
from retrain_kit import KEYS, bootstrap, model_bytes, send_feedback, stream

pytestmark = pytest.mark.redis_server


def hold(client, comments) -> None:
    """Comments the worker held: cached text and a place in the hold queue."""
    for c in comments:
        client.hset(KEYS.text(c.id), mapping={"text": c.text, "site": c.site, "stream_id": "1-0", "action": "hold"})
        client.zadd(KEYS.held, {c.id: 1.0})


def rescored_ids(client) -> set[str]:
    return {f[b"id"].decode() for _i, f in client.xrange(KEYS.verdicts) if f.get(b"rescored") == b"1"}


def test_promote_rescores_here_by_default_and_says_how_many(redis_server, redis_client, capsys):
    r = redis_client
    registry, _first = bootstrap(r)
    second = registry.push(model_bytes(1))
    held = list(stream()[:40])
    hold(r, held)
    r.zadd(KEYS.held, {"expired": 1.0})  # its cached text is gone: it waits for a moderator

    assert main(["models", "promote", second, "--redis", redis_server.url]) == 0
    line = capsys.readouterr().out.strip()
    still = r.zcard(KEYS.held)
    released = 41 - still
    assert line.startswith(f"models promote: {second} is active (was {_first}); hold ")  # then its thresholds
    assert line.endswith(f"; re-scored 40 held comments: {released} published or rejected by the new model, "
                         f"{still - 1} still held, 1 without cached text left for a moderator")
    assert rescored_ids(r) == {c.id for c in held}


def test_queue_without_a_listening_rq_worker_rescores_here_and_says_so(redis_server, redis_client, capsys):
    r = redis_client
    registry, first = bootstrap(r)
    second = registry.push(model_bytes(1))
    hold(r, stream()[:10])

    assert main(["models", "promote", second, "--redis", redis_server.url, "--rescore", "queue", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["rescore_mode"] == "now" and out["rq_workers"] == 0 and out["rescore"]["rescored"] == 10
    assert Queue("seawall", connection=r).count == 0  # no job left waiting for a worker that does not exist

    assert main(["models", "rollback", "--redis", redis_server.url, "--rescore", "queue"]) == 0
    line = capsys.readouterr().out.strip()
    assert line.startswith(f"models rollback: {first} is active (was {second}); hold ")
    assert "; no RQ worker listens on queue 'seawall', so the re-score ran here: " in line
    assert main(["models", "promote", second, "--redis", redis_server.url, "--rescore", "off"]) == 0
    assert capsys.readouterr().out.strip().endswith("held comments not re-scored (--rescore off)")


def test_retrain_says_how_many_held_comments_the_promoted_model_rescored(redis_server, redis_client, capsys):
    r = redis_client
    bootstrap(r)
    comments = stream()
    send_feedback(r, comments[:2500])
    hold(r, comments[2500:2530])

    assert main(["retrain", "--redis", redis_server.url]) == 0
    out = capsys.readouterr().out
    assert out.startswith("retrain: promoted ")
    assert "  re-scored 30 held comments: " in out
    assert len(rescored_ids(r)) == 30
