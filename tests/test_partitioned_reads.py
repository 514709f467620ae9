"""Everything that reads or writes across partitions, at K = 4, with every script and transaction slot-checked.

fakeredis does not enforce Redis Cluster hash slots; :class:`slotcheck.SlotChecked` does: each EVAL/EVALSHA and
each MULTI/EXEC (with its WATCHed keys) must stay in one slot (``redis.crc.key_slot``, the function redis-py's
cluster client routes with).  The hold queue, decisions, feedback, labels import, re-score, the registry, waves,
watch, the console overview and the retrain report run here with comments spread over four partitions.
"""
from __future__ import annotations

import json
from collections import Counter

import pytest

from console_kit import NOW, hold
from slotcheck import CrossSlotError, SlotChecked
from worker import decisions
from worker.feedback import FeedbackConsumer
from worker.holdqueue import held_count, merge_pages, newest_held_at, read_held, read_held_by_id
from worker.labels import scan_labels
from worker.settings import FeedbackSettings, Keys

K4 = Keys(partitions=4)
N = 24  # held comments c0..c23; ids spread over all four partitions


@pytest.fixture
def checked(fake_redis):
    return SlotChecked(fake_redis)


def stream(client, key) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _sid, f in client.xrange(key)]


def test_ids_used_here_cover_every_partition():
    assert {K4.partition_of(f"c{i}") for i in range(N)} == {0, 1, 2, 3}


# -- the checker itself ------------------------------------------------------------------------

def test_the_checker_refuses_a_script_or_transaction_over_two_partitions(checked):
    a, b = K4.part(0).held, K4.part(1).held
    with pytest.raises(CrossSlotError, match="EVAL spans 2 hash slots"):
        checked.eval("return 1", 2, a, b)
    pipe = checked.pipeline(transaction=True)
    pipe.zadd(a, {"x": 1})
    pipe.zadd(b, {"x": 1})
    with pytest.raises(CrossSlotError, match="MULTI/EXEC spans 2 hash slots"):
        pipe.execute()
    with pytest.raises(CrossSlotError):
        checked.eval("return 1", 2, K4.feedback, K4.part(2).text("c1"))
    loose = checked.pipeline(transaction=False)  # a plain pipeline may span slots: a cluster client splits it
    loose.zadd(a, {"x": 1})
    loose.zadd(b, {"x": 1})
    assert loose.execute() == [1, 1]
    checked.eval("return 1", 2, K4.feedback, K4.models_active)  # the shared keys share one slot


# -- the hold queue -------------------------------------------------------------------------------

@pytest.mark.parametrize("newest_first", [True, False], ids=["newest-first", "oldest-first"])
def test_pages_of_the_merged_queue_are_those_of_one_sorted_set(checked, newest_first):
    ids = hold(checked, N, keys=K4)
    checked.zadd(K4.part_of("c5").held, {"c5": NOW - 1000 + 7})  # a tie on the hold time, broken by id
    single = Keys(prefix="one:")
    hold(checked, N, keys=single)
    checked.zadd(single.held, {"c5": NOW - 1000 + 7})
    everything = [c.id for c in read_held(checked, single, limit=N, newest_first=newest_first)]
    assert sorted(everything) == sorted(ids)
    for offset, limit in ((0, 5), (5, 5), (20, 10), (0, N), (23, 1), (30, 5)):
        page = read_held(checked, K4, limit=limit, offset=offset, newest_first=newest_first)
        assert [c.id for c in page] == everything[offset:offset + limit]
    assert held_count(checked, K4) == N and newest_held_at(checked, K4) == NOW - 1000 + N - 1
    assert [c.id for c in read_held_by_id(checked, K4, ["c3", "gone", "c17"])] == ["c3", "c17"]


def test_merge_pages_is_pure_and_keeps_ties_in_member_order():
    pages = [[(b"b", 1.0), (b"a", 1.0)], [(b"c", 1.0)], []]
    assert merge_pages(pages, offset=0, limit=3, newest_first=True) == [(b"c", 1.0), (b"b", 1.0), (b"a", 1.0)]
    ascending = [[(b"a", 1.0), (b"b", 1.0)], [(b"c", 1.0)]]
    assert merge_pages(ascending, offset=1, limit=5, newest_first=False) == [(b"b", 1.0), (b"c", 1.0)]


# -- decisions --------------------------------------------------------------------------------------

def test_claim_undo_finalize_across_partitions_write_each_label_once(checked):
    hold(checked, N, keys=K4)
    first = decisions.claim(checked, K4, [f"c{i}" for i in range(12)], action="reject", moderator="mod-ana",
                            now=NOW, undo_s=5)
    second = decisions.claim(checked, K4, [f"c{i}" for i in range(8, 16)], action="publish", moderator="mod-bo",
                             now=NOW, undo_s=5)
    assert first.decided == [f"c{i}" for i in range(12)]
    assert second.decided == [f"c{i}" for i in range(12, 16)] and second.gone == [f"c{i}" for i in range(8, 12)]
    assert held_count(checked, K4) == N - 16 and decisions.pending_count(checked, K4) == 16
    assert decisions.undo(checked, K4, first.token, ["c0", "c1"], moderator="mod-ana", now=NOW + 1) == ["c0", "c1"]
    assert decisions.finalize_due(checked, K4, now=NOW + 4) == 0
    assert decisions.finalize_due(checked, K4, now=NOW + 5) == 14
    assert decisions.finalize_due(checked, K4, now=NOW + 500) == 0
    labels = Counter(f["id"] for f in stream(checked, K4.feedback))
    assert set(labels) == {f"c{i}" for i in range(2, 16)} and set(labels.values()) == {1}
    by_id = {e["id"]: e for e in stream(checked, K4.decisions)}
    assert by_id["c3"]["moderator"] == "mod-ana" and by_id["c13"]["decision"] == "publish"
    assert by_id["c13"]["site"] == "plots.example" and by_id["c13"]["held_at"] == str(int(NOW - 1000 + 13))
    assert held_count(checked, K4) == N - 14 and decisions.pending_count(checked, K4) == 0
    assert [a["event"] for a in stream(checked, K4.audit)].count("undo") == 2
    multi = checked.scripts_and_transactions()
    assert any(K4.part(3).held in map(str, keys) for _kind, keys in multi)  # the partitions' scripts were seen
    assert any(K4.feedback in map(str, keys) for _kind, keys in multi)       # and the shared write


def test_a_finalizer_that_dies_midway_leaves_the_decision_to_another_and_nothing_twice(checked):
    hold(checked, 2, keys=K4)
    done = decisions.claim(checked, K4, ["c0", "c1"], action="reject", moderator="mod-ana", now=NOW, undo_s=0)
    # a finalizer takes c0 and dies before writing it
    part = K4.part_of("c0")
    taken = checked.eval(decisions._TAKE, 2, part.deciding, part.decision("c0"), f"{NOW:.3f}",
                         f"{NOW + decisions.FINALIZE_RETRY_S:.3f}", 1, "c0")
    assert taken[0]
    assert decisions.undo(checked, K4, done.token, ["c0"], moderator="mod-ana", now=NOW) == []  # being written
    assert decisions.finalize_due(checked, K4, now=NOW) == 1  # c1 only: c0 waits for its retry time
    # another finalizer wrote c0's label but died before releasing it
    parked = {k.decode(): v.decode() for k, v in checked.hgetall(part.decision("c0")).items()}
    decisions._write_once(checked, K4, [parked], decisions_maxlen=1000)
    assert decisions.finalize_due(checked, K4, now=NOW + decisions.FINALIZE_RETRY_S) == 0  # marker: not again
    assert decisions.pending_count(checked, K4) == 0 and checked.exists(part.decision("c0")) == 0
    assert sorted(f["id"] for f in stream(checked, K4.feedback)) == ["c0", "c1"]
    assert sorted(e["id"] for e in stream(checked, K4.decisions)) == ["c0", "c1"]


def test_label_now_in_any_partition(checked):
    ids = hold(checked, 8, keys=K4)
    for cid in ids:
        assert decisions.label_now(checked, K4, cid, "spam", moderator="mod-kit", now=NOW)["decided"] is True
    again = decisions.label_now(checked, K4, "c3", "ham", text="changed my mind", now=NOW)
    assert again["decided"] is False and again["feedback_id"]
    assert held_count(checked, K4) == 0 and len(stream(checked, K4.decisions)) == 8
    assert stream(checked, K4.feedback)[-1] == {"id": "c3", "label": "ham", "text": "changed my mind"}


# -- feedback and labels ----------------------------------------------------------------------------

def test_feedback_consumer_labels_and_releases_comments_in_every_partition(checked):
    ids = hold(checked, 8, keys=K4)
    for cid in ids:
        checked.xadd(K4.feedback, {"id": cid, "label": "spam", "moderator": "mod-ana"})
    checked.xadd(K4.feedback, {"id": "never-seen", "label": "ham"})          # no text anywhere
    checked.xadd(K4.feedback, {"label": "ham"})                              # no id
    consumer = FeedbackConsumer(client=checked, keys=K4, settings=FeedbackSettings(), clock=lambda: NOW)
    assert consumer.drain() == 10
    assert held_count(checked, K4) == 0
    assert sorted(r.id for _sid, r in scan_labels(checked, K4)) == sorted(ids)
    reasons = sorted(f["reason"] for f in stream(checked, K4.feedback_deadletter))
    assert reasons == ["feedback_missing_id", "feedback_no_text"]
    assert all(checked.xlen(p.deadletter) == 0 for p in K4.parts)  # the comments' dead letters stay theirs
    assert [k for k, keys in checked.scripts_and_transactions() if k == "multi"]


def test_labels_import_releases_held_comments_in_their_partitions(checked, tmp_path, monkeypatch):
    from ops.commands import labels as labels_command

    ids = hold(checked, 6, keys=K4)
    path = tmp_path / "labels.jsonl"
    path.write_text("".join(json.dumps({"id": cid, "text": f"text of {cid}", "label": "ham"}) + "\n" for cid in ids))
    monkeypatch.setattr(labels_command, "connect", lambda config: checked, raising=False)
    from ops.config import load_config

    monkeypatch.setattr(labels_command, "config_from_args",
                        lambda args: load_config({"keys.partitions": 4}, environ={}))

    class Args:
        file, json = str(path), True

    assert labels_command.run_import(Args) == 0
    assert held_count(checked, K4) == 0 and checked.xlen(K4.labels) == 6


# -- re-score, registry, retrain report ----------------------------------------------------------------

def test_rescore_walks_every_partition_and_writes_verdicts_where_the_comment_lives(checked):
    from ops.registry import load_model
    from ops.rescore import rescore_held
    from worker_models import tiny_model

    path, _version = tiny_model(1)
    model = load_model(path.read_bytes())
    ids = hold(checked, N, keys=K4)
    checked.hdel(K4.text("c4"), "text")  # an expired cache stays held for a moderator
    counts = rescore_held(checked, K4, model, batch=5)
    assert counts["held"] == N and counts["rescored"] == N - 1 and counts["no_text"] == 1
    assert counts["released"] + counts["still_held"] == N - 1
    assert held_count(checked, K4) == N - counts["released"]
    for cid in ids:
        if cid != "c4":
            (verdict,) = [f for f in stream(checked, K4.part_of(cid).verdicts) if f["id"] == cid]
            assert verdict["rescored"] == "1"
    assert any(k == "eval" and len(keys) > 2 for k, keys in checked.checked)


def test_registry_push_promote_rollback_and_the_retrain_report_stay_in_one_slot(checked):
    from ops.registry import Registry
    from ops.retrain import last_reports, store_report
    from retrain_kit import model_bytes

    registry = Registry(client=checked, keys=K4, clock=lambda: NOW)
    first = registry.push(model_bytes(0))
    second = registry.push(model_bytes(1))
    registry.promote(first, actor="t")
    registry.promote(second, actor="t")
    registry.rollback(actor="t")
    assert registry.active() == first and K4.models_active == "seawall:{shared}:models:active"
    assert [e["type"] for e in _events(checked)] == ["promote", "promote", "rollback"]
    store_report(checked, K4, {"decision": "kept"}, kept=5, clock=lambda: NOW)
    assert last_reports(checked, K4)[0]["decision"] == "kept"
    assert sum(1 for k, _ in checked.scripts_and_transactions() if k == "multi") >= 5


def _events(client):
    from worker.events import read_events

    return [{"type": e.type} for e in read_events(client, K4.events, count=50)]


# -- waves, watch, the overview ----------------------------------------------------------------------

def _count(client, minute: int, per_partition: list[tuple[int, int]], site: str = "plots.example") -> None:
    for part, (total, held) in zip(K4.parts, per_partition):
        client.hset(part.rates(minute), mapping={f"{site}:total": total, f"{site}:hold": held})


def test_watch_and_overview_sum_the_partitions(checked):
    from ops.console.overview import collect_overview
    from ops.watchview import collect

    minute = int(NOW // 60)
    _count(checked, minute, [(10, 1), (20, 2), (30, 3), (40, 4)])
    snap = collect(checked, K4, now=NOW, minutes=3)
    (row,) = snap.sites
    assert row.totals[-1] == 100 and row.flagged[-1] == 10
    for part, n in zip(K4.parts, (1, 2, 0, 3)):
        for i in range(n):
            checked.xadd(part.deadletter, {"reason": "text_too_large" if i else "missing_text"})
        checked.xgroup_create(part.comments, K4.group, id="0", mkstream=True)
        checked.xadd(part.comments, {"id": f"x{part.index}", "text": "t"})
    checked.xadd(K4.feedback_deadletter, {"reason": "feedback_no_text"})
    hold(checked, 5, keys=K4)
    overview = collect_overview(checked, K4, now=NOW)
    reasons = {r["reason"]: r["count"] for r in overview["deadletters"]["reasons"]}
    assert reasons == {"missing_text": 3, "text_too_large": 3, "feedback_no_text": 1}
    assert overview["held"] == 5
    (workers,) = [g for g in overview["groups"] if g["group"] == K4.group]
    assert workers["lag"] == 4 and "4 partitions" in workers["stream"]
    assert snap.lag is None and collect(checked, K4, now=NOW).lag == 4


def test_the_wave_detector_reads_every_partition(checked):
    from ops.cusum import WaveParams
    from ops.waves import WaveDetector

    clock = {"now": NOW}
    detector = WaveDetector(client=checked, keys=K4, params=WaveParams(), sites=("plots.example",),
                            clock=lambda: clock["now"])
    start = int(NOW // 60)
    for m in range(start - 40, start + 30):
        flagged = 2 if m < start else 40  # 2% flagged, then 40%, spread unevenly over the partitions
        _count(checked, m, [(10, 0), (20, flagged // 4), (30, flagged // 4), (40, flagged - 2 * (flagged // 4))])
    events = []
    for step in range(0, 31):
        clock["now"] = NOW + step * 60
        events += detector.tick()
    assert [e["type"] for e in events][:1] == ["wave_start"]
    assert (events[0]["data"]["comments"], events[0]["data"]["rate"]) == (100, 0.4)  # the sum of the partitions
    assert checked.hlen(K4.shared("waves", "active")) == 1


def test_a_queued_rescore_on_a_cluster_without_an_rq_redis_runs_here_and_says_why(checked):
    from ops.config import load_config
    from ops.registry import Registry
    from ops.rescore import describe_rescore, rescore_after_switch
    from retrain_kit import model_bytes

    config = load_config({"redis.cluster": True, "keys.partitions": 4}, environ={})
    version = Registry(client=checked, keys=K4, clock=lambda: NOW).push(model_bytes(0))
    hold(checked, 8, keys=K4)
    result = rescore_after_switch("queue", checked, config, version)
    assert result["rescore_mode"] == "now" and result["rq_unavailable"] == "cluster"
    assert result["rescore"]["rescored"] == 8
    assert describe_rescore(result, queue="seawall").startswith(
        "RQ cannot keep jobs on a Redis Cluster and [redis] rq_url is not set, so the re-score ran here: re-scored 8")


def test_accounts_and_the_registry_sets_stay_in_one_slot(checked):
    from ops.console.accounts import Accounts
    from ops.registry import Registry

    accounts = Accounts(client=checked, keys=K4, cost=1024, attempts=3)
    accounts.add("mod-ana", "a long enough password", role="moderator", now=NOW)
    accounts.set_role("mod-ana", "admin")                                     # WATCH/MULTI on the accounts
    assert accounts.authenticate("mod-ana", "not the password") is None      # the failures counter's MULTI
    assert accounts.authenticate("mod-ana", "a long enough password").role == "admin"
    Registry(client=checked, keys=K4).set_examples(replay=[("a reply", 0)], canary=[("cheap pills", 1)])
    assert Registry(client=checked, keys=K4).canary() == [("cheap pills", 1)]
    multi = [keys for kind, keys in checked.checked if kind == "multi"]
    assert any(K4.accounts in map(str, k) for k in multi)
    assert any(K4.models_canary in map(str, k) for k in multi)


# -- moving to partitions ---------------------------------------------------------------------------

def test_moving_from_one_partition_to_four_takes_the_registry_labels_and_decisions_along(fake_redis):
    from ops.registry import Registry
    from ops.repartition import move_partition_state
    from ops.retrain import last_reports, store_report
    from retrain_kit import model_bytes

    one = Keys()
    registry = Registry(client=fake_redis, keys=one, clock=lambda: NOW)
    version = registry.push(model_bytes(0))
    registry.promote(version, actor="t")
    registry.set_examples(canary=[("cheap pills", 1)])
    store_report(fake_redis, one, {"decision": "kept"}, kept=5, clock=lambda: NOW)
    hold(fake_redis, 6)
    fake_redis.xgroup_create(one.feedback, "labellers", id="0", mkstream=True)
    decisions.label_now(fake_redis, one, "c0", "spam", moderator="mod-ana", now=NOW)
    claimed = decisions.claim(fake_redis, one, ["c1", "c2"], action="publish", moderator="mod-bo", now=NOW,
                              undo_s=60)
    assert claimed.decided == ["c1", "c2"]

    dry = move_partition_state(fake_redis, one, K4, dry_run=True)
    assert dry.pending == 2 and dry.shared >= 10 and Registry(client=fake_redis, keys=K4).active() is None
    report = move_partition_state(fake_redis, one, K4)
    assert (report.pending, report.shared, report.kept) == (2, dry.shared, 0)
    moved = Registry(client=fake_redis, keys=K4)
    assert moved.active() == version and moved.load().version == version and moved.canary() == [("cheap pills", 1)]
    assert last_reports(fake_redis, K4)[0]["decision"] == "kept"
    assert [g["name"] for g in fake_redis.xinfo_groups(K4.feedback)] == [b"labellers"]  # the group came along
    assert [e["id"] for e in stream(fake_redis, K4.decisions)] == ["c0"]
    assert held_count(fake_redis, K4) == 3 and decisions.pending_count(fake_redis, K4) == 2
    assert decisions.undo(fake_redis, K4, claimed.token, ["c1"], moderator="mod-bo", now=NOW + 1) == ["c1"]
    assert decisions.finalize_due(fake_redis, K4, now=NOW + 60) == 1
    assert [e["id"] for e in stream(fake_redis, K4.decisions)] == ["c0", "c2"]
    assert not fake_redis.exists(one.models_active, one.feedback, one.decisions)

    back = move_partition_state(fake_redis, K4, one)  # and back again
    assert back.shared == report.shared and Registry(client=fake_redis, keys=one).active() == version


def test_every_module_with_a_script_or_transaction_is_in_the_slot_table():
    """DEVELOPERS.md lists the slot of every atomic operation; a module that gains one must be listed there."""
    import re
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    table = (root / "DEVELOPERS.md").read_text(encoding="utf-8").split("## Redis Cluster: the slot", 1)[1]
    atomic = re.compile(r"register_script\(|\.eval\(|transaction=True")
    modules = sorted(str(p.relative_to(root)) for folder in ("ops", "worker") for p in (root / folder).rglob("*.py")
                     if atomic.search(p.read_text(encoding="utf-8")))
    assert "worker/decisions.py" in modules  # the scan finds them
    missing = [m for m in modules if m not in table]
    assert missing == []
