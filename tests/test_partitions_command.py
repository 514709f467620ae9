"""`seawall partitions`: what a producer in another language needs, printed from the configuration."""
from __future__ import annotations

import json

import pytest

from ops.cli import main
from worker.partitions import SLOTS, key_slot, partition_of


def run_json(capsys, monkeypatch, *argv, env=None) -> list[dict]:
    for name in ("SEAWALL_KEYS_PARTITIONS", "SEAWALL_KEYS_PREFIX", "SEAWALL_CONFIG"):
        monkeypatch.delenv(name, raising=False)
    for name, value in (env or {}).items():
        monkeypatch.setenv(name, value)
    assert main(["partitions", "--json", *argv]) == 0
    return [json.loads(line) for line in capsys.readouterr().out.splitlines()]


@pytest.mark.parametrize("k", [1, 3, 8])
def test_every_partition_with_its_tag_slot_and_stream(capsys, monkeypatch, k):
    rows = run_json(capsys, monkeypatch, "--partitions", str(k))
    assert [r["partition"] for r in rows] == list(range(k))
    assert rows[0]["slots"][0] == 0 and rows[-1]["slots"][1] == SLOTS - 1
    for r in rows:
        assert r["slot"] == key_slot(r["stream"])
        if k > 1:
            assert r["stream"] == f"seawall:{{{r['tag']}}}:comments"
            assert r["slots"][0] <= r["slot"] <= r["slots"][1]
    if k == 1:
        assert rows[0]["stream"] == "seawall:comments"


def test_the_configured_k_and_prefix_are_the_default(capsys, monkeypatch):
    rows = run_json(capsys, monkeypatch, env={"SEAWALL_KEYS_PARTITIONS": "5", "SEAWALL_KEYS_PREFIX": "forum:"})
    assert len(rows) == 5 and all(r["stream"].startswith("forum:{p") for r in rows)


def test_an_id_prints_its_partition_and_stream(capsys, monkeypatch):
    rows = run_json(capsys, monkeypatch, "--partitions", "6", "--id", "c-1", "--id", "comment-99")
    assert [(r["id"], r["partition"]) for r in rows] == [("c-1", partition_of("c-1", 6)),
                                                         ("comment-99", partition_of("comment-99", 6))]
    table = run_json(capsys, monkeypatch, "--partitions", "6")
    assert all(r["stream"] == table[r["partition"]]["stream"] for r in rows)


def test_the_table_names_the_formula(capsys, monkeypatch):
    monkeypatch.delenv("SEAWALL_KEYS_PARTITIONS", raising=False)
    assert main(["partitions", "--partitions", "2"]) == 0
    out = capsys.readouterr().out
    assert "murmur3_32(id, seed 0) mod 2" in out and "seawall:{p0.1}:comments" in out


def test_a_bad_k_is_an_error_with_the_setting_named(capsys, monkeypatch):
    monkeypatch.delenv("SEAWALL_KEYS_PARTITIONS", raising=False)
    assert main(["partitions", "--partitions", "0"]) != 0
    assert "partitions" in capsys.readouterr().err


def _judge(client, keys, ids, action="hold"):
    """Commit verdicts for ``ids`` the way a worker of ``keys``' layout does (no stream: done markers decide)."""
    from worker.commit import BatchCommitter, Limits, Scored
    from worker.settings import WorkerSettings
    from worker.validation import Comment

    committer = BatchCommitter(keys=keys, limits=Limits.from_settings(WorkerSettings()), acknowledges=False,
                               source="test")
    scored = [Scored(Comment(stream_id=f"{1000 + i}-0", id=cid, text=f"text of {cid}", site="a.example"), "0.7",
                     action, "[]") for i, cid in enumerate(ids)]
    return committer.commit(client, scored, [], model="m1", now=1_800_000_000.0, consumer="", partition=None)


def test_moving_from_one_to_four_partitions_keeps_held_comments_texts_and_markers(fake_redis):
    from ops.repartition import move_partition_state
    from worker.settings import Keys

    old, new = Keys(), Keys(partitions=4)
    ids = [f"c{i}" for i in range(20)]
    _judge(fake_redis, old, ids)
    fake_redis.expire(old.text("c3"), 500)
    dry = move_partition_state(fake_redis, old, new, dry_run=True)
    # the markers live in the text caches (a done:{id} key only when done_ttl_s outlasts the cache)
    assert (dry.held, dry.text, dry.done) == (20, 20, 0) and fake_redis.zcard(old.held) == 20
    report = move_partition_state(fake_redis, old, new)
    assert (report.held, report.text, report.done, report.kept) == (20, 20, 0, 0)
    assert not fake_redis.exists(old.held) and not fake_redis.keys("seawall:text:*")
    for cid in ids:
        part = new.part_of(cid)
        assert fake_redis.zscore(part.held, cid) == 1_800_000_000.0
        assert fake_redis.hget(part.text(cid), "text") == f"text of {cid}".encode()
    assert 0 < fake_redis.ttl(new.text("c3")) <= 500
    # The markers moved with them: the same comments judged again in the new layout get no second verdict.
    assert _judge(fake_redis, new, ids) == [0] * 20


def test_moving_refuses_while_the_old_stream_has_entries_in_flight(fake_redis):
    from ops.repartition import move_partition_state
    from worker.settings import Keys

    old = Keys()
    fake_redis.xadd(old.comments, {"id": "c1", "text": "hi"})
    fake_redis.xgroup_create(old.comments, old.group, id="0")
    fake_redis.xreadgroup(old.group, "w", {old.comments: ">"})  # read, never acknowledged
    _judge(fake_redis, old, ["c2"])
    report = move_partition_state(fake_redis, old, Keys(partitions=2))
    assert report.undrained == {old.comments: (0, 1)} and report.held == 0
    assert fake_redis.zcard(old.held) == 1  # nothing moved


def test_the_table_names_the_feedback_stream_producers_write_labels_to(capsys, monkeypatch):
    """With K > 1 the feedback stream carries the shared hash tag: a producer of labels must see its name."""
    monkeypatch.delenv("SEAWALL_KEYS_PARTITIONS", raising=False)
    assert main(["partitions", "--partitions", "4"]) == 0
    assert capsys.readouterr().out.splitlines()[-1].endswith(" seawall:{shared}:feedback")
    assert main(["partitions"]) == 0
    assert capsys.readouterr().out.splitlines()[-1].endswith(" seawall:feedback")
