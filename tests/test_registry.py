"""The model registry: commands, atomic promote/rollback, hot reload in workers."""
from __future__ import annotations

import json
import threading

import pytest

from kit import wait_until
from model.classifier import EmbeddingClassifier
from ops.cli import main
from ops.registry import (
    PromoteConflict,
    Registry,
    RegistryError,
    RegistryModelSource,
    decode_examples,
    encode_examples,
    split_replay,
)
from retrain_kit import KEYS, model_bytes, training_set, write_jsonl


def json_out(capsys) -> dict:
    return json.loads(capsys.readouterr().out.strip().splitlines()[-1])


def push(registry, seed: int) -> str:
    return registry.push(model_bytes(seed))


def test_examples_round_trip_and_canary_is_disjoint_and_stratified():
    rows = [(f"text {i}", i % 4 == 0) for i in range(400)]
    rows = [(t, int(y)) for t, y in rows]
    replay, canary = split_replay(rows, replay_max=100, canary_size=40, seed=3)
    assert len(replay) == 100 and len(canary) == 40
    assert {y for _, y in canary} == {0, 1}
    assert not {t for t, _ in replay} & {t for t, _ in canary}
    assert decode_examples(encode_examples(canary)) == canary


@pytest.mark.redis_server
def test_models_commands_bootstrap_list_show_pull_promote_rollback(redis_server, tmp_path, capsys):
    url = redis_server.url
    first, second = tmp_path / "a.model", tmp_path / "b.model"
    first.write_bytes(model_bytes(0))
    second.write_bytes(model_bytes(1))
    data = write_jsonl(tmp_path / "train.jsonl", [(c.text, c.label) for c in training_set()])

    assert main(["models", "push", str(first), "--replay", data, "--redis", url, "--json"]) == 0
    pushed = json_out(capsys)
    a = pushed["version"]
    assert pushed["canary"] > 0 and pushed["replay"] > 0
    assert main(["models", "promote", a, "--redis", url, "--json", "--rescore", "off"]) == 0
    first_promote = json_out(capsys)
    assert (first_promote["version"], first_promote["previous"]) == (a, None) and "rescore_job" not in first_promote

    assert main(["models", "push", str(second), "--redis", url, "--json"]) == 0
    b = json_out(capsys)["version"]
    assert main(["models", "promote", b, "--redis", url, "--json"]) == 0
    promoted = json_out(capsys)
    assert promoted["previous"] == a and promoted["rescore_mode"] == "now" and promoted["rescore"]["held"] == 0

    assert main(["models", "list", "--redis", url, "--json"]) == 0
    listing = json_out(capsys)
    assert listing["active"] == b and listing["history"] == [b, a]
    assert [v["version"] for v in listing["versions"]] == [b, a]
    assert main(["models", "list", "--redis", url]) == 0
    assert f"* {b}" in capsys.readouterr().out

    assert main(["models", "show", a, "--redis", url, "--json"]) == 0
    shown = json_out(capsys)
    assert shown["source"] == "push" and shown["active"] == "0" and int(shown["size"]) == len(model_bytes(0))

    out = tmp_path / "pulled.model"
    assert main(["models", "pull", "--out", str(out), "--redis", url]) == 0
    assert out.read_bytes() == model_bytes(1)
    assert EmbeddingClassifier.load(out).version == b

    held = redis_server.client()
    held.hset(KEYS.text("c1"), mapping={"text": "lovely allotment photos", "site": "allotments"})
    held.zadd(KEYS.held, {"c1": 1.0})
    assert main(["models", "rollback", "--redis", url, "--json", "--rescore", "now"]) == 0
    rolled = json_out(capsys)
    assert rolled["version"] == a and rolled["rescore"]["rescored"] == 1 and rolled["rescore"]["model"] == a
    registry = Registry(client=redis_server.client(), keys=KEYS)
    assert registry.active() == a and registry.history() == [a]
    events = [f[b"type"] for _i, f in redis_server.client().xrange(KEYS.events)]
    assert events == [b"promote", b"promote", b"rollback"]

    assert main(["models", "rollback", "--redis", url]) == 2
    assert "no earlier promoted version" in capsys.readouterr().err


@pytest.mark.redis_server
@pytest.mark.parametrize(
    "argv, message",
    [
        (["models", "promote", "feedfacecafe"], "no artifact for version"),
        (["models", "show", "feedfacecafe"], "no version 'feedfacecafe'"),
        (["models", "pull", "--out", "/tmp/never"], "no active model"),
    ],
    ids=["promote-unknown", "show-unknown", "pull-nothing-active"],
)
def test_models_commands_explain_user_errors(redis_server, capsys, argv, message):
    assert main(argv + ["--redis", redis_server.url]) == 2
    assert message in capsys.readouterr().err


@pytest.mark.redis_server
def test_push_refuses_a_corrupt_artifact(redis_server, tmp_path, capsys):
    bad = tmp_path / "bad.model"
    bad.write_bytes(model_bytes(0)[:-100])
    assert main(["models", "push", str(bad), "--redis", redis_server.url]) == 2
    assert "error" in capsys.readouterr().err
    assert redis_server.client().keys("seawall:models:*") == []


@pytest.mark.redis_server
def test_concurrent_promotes_leave_one_consistent_active_model(redis_client, monkeypatch):
    registry = Registry(client=redis_client, keys=KEYS)
    base, a, b = push(registry, 0), push(registry, 1), push(registry, 2)
    registry.promote(base)
    both_read = threading.Barrier(2, timeout=10)
    original = Registry._verify

    def verify_then_wait(self, client, version):
        original(self, client, version)
        both_read.wait()  # both promotes have read the active pointer before either commits

    monkeypatch.setattr(Registry, "_verify", verify_then_wait)
    results, errors = {}, {}

    def run(version):
        try:
            results[version] = Registry(client=redis_client.__class__(connection_pool=redis_client.connection_pool),
                                        keys=KEYS).promote(version)
        except PromoteConflict as exc:
            errors[version] = str(exc)

    threads = [threading.Thread(target=run, args=(v,)) for v in (a, b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=20)
    assert len(results) == 1 and len(errors) == 1
    (winner,) = results
    (loser,) = errors
    assert "another promote or rollback changed the active model" in errors[loser]
    assert f"active is now {winner}" in errors[loser]
    assert registry.active() == winner
    assert registry.history() == [winner, base]
    assert [f[b"type"] for _i, f in redis_client.xrange(KEYS.events)] == [b"promote", b"promote"]


@pytest.mark.redis_server
def test_promote_with_expect_active_refuses_a_stale_parent(redis_client):
    registry = Registry(client=redis_client, keys=KEYS)
    base, a = push(registry, 0), push(registry, 1)
    registry.promote(base)
    with pytest.raises(PromoteConflict, match="changed from feedfacecafe"):
        registry.promote(a, expect_active="feedfacecafe")
    assert registry.active() == base


@pytest.mark.redis_server
def test_model_source_hot_reloads_on_pubsub_and_refuses_a_corrupt_blob(redis_client):
    registry = Registry(client=redis_client, keys=KEYS)
    a, b, c = push(registry, 0), push(registry, 1), push(registry, 2)
    registry.promote(a)
    # An hour between polls: any reload this test sees can only come from pub/sub.
    source = RegistryModelSource(client=redis_server_client(redis_client), keys=KEYS, poll_interval_s=3600)
    assert source.current().version == a
    registry.promote(b)
    reloaded = wait_until(lambda: source.poll(), timeout=60, interval=0.02, what="the pub/sub reload of b")
    assert reloaded.version == b and source.version == b

    redis_client.set(registry.keys.model_blob(c), b"not an artifact at all")
    registry.promote(c)
    wait_until(lambda: source.poll() or c in source.refused, timeout=60, interval=0.02, what="the attempt to load c")
    assert source.refused == {c}
    assert source.version == b and source.current().version == b
    source.close()


@pytest.mark.redis_server
def test_model_source_falls_back_to_polling_without_pubsub(redis_client):
    registry = Registry(client=redis_client, keys=KEYS)
    a, b = push(registry, 0), push(registry, 1)
    registry.promote(a)
    now = [100.0]
    source = RegistryModelSource(client=redis_client, keys=KEYS, poll_interval_s=2.0, clock=lambda: now[0])
    source.current()
    source._drop_pubsub()  # as after a dropped subscription
    source._subscribe = lambda: None  # that cannot come back
    registry.promote(b)
    now[0] = 101.0
    assert source.poll() is None and source.version == a  # the pointer is not read before it is due
    now[0] = 102.5
    assert source.poll().version == b


def test_model_source_without_active_model_says_what_to_do(fake_redis):
    with pytest.raises(RegistryError, match="models push"):
        RegistryModelSource(client=fake_redis, keys=KEYS).current()


@pytest.mark.parametrize("bad", [0, -1.0, True, "2"], ids=["zero", "negative", "bool", "str"])
def test_model_source_validates_poll_interval(fake_redis, bad):
    with pytest.raises(ValueError, match="poll_interval_s"):
        RegistryModelSource(client=fake_redis, keys=KEYS, poll_interval_s=bad)


def redis_server_client(client):
    return client.__class__(connection_pool=client.connection_pool)


def test_example_sets_keep_texts_with_unicode_line_separators(tmp_path):
    from ops.registry import read_examples

    rows = [("one\u2028two\x85three\x1cfour", 1), ("plain\nnewline", 0)]
    assert decode_examples(encode_examples(rows)) == rows
    assert read_examples(write_jsonl(tmp_path / "d.jsonl", rows), operation="t") == rows


@pytest.mark.redis_server
def test_push_with_an_explicit_canary_file_keeps_all_replay_rows(redis_server, tmp_path, capsys):
    model = tmp_path / "a.model"
    model.write_bytes(model_bytes(0))
    rows = [(c.text, c.label) for c in training_set()[:400]]
    canary_rows = [(c.text, c.label) for c in training_set()[400:460]]
    data = write_jsonl(tmp_path / "train.jsonl", rows)
    canary = write_jsonl(tmp_path / "canary.jsonl", canary_rows)
    assert main(["models", "push", str(model), "--replay", data, "--canary", canary, "--redis", redis_server.url,
                 "--json"]) == 0
    assert json_out(capsys)["canary"] == 60
    registry = Registry(client=redis_server.client(), keys=KEYS)
    assert registry.canary() == canary_rows
    assert sorted(registry.replay()) == sorted(rows)
