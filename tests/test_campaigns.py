"""Near-duplicate campaigns across workers: shared LSH buckets in Redis, events, the hold policy."""
from __future__ import annotations

import fakeredis
import numpy as np
import pytest

from kit import Clock
from model.minhash import MinHasher
from worker.campaigns import CampaignPolicy, end_idle_campaigns, read_campaigns
from worker.events import parse_event
from worker.routing import Decision
from worker.settings import Keys
from worker.validation import Comment

KEYS = Keys()
NAMES = ["ana", "bo", "cyd", "dee", "eli", "fay", "gus", "hal", "ivy", "jo", "kai", "lu"]
FILLER = ("the council meeting ran long tonight and the new bridge plan was tabled again after a "
          "short debate about parking near the old market hall").split()


def campaign_text(i):
    """An invented campaign template with a changing name and link, like a real spam run."""
    return (f"hey {NAMES[i % len(NAMES)]} I made 900 dollars this week working from home with one simple trick "
            f"that banks hate see how at easycash{i}.invalid before it is gone for good")


def ordinary_text(rng):
    return " ".join(rng.choice(FILLER, size=18))


def policy_actions(p, client, batch, scores, actions):
    """What policy ``p`` does to routing's ``actions`` (decisions in and out, as the worker calls it)."""
    return [d.action for d in p.apply(client, batch, scores, [Decision(a) for a in actions])]


def policy(clock, **kwargs):
    defaults = dict(keys=KEYS, hasher=MinHasher(num_perm=64, shingle=3), bands=16, min_size=10,
                    min_authors=3, window_s=600, min_words=6, hold=True, clock=clock)
    defaults.update(kwargs)
    return CampaignPolicy(**defaults)


def comments(texts, start=0, authors=None):
    return [Comment(stream_id=f"{start + i}-0", id=f"c{start + i}", text=t, site="news.example",
                    author=(authors[i] if authors else f"user{start + i}")) for i, t in enumerate(texts)]


def events(client):
    return [parse_event(i, f) for i, f in client.xrange(KEYS.events)]


@pytest.fixture(params=["fakeredis", "redis-server"])
def shared_redis(request):
    if request.param == "fakeredis":
        return fakeredis.FakeRedis(server=fakeredis.FakeServer())
    return request.getfixturevalue("redis_client")


def test_two_workers_find_one_campaign_neither_sees_alone(shared_redis):
    """Worker A and worker B each see 8 of 16 campaign comments; only the shared buckets reach N = 10."""
    clock = Clock()
    a, b = policy(clock), policy(clock)
    rng = np.random.default_rng(0)
    held_by = {}
    for round_ in range(8):
        for name, worker in (("A", a), ("B", b)):
            i = 2 * round_ + (name == "B")
            batch = comments([campaign_text(i), ordinary_text(rng)], start=10 * i)
            clock.t += 5
            held_by[(name, i)] = policy_actions(worker, shared_redis, batch, [0.1, 0.1], ["publish", "publish"])
    starts = [e for e in events(shared_redis) if e.type == "campaign_start"]
    assert len(starts) == 1, starts
    assert starts[0].data["members"] >= 10 and starts[0].data["authors"] >= 3
    # from the trigger on, campaign comments are held; ordinary comments never are
    actions = [held_by[k] for k in sorted(held_by, key=lambda k: k[1])]
    assert all(acts[1] == "publish" for acts in actions)
    first_held = next(i for i, acts in enumerate(actions) if acts[0] == "hold")
    assert 9 <= first_held <= 13 and all(acts[0] == "hold" for acts in actions[first_held:])
    # and the two workers agree on the campaign's id through Redis
    assert list(read_campaigns(shared_redis, KEYS)) == [starts[0].data["id"]]


def test_the_same_comments_on_separate_redis_servers_make_no_campaign():
    clock = Clock()
    ra, rb = (fakeredis.FakeRedis(server=fakeredis.FakeServer()) for _ in range(2))
    a, b = policy(clock), policy(clock)
    for i in range(16):
        client, worker = (ra, a) if i % 2 == 0 else (rb, b)
        policy_actions(worker, client, comments([campaign_text(i)], start=i), [0.1], ["publish"])
    assert not [e for e in events(ra) + events(rb) if e.type == "campaign_start"]


def test_one_author_posting_many_copies_is_not_a_campaign(fake_redis):
    clock = Clock()
    p = policy(clock)
    batch = comments([campaign_text(i) for i in range(20)], authors=["user1", "user2"] * 10)
    assert policy_actions(p, fake_redis, batch, [0.1] * 20, ["publish"] * 20) == ["publish"] * 20
    assert read_campaigns(fake_redis, KEYS) == {}


def test_near_duplicates_spread_beyond_the_window_are_not_a_campaign(fake_redis):
    clock = Clock()
    p = policy(clock, window_s=60)
    for i in range(20):
        clock.t += 30  # two per window at most
        policy_actions(p, fake_redis, comments([campaign_text(i)], start=i), [0.1], ["publish"])
    assert read_campaigns(fake_redis, KEYS) == {}


def test_hold_keeps_rejects_and_can_be_turned_off(fake_redis):
    clock = Clock()
    texts = [campaign_text(i) for i in range(14)]
    actions = ["publish"] * 12 + ["reject", "hold"]
    out = policy_actions(policy(clock), fake_redis, comments(texts), [0.1] * 14, list(actions))
    assert out[-2:] == ["reject", "hold"] and out[9:12] == ["hold"] * 3 and out[:9] == ["publish"] * 9
    quiet = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    assert policy_actions(policy(clock, hold=False), quiet, comments(texts), [0.1] * 14, list(actions)) == actions
    assert len(read_campaigns(quiet, KEYS)) == 1  # still detected and announced


def test_short_comments_are_never_members(fake_redis):
    clock = Clock()
    batch = comments(["great point thanks"] * 30)
    assert policy_actions(policy(clock), fake_redis, batch, [0.1] * 30, ["publish"] * 30) == ["publish"] * 30
    assert fake_redis.keys("seawall:campaigns:*") == []


def test_idle_campaigns_end_once(fake_redis):
    clock = Clock()
    policy_actions(policy(clock), fake_redis, comments([campaign_text(i) for i in range(12)]), [0.1] * 12, ["publish"] * 12)
    (cid,) = read_campaigns(fake_redis, KEYS)
    assert end_idle_campaigns(fake_redis, KEYS, now=clock.t + 100, window_s=600) == []
    ended = end_idle_campaigns(fake_redis, KEYS, now=clock.t + 601, window_s=600)
    assert [d["id"] for d in ended] == [cid] and ended[0]["members"] >= 3
    assert end_idle_campaigns(fake_redis, KEYS, now=clock.t + 602, window_s=600) == []
    assert [e.type for e in events(fake_redis)] == ["campaign_start", "campaign_end"]
    assert read_campaigns(fake_redis, KEYS) == {}


def test_no_text_or_author_is_stored(fake_redis):
    clock = Clock()
    marker = "zqxmarkerword"
    texts = [campaign_text(i) + f" {marker}" for i in range(12)]
    policy_actions(policy(clock), fake_redis, comments(texts, authors=[f"{marker}{i}" for i in range(12)]), [0.1] * 12,
                        ["publish"] * 12)
    dump = []
    for key in fake_redis.keys("*"):
        dump.append(key)
        kind = fake_redis.type(key)
        if kind == b"zset":
            dump += [m for m, _s in fake_redis.zrange(key, 0, -1, withscores=True)]
        elif kind == b"hash":
            dump += [x for kv in fake_redis.hgetall(key).items() for x in kv]
        elif kind == b"string":
            dump.append(fake_redis.get(key))
        elif kind == b"stream":
            dump += [x for _i, f in fake_redis.xrange(key) for kv in f.items() for x in kv]
    assert dump and not any(marker.encode() in item for item in dump)


@pytest.mark.parametrize(("kwargs", "field"), [({"bands": 5}, "bands"), ({"min_size": 1}, "min_size"),
                                               ({"window_s": 0}, "window_s"), ({"hold": "yes"}, "hold")],
                         ids=["bands-not-dividing", "size-one", "no-window", "hold-string"])
def test_params_are_validated(kwargs, field):
    with pytest.raises(ValueError, match=field):
        policy(Clock(), **kwargs)


def test_a_burst_of_variants_is_one_campaign(fake_redis):
    """Variants filling different buckets in the same batch join the first campaign (one event)."""
    from ops.scenario import Scenario

    scenario = Scenario()
    wave = [c for c in scenario.stream() if c.kind == "wave"][:120]
    clock = Clock(wave[-1].ts)
    out = policy_actions(policy(clock), fake_redis, wave, [0.1] * len(wave), ["publish"] * len(wave))
    starts = [e for e in events(fake_redis) if e.type == "campaign_start"]
    assert len(starts) == 1, [e.data for e in starts]
    assert out.count("hold") >= 100


def test_comments_with_no_near_duplicate_cost_no_bucket_of_their_own(shared_redis):
    """The usual comment only joins the current slot's set of first sightings: no per-band key."""
    rng = np.random.default_rng(3)
    vocab = [f"word{i}" for i in range(3000)]
    texts = [" ".join(rng.choice(vocab, size=30)) for _ in range(200)]
    policy_actions(policy(Clock()), shared_redis, comments(texts), [0.1] * 200, ["publish"] * 200)
    keys = sorted(k.decode() for k in shared_redis.keys("seawall:campaigns:*"))
    assert len(keys) == 1 and keys[0].startswith("seawall:campaigns:seen:"), keys
    assert shared_redis.scard(keys[0]) == 200 * 16
    assert 0 < shared_redis.ttl(keys[0]) <= 600 + 1  # until the end of the next half-window slot, plus 1 s


def test_near_duplicates_either_side_of_a_slot_boundary_all_count(fake_redis):
    """First sightings live in half-window slots; the previous slot is read too, so none is missed.

    Ten variants 40 s apart, the first 100 s before a slot ends: the tenth makes the campaign
    (as when all ten come in one batch) only if the ones after the boundary still find the
    earlier ones.
    """
    clock = Clock(1_800_000_000.0 - 1_800_000_000.0 % 300 + 200)
    p = policy(clock)
    out = []
    for i in range(10):
        out += policy_actions(p, fake_redis, comments([campaign_text(i)], start=i), [0.1], ["publish"])
        clock.t += 40
    assert out == ["publish"] * 9 + ["hold"]
    assert len(read_campaigns(fake_redis, KEYS)) == 1


def test_members_a_worker_knows_skip_most_bucket_writes_and_are_still_held_and_counted():
    """Once a worker has seen a bucket linked to a campaign, its later members skip most bucket writes.

    The same comments go to two Redis servers in the same state; on one, the worker that saw the
    campaign start goes on, on the other a worker that has learnt nothing.  Both hold and count
    every later member; the first writes far less to the buckets.
    """
    first = [campaign_text(i) for i in range(14)]
    later = [campaign_text(i) for i in range(14, 38)]
    growth, sizes = {}, {}
    for kind in ("learnt", "fresh"):
        clock = Clock()
        r = fakeredis.FakeRedis(server=fakeredis.FakeServer())
        p = policy(clock)
        policy_actions(p, r, comments(first), [0.1] * 14, ["publish"] * 14)
        (cid,) = read_campaigns(r, KEYS)
        size0 = read_campaigns(r, KEYS)[cid]["members"]
        total0 = sum(int(r.hget(k, "n") or 0) for k in r.keys("seawall:campaigns:lsh:*"))
        if kind == "fresh":
            p = policy(clock)
        clock.t += 5
        assert policy_actions(p, r, comments(later, start=100), [0.1] * 24, ["publish"] * 24) == ["hold"] * 24
        growth[kind] = sum(int(r.hget(k, "n") or 0) for k in r.keys("seawall:campaigns:lsh:*")) - total0
        sizes[kind] = read_campaigns(r, KEYS)[cid]["members"] - size0
    assert sizes == {"learnt": 24, "fresh": 24}
    assert growth["learnt"] < growth["fresh"] / 2, growth
