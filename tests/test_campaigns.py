"""Campaigns across workers: shared buckets in Redis, the baseline, the second signal, spelling tricks, events."""
from __future__ import annotations

import json

import fakeredis
import numpy as np
import pytest

from kit import Clock
from model.minhash import MinHasher
from worker.campaigns import CampaignPolicy
from worker.campaignstore import CampaignKeys, RedisCampaignStore, end_idle_campaigns, read_campaigns
from worker.events import parse_event
from worker.redistransport import RedisState
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


def policy_actions(p, client, batch, scores, actions, keys=KEYS):
    """What policy ``p`` does to routing's ``actions`` (decisions in and out, as the worker calls it)."""
    return [d.action for d in p.apply(RedisState(client, keys), batch, scores, [Decision(a) for a in actions])]


def store(client, keys=KEYS):
    return RedisCampaignStore(client, keys)


def policy(clock, **kwargs):
    """The default policy, except no warm-up: every author is new to a site the test has just opened."""
    defaults = dict(hasher=MinHasher(num_perm=32, shingle=3), bands=16, min_size=10,
                    min_authors=3, window_s=600, min_words=6, hold=True, warmup_s=0, clock=clock)
    defaults.update(kwargs)
    return CampaignPolicy(**defaults)


def comments(texts, start=0, authors=None):
    return [Comment(stream_id=f"{start + i}-0", id=f"c{start + i}", text=t, site="news.example",
                    author=(authors[i] if authors else f"user{start + i}")) for i, t in enumerate(texts)]


def key_names(client, pattern: str) -> list[str]:
    """Names matching ``pattern`` on every primary (a cluster client sends KEYS to one node unless told)."""
    from redis.cluster import RedisCluster

    if isinstance(client, RedisCluster):
        found = client.keys(pattern, target_nodes=RedisCluster.PRIMARIES)
    else:
        found = client.keys(pattern)
    return sorted({k.decode() if isinstance(k, bytes) else k for k in found})


def events(client):
    return [parse_event(i, f) for i, f in client.xrange(KEYS.events)]


@pytest.fixture(params=["fakeredis", "redis-server", "redis-cluster"])
def shared_redis(request):
    """The campaign state's store: fakeredis, a real redis-server, and a real Redis Cluster of three
    primaries through redis-py's cluster client (the band keys spread over slots there, and a script call
    whose keys spanned two slots would fail with CROSSSLOT)."""
    if request.param == "fakeredis":
        return fakeredis.FakeRedis(server=fakeredis.FakeServer())
    if request.param == "redis-cluster":
        client = request.getfixturevalue("shared_cluster").client()
        request.addfinalizer(client.close)
        return client
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
    """A batch is judged on its buckets as they stand after it: the first nine near-duplicates of a batch
    that makes a campaign are its members too."""
    clock = Clock()
    texts = [campaign_text(i) for i in range(14)]
    actions = ["publish"] * 12 + ["reject", "hold"]
    out = policy_actions(policy(clock), fake_redis, comments(texts), [0.1] * 14, list(actions))
    assert out[:12] == ["hold"] * 12 and out[-2:] == ["reject", "hold"]
    quiet = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    assert policy_actions(policy(clock, hold=False), quiet, comments(texts), [0.1] * 14, list(actions)) == actions
    assert len(read_campaigns(quiet, KEYS)) == 1  # still detected and announced


def test_short_comments_are_never_members(fake_redis):
    clock = Clock()
    batch = comments(["great point thanks"] * 30)
    p = policy(clock)
    assert policy_actions(p, fake_redis, batch, [0.1] * 30, ["publish"] * 30) == ["publish"] * 30
    # no band state; their authors are recorded (a regular who only ever says thanks is still a regular)
    assert not fake_redis.keys(f"seawall:campaigns:{{{p.tag}:*")
    assert fake_redis.keys("seawall:campaigns:{authors}:*")


def test_idle_campaigns_end_once(fake_redis):
    clock = Clock()
    policy_actions(policy(clock), fake_redis, comments([campaign_text(i) for i in range(12)]), [0.1] * 12,
                   ["publish"] * 12)
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
    policy_actions(policy(clock), fake_redis, comments(texts, authors=[f"{marker}{i}" for i in range(12)]),
                   [0.1] * 12, ["publish"] * 12)
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
                                               ({"window_s": 0}, "window_s"), ({"hold": "yes"}, "hold"),
                                               ({"signals": "sometimes"}, "signals"),
                                               ({"burst_ratio": 0.5}, "burst_ratio"),
                                               ({"peak_ratio": True}, "peak_ratio"),
                                               ({"new_author_share": 1.5}, "new_author_share"),
                                               ({"baseline_days": 0}, "baseline_days"),
                                               ({"link_size": 1}, "link_size")],
                         ids=["bands-not-dividing", "size-one", "no-window", "hold-string", "unknown-signal",
                              "burst-below-one", "peak-bool", "share-above-one", "no-history", "link-size-one"])
def test_params_are_validated(kwargs, field):
    with pytest.raises(ValueError, match=field):
        policy(Clock(), **kwargs)


def test_a_burst_of_variants_is_one_campaign(fake_redis):
    """Variants filling different buckets in the same batch join the first campaign (one event)."""
    from ops.lab.scenario import Scenario

    scenario = Scenario()
    wave = [c for c in scenario.stream() if c.kind == "wave"][:120]
    clock = Clock(wave[-1].ts)
    out = policy_actions(policy(clock), fake_redis, wave, [0.1] * len(wave), ["publish"] * len(wave))
    starts = [e for e in events(fake_redis) if e.type == "campaign_start"]
    assert len(starts) == 1, [e.data for e in starts]
    assert out.count("hold") >= 100


def test_comments_with_no_near_duplicate_cost_no_bucket_of_their_own(shared_redis):
    """The usual comment only joins the current slot's list of sightings: no bucket field, no history."""
    rng = np.random.default_rng(3)
    vocab = [f"word{i}" for i in range(3000)]
    texts = [" ".join(rng.choice(vocab, size=30)) for _ in range(200)]
    p = policy(Clock())
    policy_actions(p, shared_redis, comments(texts), [0.1] * 200, ["publish"] * 200)
    names, window = CampaignKeys(KEYS), p.window(p.clock())
    seen = names.sightings(window)[0]
    band_state = key_names(shared_redis, f"seawall:campaigns:*{p.tag}*")
    assert band_state == sorted([seen, f"seawall:campaigns:{p.tag}:since"]), band_state
    assert not any(shared_redis.exists(names.band(window, b)[0]) for b in range(p.bands))
    (entry,) = shared_redis.lrange(seen, 0, -1)  # one string of 8-byte band keys per batch
    assert len(entry) == 8 * len(set(np.asarray(p.band_keys(texts)[1]).ravel().tolist())) > 8 * 200 * 15
    assert 0 < shared_redis.ttl(seen) <= 600 + 1  # until the end of the next half-window slot, plus 1 s


def test_a_sighting_by_another_worker_counts_from_the_next_batch(fake_redis):
    """Each worker keeps its own copy of the sightings: what another worker saw in its last batch is a hit."""
    clock = Clock()
    a, b = policy(clock), policy(clock)
    rng = np.random.default_rng(5)
    b.observe(store(fake_redis), comments([ordinary_text(rng)], start=0))  # b has read this slot before a's sighting
    a.observe(store(fake_redis), comments([campaign_text(1)], start=1))
    names, window = CampaignKeys(KEYS), a.window(clock())
    buckets = [names.band(window, band)[0] for band in range(a.bands)]
    assert not fake_redis.exists(*buckets)  # a first sighting: no bucket yet
    b.observe(store(fake_redis), comments([campaign_text(2)], start=2))
    assert fake_redis.exists(*buckets) >= 8  # b found a's band keys: a bucket in each band they share


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


def test_a_worker_keeps_the_members_of_a_campaign_it_knows_across_slots():
    """Once a worker has seen a bucket linked to a campaign, later comments with that band key are members
    from their first sighting in a new slot, before the bucket there holds enough comments to link."""
    clock = Clock()
    p = policy(clock)
    fake = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    policy_actions(p, fake, comments([campaign_text(i) for i in range(14)]), [0.1] * 14, ["publish"] * 14)
    (cid,) = read_campaigns(fake, KEYS)
    clock.t += 301  # the next slot (300 s): no bucket of it is linked yet
    out = policy_actions(p, fake, comments([campaign_text(i) for i in range(14, 17)], start=100), [0.1] * 3,
                         ["publish"] * 3)
    assert out == ["hold"] * 3
    assert read_campaigns(fake, KEYS)[cid]["members"] == 14 + 3  # the ten that made it, four more, three here
    # and those members linked their buckets of this slot: a worker that has learnt nothing finds it there
    assert policy(clock).observe(store(fake), comments([campaign_text(17)], start=200)) == {0: cid}


# --- spelling tricks ---------------------------------------------------------------------------

def test_disguised_variants_get_the_band_keys_of_their_plain_text():
    """Look-alike letters, zero-width characters, leetspeak and spaced letters do not split a family.

    The policy's band keys of a disguised comment agree with its plain twin's on most bands; words
    cut as they are typed (the detector before it shingled the model's tokens) agree on few.
    """
    import random

    from model.minhash import band_hashes
    from ops.lab.board import obfuscate

    p = policy(Clock())
    plain = [campaign_text(i) for i in range(40)]
    disguised = [obfuscate(t, random.Random(i)) for i, t in enumerate(plain)]
    assert sum(a != b for a, b in zip(plain, disguised)) == 40
    _, keys_plain = p.band_keys(plain)
    _, keys_disguised = p.band_keys(disguised)
    agree = (keys_plain == keys_disguised).mean()
    raw = MinHasher(num_perm=32, shingle=3)  # case folding and word characters only
    agree_raw = (band_hashes(raw.signatures(plain), 16) == band_hashes(raw.signatures(disguised), 16)).mean()
    assert agree >= 0.6 and agree_raw <= 0.3, (agree, agree_raw)


def test_a_disguised_campaign_is_caught_as_soon_as_its_plain_twin(shared_redis):
    import random

    from ops.lab.board import obfuscate

    outcomes = {}
    for kind in ("plain", "disguised"):
        clock = Clock()
        client = shared_redis if kind == "plain" else fakeredis.FakeRedis(server=fakeredis.FakeServer())
        p = policy(clock)
        held = []
        for i in range(40):
            clock.t += 20
            text = campaign_text(i) if kind == "plain" else obfuscate(campaign_text(i), random.Random(i))
            held += policy_actions(p, client, comments([text], start=i, authors=[f"fresh{i}"]), [0.1], ["publish"])
        outcomes[kind] = held
    first = {k: v.index("hold") for k, v in outcomes.items()}
    assert first["plain"] <= 12 and first["disguised"] <= first["plain"] + 3, first
    assert all(a == "hold" for a in outcomes["disguised"][first["disguised"]:])


# --- the baseline: new and bursty against the site's own history -------------------------------

def _steady_format(i: int) -> str:
    days = ("monday", "tuesday", "wednesday", "thursday", "friday")
    return (f"Weekly rota for block {'ABCDE'[i % 5]}: bins out on {days[i % 5]}, recycling the day after. "
            "Please flatten boxes and rinse the jars, the collectors skip dirty bins.")


def _post(p, client, clock, texts, *, authors, start, every_s):
    out = []
    for n, text in enumerate(texts):
        clock.t += every_s
        out += policy_actions(p, client, comments([text], start=start + n, authors=[authors[n]]), [0.1], ["publish"])
    return out


@pytest.mark.parametrize("history", [True, False], ids=["with-history", "no-history"])
def test_a_phrasing_posted_steadily_is_not_a_campaign_even_from_new_accounts(history, fake_redis):
    """The baseline alone: a format anonymous posters (new authors, once the six-hour warm-up is over) put
    up every 20 s for six hours has a history that predicts its rate; the same hour on a site with no
    such history is a campaign.

    Windows are 300 s here (so the history of 6 hours is 72 windows); a real burst of the same
    phrasing at ten times the usual rate is still a campaign with the history.
    """
    clock = Clock()
    p = policy(clock, window_s=300, baseline_days=1, warmup_s=1080 * 20)
    anonymous = [""] * 2000
    policy_actions(p, fake_redis, comments(["the site opens with an ordinary comment about the garden party"]), [0.1],
            ["publish"])
    if history:
        _post(p, fake_redis, clock, [_steady_format(i) for i in range(1080)], authors=anonymous, start=0, every_s=20)
    else:
        clock.t += 1080 * 20
    steady = _post(p, fake_redis, clock, [_steady_format(i) for i in range(180)], authors=anonymous, start=5000,
                   every_s=20)
    if history:
        assert "hold" not in steady and read_campaigns(fake_redis, KEYS) == {}
        burst = _post(p, fake_redis, clock, [_steady_format(i) for i in range(150)], authors=anonymous, start=9000,
                      every_s=1)
        assert burst.count("hold") >= 60 and len(read_campaigns(fake_redis, KEYS)) == 1
    else:
        assert steady.count("hold") >= 150 and len(read_campaigns(fake_redis, KEYS)) >= 1


def test_a_long_campaign_is_caught_throughout_and_then_handed_over_to_the_model(fake_redis):
    """A campaign is tracked while it is far above its history; run steadily for long enough, it
    becomes history too (the nightly retrain has learnt it by then) and its members are no longer held.

    Windows of 300 s and one day of history: a campaign of one comment every 10 s is held from its
    first minutes for hours, and no longer after half a day.
    """
    clock = Clock()
    p = policy(clock, window_s=300, baseline_days=1)
    policy_actions(p, fake_redis, comments(["the site opens with an ordinary comment about the garden party"]), [0.1],
            ["publish"])
    clock.t += 86_400  # the site has been watched for a day
    out = []
    for n in range(12 * 36):  # twelve hours, ten comments every 100 s
        clock.t += 100
        batch = comments([campaign_text(10 * n + i) for i in range(10)], start=10 * n)
        out += policy_actions(p, fake_redis, batch, [0.1] * 10, ["publish"] * 10)
    hours = [out[h * 360:(h + 1) * 360].count("hold") / 360 for h in range(12)]
    assert min(hours[:4]) >= 0.9 and hours[-1] <= 0.1, hours


# --- the second signal: new authors (or a spam-ward lean) ---------------------------------------

def test_a_new_phrasing_from_the_sites_regulars_is_not_a_campaign(shared_redis):
    """Bursty and new, but posted by the site's regulars: no campaign.  The same burst from new accounts is one."""
    clock = Clock()
    p = policy(clock, warmup_s=3600)
    regulars = [f"regular{i}" for i in range(40)]
    _post(p, shared_redis, clock, [f"good morning from flat {i}, the lift is working again today" for i in range(40)],
          authors=regulars, start=0, every_s=30)  # the regulars, first seen during the warm-up
    clock.t += 7200
    burst = [f"count me in for the roof terrace picnic on saturday, I will bring {x} and a chair"
             for x in ("lemonade", "a salad", "cups", "a cake", "blankets") * 6]
    by_regulars = _post(p, shared_redis, clock, burst, authors=regulars[:30], start=100, every_s=5)
    assert "hold" not in by_regulars and read_campaigns(shared_redis, KEYS) == {}
    clock.t += 1200
    by_newcomers = _post(p, shared_redis, clock, burst, authors=[f"fresh{i}" for i in range(30)], start=200, every_s=5)
    assert by_newcomers.count("hold") >= 15 and len(read_campaigns(shared_redis, KEYS)) == 1


def test_authors_first_seen_during_the_warm_up_are_regulars(fake_redis):
    clock = Clock()
    p = policy(clock, warmup_s=3600)
    texts = [campaign_text(i) for i in range(20)]
    early = _post(p, fake_redis, clock, texts, authors=[f"early{i}" for i in range(20)], start=0, every_s=10)
    assert "hold" not in early  # the detector's first hour on the site: it is learning who posts here
    clock.t += 3600
    late = _post(p, fake_redis, clock, texts, authors=[f"late{i}" for i in range(20)], start=100, every_s=10)
    assert late.count("hold") >= 8


def test_an_author_stays_known_across_author_generations(fake_redis):
    """First sightings live in generations of 30 days; a returning author is carried into the next one."""
    p = policy(Clock(), new_author_s=86_400)
    generation_s = 30 * 86_400
    start = (1_800_000_000 // generation_s + 1) * generation_s - 3600  # an hour before a generation ends
    p.clock.t = start
    p.observe(store(fake_redis), comments(["an ordinary first comment from a regular of the site"], authors=["ana"]))
    p.clock.t = start + 7200  # the next generation
    p.observe(store(fake_redis), comments(["an ordinary second comment from the same regular of the site"],
                                   authors=["ana"]))
    cur, prev = CampaignKeys(KEYS).authors(p.window(p.clock.t))[:2]
    assert cur != prev and fake_redis.hlen(cur) == 1
    assert int(fake_redis.hvals(cur)[0]) == int(start)  # the first sighting, carried over


@pytest.mark.parametrize("lean", [True, False], ids=["spam-ward", "ordinary-scores"])
def test_the_score_lean_signal_against_the_sites_baseline(lean, fake_redis):
    """With signals="lean", a burst of regulars' comments is a campaign only if it scores above the site's usual."""
    rng = np.random.default_rng(1)
    clock = Clock()
    p = policy(clock, signals="lean", warmup_s=3600)
    regulars = [f"regular{i}" for i in range(40)]
    for n in range(300):  # the site's usual scores: 0.01 to 0.2
        clock.t += 10
        text = f"ordinary comment number {n} about the courtyard and {rng.integers(1000)}"
        policy_actions(p, fake_redis, comments([text], start=n, authors=[regulars[n % 40]]),
                       [float(rng.uniform(0.01, 0.2))], ["publish"])
    out = []
    for i in range(30):
        clock.t += 5
        score = 0.6 if lean else float(rng.uniform(0.01, 0.2))
        out += policy_actions(p, fake_redis, comments([campaign_text(i)], start=1000 + i, authors=[regulars[i]]),
                              [score], ["publish"])
    assert (out.count("hold") >= 15) == lean and (len(read_campaigns(fake_redis, KEYS)) == 1) == lean


# --- Redis: every key in KEYS, named by Keys ------------------------------------------------------

def recording_script_keys(monkeypatch) -> list[list[str]]:
    """Every script call's KEYS, as the Redis store queues them."""
    calls = []
    queue = RedisCampaignStore._call

    def record(self, pipe, script, keys, args):
        calls.append(list(keys))
        return queue(self, pipe, script, keys, args)

    monkeypatch.setattr(RedisCampaignStore, "_call", record)
    return calls


def test_the_scripts_touch_only_the_keys_they_are_given(redis_server, monkeypatch):
    """MONITOR shows each command a script runs; every key is one of the KEYS it was given, all under the prefix."""
    import threading

    keys = Keys(prefix="{site-a}:")
    client = redis_server.client()
    clock = Clock()
    p = policy(clock)
    calls = recording_script_keys(monkeypatch)
    seen_lines = []
    ready = threading.Event()

    def watch():
        with redis_server.client().monitor() as m:
            ready.set()
            for line in m.listen():
                seen_lines.append(line)
                if "stop-watching" in line["command"]:
                    return

    thread = threading.Thread(target=watch, daemon=True)
    thread.start()
    ready.wait(5)
    texts = [campaign_text(i) for i in range(30)]
    policy_actions(p, client, comments(texts), [0.1] * 30, ["publish"] * 30, keys=keys)
    clock.t += 400  # a new slot: buckets carried over, history folded
    policy_actions(p, client, comments(texts, start=100), [0.1] * 30, ["publish"] * 30, keys=keys)
    client.get("stop-watching")
    thread.join(10)
    script_keys = {k for call in calls for k in call}
    in_script = [line for line in seen_lines if line.get("client_type") == "lua"]
    assert len(in_script) > 10 and len(calls) >= 4
    for line in in_script:
        command = line["command"].split()
        if command[0].upper() in ("HMGET", "HSET", "HSETNX", "HINCRBY", "HKEYS", "LRANGE", "RPUSH", "EXPIRE", "SET",
                                  "GET"):
            assert command[1] in script_keys, line["command"][:120]
    assert all(k.startswith("{site-a}:campaigns:") for k in script_keys)
    assert all(k.startswith(b"{site-a}:") for k in client.keys("*"))


def test_each_script_call_stays_on_one_cluster_slot(fake_redis, monkeypatch):
    """Cluster-ready keys: each call's KEYS share one hash slot (the slot function is redis-py's, as a Redis
    Cluster computes it: CRC16 of the hash tag), and the bands' buckets spread over several slots."""
    from redis.cluster import key_slot

    calls = recording_script_keys(monkeypatch)
    clock = Clock()
    p = policy(clock)
    state = RedisState(fake_redis, KEYS)
    state.campaigns = RedisCampaignStore(fake_redis, KEYS, cluster=True)  # as on a cluster client: a call per slot
    texts = [campaign_text(i) for i in range(30)]
    for start in (0, 100):
        p.apply(state, comments(texts, start=start), [0.1] * 30, [Decision("publish")] * 30)
        clock.t += 400
    assert len(calls) >= 2 * p.bands + 1  # the authors (new ones, the first time) and one call per band, twice
    slots = [{key_slot(k.encode()) for k in call} for call in calls]
    assert all(len(s) == 1 for s in slots), [c for c, s in zip(calls, slots) if len(s) > 1]
    band_slots = {key_slot(CampaignKeys(KEYS).band(p.window(clock.t), band)[0].encode()) for band in range(p.bands)}
    assert len(band_slots) >= p.bands // 2
    assert all(k.startswith("seawall:campaigns:") for call in calls for k in call)  # the prefix leads (ACL ~seawall:*)


def test_scores_must_match_the_comments(fake_redis):
    with pytest.raises(ValueError, match="2 scores for 1 comments"):
        policy(Clock()).observe(store(fake_redis), comments([campaign_text(0)]), [0.1, 0.2])


# --- the port: the policy on an in-memory store -----------------------------------------------------

class MemoryState:
    """A :class:`worker.policies.PolicyState` on the in-memory store (nothing to guard)."""

    def __init__(self, campaigns):
        self.campaigns = campaigns

    def guard(self):
        import contextlib

        return contextlib.nullcontext()


def test_the_policy_finds_a_campaign_through_an_in_memory_store():
    """The seam: two workers share a store that is not Redis, and find the campaign neither sees alone."""
    from campaign_fake import MemoryCampaignStore
    from worker.policies import PolicyState, apply_policies

    memory = MemoryCampaignStore()
    state = MemoryState(memory)
    assert isinstance(state, PolicyState)
    clock = Clock()
    a, b = policy(clock), policy(clock)
    rng = np.random.default_rng(0)
    actions = []
    for i in range(16):
        clock.t += 5
        batch = comments([campaign_text(i), ordinary_text(rng)], start=10 * i)
        decisions = apply_policies([(a, b)[i % 2]], state, batch, [0.1, 0.1], [Decision("publish")] * 2)
        actions.append([d.action for d in decisions])
    assert [kind for kind, _ in memory.events] == ["campaign_start"]
    assert all(acts[1] == "publish" for acts in actions)
    first_held = next(i for i, acts in enumerate(actions) if acts[0] == "hold")
    assert 9 <= first_held <= 13 and all(acts[0] == "hold" for acts in actions[first_held:])
    (cid,) = memory.read_active()
    assert memory.read_active()[cid]["members"] >= 10
    clock.t += 700
    assert [e["id"] for e in memory.end_idle(now=clock.t, window_s=600)] == [cid] and not memory.read_active()


def test_the_in_memory_store_and_the_redis_store_agree(fake_redis):
    """The same batches through the same policy settings give the same members and campaigns on either store."""
    from campaign_fake import MemoryCampaignStore

    memory, redis_store = MemoryCampaignStore(), store(fake_redis)
    clock = Clock(1_800_000_000.0)
    on_memory, on_redis = policy(clock, min_size=6), policy(clock, min_size=6)
    rng = np.random.default_rng(7)
    for i in range(40):
        clock.t += 23  # crosses slots (300 s): carried-in buckets and history
        texts = [campaign_text(i), campaign_text(i + 50), ordinary_text(rng)]
        batch = comments(texts, start=10 * i, authors=[f"u{i}", f"v{i % 5}", f"w{i}"])
        scores = [0.9, 0.2, 0.1]
        assert on_memory.observe(memory, batch, scores) == on_redis.observe(redis_store, batch, scores), i
    assert memory.read_active().keys() == read_campaigns(fake_redis, KEYS).keys() != set()
    assert {c: d["members"] for c, d in memory.read_active().items()} == \
        {c: d["members"] for c, d in read_campaigns(fake_redis, KEYS).items()}


def test_a_server_that_lost_its_scripts_gets_them_again(fake_redis):
    """After a restart without the scripts (SCRIPT FLUSH here), the next batch loads them and runs."""
    clock = Clock()
    p, s = policy(clock), store(fake_redis)
    p.observe(s, comments([campaign_text(i) for i in range(5)]))
    fake_redis.script_flush()
    clock.t += 5
    assert len(p.observe(s, comments([campaign_text(i) for i in range(5, 14)], start=5))) == 14 - 5
    assert len(read_campaigns(fake_redis, KEYS)) == 1


@pytest.mark.parametrize("signals", ["either", "authors", "lean", "both"])
def test_the_cheap_bucket_flags_agree_with_the_bucket_facts(signals):
    """Every observed bucket gets only (dense, qualifies); the full facts are built for a starting campaign.
    Both must decide alike on any figures, an empty bucket included."""
    rng = np.random.default_rng(11)
    p = policy(Clock(), signals=signals)
    for _ in range(5000):
        total = int(rng.integers(0, 60))
        authors, new_hits, lean_hits = (int(rng.integers(0, total + 1)) for _ in range(3))
        history, peak = int(rng.integers(0, 500)), int(rng.integers(0, 40))
        history_s = float(rng.choice([600.0, 86_400.0, 7 * 86_400.0]))
        facts = p._bucket_facts(total, authors, new_hits, lean_hits, history, peak, history_s)
        assert p._bucket_flags(total, authors, new_hits, lean_hits, history, peak, history_s) == (
            facts["dense"], facts["bursty"] and facts["signal"])


def test_pending_hits_behave_as_a_dict_of_key_to_hits_and_last_count():
    from worker.campaigns import PendingHits

    rng = np.random.default_rng(7)
    pending, reference = PendingHits(), {}
    for round_ in range(60):
        keys = np.unique(rng.integers(0, 40, size=rng.integers(1, 12)).astype(np.uint64) * np.uint64(2**60 // 40))
        hits, last = pending.get(keys)
        expected = [reference.get(int(k), (0, -np.inf)) for k in keys.tolist()]
        assert hits.tolist() == [h for h, _ in expected] and last.tolist() == [t for _, t in expected]
        new_hits, new_last = rng.integers(0, 9, size=keys.size), rng.random(keys.size) + round_
        pending.put(keys, new_hits, new_last)
        reference.update(zip(keys.tolist(), zip(new_hits.tolist(), new_last.tolist())))
        if round_ % 10 == 9:  # forget some keys, as the purge of unlinked ones does
            keep = pending.keys % np.uint64(3) != 0
            pending.keep(keep)
            reference = {k: v for k, v in reference.items() if k % 3 != 0}
        assert pending.keys.tolist() == sorted(reference) and len(pending) == len(reference)
    pending.clear()
    assert len(pending) == 0 and pending.get(np.array([1], dtype=np.uint64))[0].tolist() == [0]



def _three_batches_through_the_band_script(monkeypatch, *, cluster: bool):
    """Three batches of a campaign among ordinary comments; (decisions, bucket state, each band call's KEYS)."""
    from slotcheck import SlotChecked  # a cluster refuses a call whose keys span two slots

    calls = recording_script_keys(monkeypatch)
    client = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    state = RedisState(client, KEYS)
    state.campaigns = RedisCampaignStore(SlotChecked(client) if cluster else client, KEYS, cluster=cluster)
    clock = Clock()
    p = policy(clock)
    rng = np.random.default_rng(3)
    got = []
    for batch in range(3):
        texts = [campaign_text(i) for i in range(12)] + [ordinary_text(rng) for _ in range(12)]
        decisions = p.apply(state, comments(texts, start=100 * batch), [0.1] * 24, [Decision("publish")] * 24)
        got.append([(d.action, d.campaign) for d in decisions])
        clock.t += 30
    dump = sorted((k, sorted(client.hgetall(k).items())) for k in client.keys("*buckets*"))
    monkeypatch.undo()
    return got, dump, [keys for keys in calls if any(":buckets:" in k for k in keys)]


def test_a_single_redis_updates_every_band_in_one_call_and_a_cluster_one_per_band(monkeypatch):
    """The band script takes one band or many: both ways give the same decisions and bucket state."""
    one_got, one_state, one_calls = _three_batches_through_the_band_script(monkeypatch, cluster=False)
    per_got, per_state, per_calls = _three_batches_through_the_band_script(monkeypatch, cluster=True)
    assert len(one_calls) <= 3 and max(len(keys) // 4 for keys in one_calls) > 1
    assert {len(keys) for keys in per_calls} == {4} and len(per_calls) == sum(len(k) // 4 for k in one_calls)
    assert sum(a == "hold" for a, _ in one_got[-1]) == 12 and all(c for _, c in one_got[-1][:12])
    assert one_state and one_state == per_state
    assert [[a for a, _ in batch] for batch in one_got] == [[a for a, _ in batch] for batch in per_got]


class _RankingScorer:
    """Scores 0.1; a comment ranked spam-ward (score at or above its ``spamward_from``) is explained by the
    token ``spamward``, any other by ``hamward``; counts the texts it scores."""

    version = "ranking01"
    created_at = 1_700_000_000.0

    class thresholds:  # noqa: N801 - the scorer contract's attribute name
        hold = 0.5
        reject = 0.9

    def __init__(self):
        self.scored = 0

    def score_many(self, texts, *, top_k=5, spamward_from=None):
        texts = list(texts)
        self.scored += len(texts)
        cut = spamward_from if isinstance(spamward_from, (list, tuple, np.ndarray)) else [spamward_from] * len(texts)
        reasons = [[("spamward", 0.5)] if c is not None and 0.1 >= c else [("hamward", -0.5)] for c in cut]
        return np.full(len(texts), 0.1), reasons


def _campaign_verdicts(policy_class):
    from worker.loader import StaticModelSource
    from worker.redistransport import redis_consumer
    from worker.settings import WorkerSettings

    client = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    scorer, clock = _RankingScorer(), Clock()
    p = policy_class(hasher=MinHasher(num_perm=32, shingle=3), bands=16, min_size=10, min_authors=3, window_s=600,
                     min_words=6, hold=True, warmup_s=0, clock=clock)
    c = redis_consumer(client=client, keys=KEYS, settings=WorkerSettings(block_ms=5, overlap_commit=False),
                       model_source=StaticModelSource(model=scorer), consumer="w", policies=(p,), clock=clock)
    c.prepare()
    rng = np.random.default_rng(5)
    for batch in range(4):
        for i in range(10):
            client.xadd(KEYS.comments, {"id": f"c{batch}-{i}", "text": campaign_text(10 * batch + i),
                                        "site": "news.example", "author": f"fresh{10 * batch + i}"})
            client.xadd(KEYS.comments, {"id": f"o{batch}-{i}", "text": ordinary_text(rng), "site": "news.example",
                                        "author": f"regular{i}"})
        c.step()
        clock.t += 20
    got = [(f[b"id"].decode(), f[b"action"].decode(), f.get(b"campaign", b"").decode() != "", json.loads(f[b"reasons"]))
           for _sid, f in client.xrange(KEYS.verdicts)]
    return got, scorer.scored


def test_members_known_before_scoring_are_explained_in_the_one_scoring_pass():
    class AfterRoutingOnly(CampaignPolicy):  # no will_hold: members are explained again after routing
        will_hold = None

    got, scored = _campaign_verdicts(CampaignPolicy)
    again, scored_again = _campaign_verdicts(AfterRoutingOnly)
    held = [v for v in got if v[1] == "hold"]
    assert len(held) >= 20 and all(member and reasons[0][0] == "spamward" for _i, _a, member, reasons in held)
    assert all(reasons[0][0] == "hamward" for _i, action, _m, reasons in got if action == "publish")
    assert got == again  # the same verdicts, actions and reasons either way
    assert scored == 80 and scored_again == 80 + len(held)  # each comment scored once, members not again


# --- the scoring pass's words --------------------------------------------------------------------

def _words_texts() -> list[str]:
    import random

    from ops.lab.board import obfuscate

    rng = np.random.default_rng(9)
    plain = [campaign_text(i) for i in range(60)]
    return (plain + [obfuscate(t, random.Random(i)) for i, t in enumerate(plain)]
            + [ordinary_text(rng) for _ in range(60)]
            + ["", "thanks!", "one two three four five six", "f r 3 3 c a s i n o now " * 3,
               "Ｃａｌｌ +1 (555) 010-9999 or ma\u200bil me@casino.example today please do it now",
               " ".join(FILLER * 40), "ПРИВЕТ друзья see https://www.Prize.Example/Ok and win win win"])


def test_words_from_the_scoring_pass_give_the_band_keys_of_the_policys_own_cut():
    from model.features import FeatureEncoder
    from model.hashing import TokenHasher
    from model.tokens import Tokenizer

    p = policy(Clock())
    texts = _words_texts()
    # the model's tokenizer (bigrams on, its own chunk store), a batch with repeats as the worker's is
    encoder = FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**14))
    distinct = list(dict.fromkeys(texts))
    index = [distinct.index(t) for t in texts + texts[::7]]
    batch = [distinct[i] for i in index]
    words = encoder.texts(distinct).words(index)
    from model.features import BatchWords
    given = BatchWords(words[0], words[1], Tokenizer().word_params())
    eligible, keys = p.band_keys(batch)
    eligible_given, keys_given = p.band_keys(batch, given)
    assert eligible.tolist() == eligible_given.tolist() and keys.tolist() == keys_given.tolist()
    assert 0 < eligible.size < len(batch)


def test_words_cut_by_other_rules_or_for_other_comments_are_not_used():
    from model.features import BatchWords
    from model.tokens import Tokenizer

    p = policy(Clock())
    texts = _words_texts()[:20]
    want = p.band_keys(texts)[1].tolist()
    bogus = ["bogus"] * (7 * len(texts))
    counts = np.full(len(texts), 7)
    other_rules = BatchWords(bogus, counts, Tokenizer(leet=False).word_params())
    assert p.band_keys(texts, other_rules)[1].tolist() == want
    other_batch = BatchWords(bogus[:-7], counts[:-1], Tokenizer().word_params())
    assert p.band_keys(texts, other_batch)[1].tolist() == want
    # and words that do qualify are the ones used (a bogus batch of them gives other keys)
    assert p.band_keys(texts, BatchWords(bogus, counts, Tokenizer().word_params()))[1].tolist() != want


def test_the_worker_gives_the_policy_its_models_words_and_the_verdicts_stay_the_same():
    from model.classifier import EmbeddingClassifier
    from worker.loader import StaticModelSource
    from worker.redistransport import redis_consumer
    from worker.settings import WorkerSettings

    rng = np.random.default_rng(3)
    train = [campaign_text(i) for i in range(40)] + [ordinary_text(rng) for _ in range(40)]
    # the campaign's template taught as ham: the model publishes its members and the policy holds them
    model = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, seed=1).fit(train, [0] * 40 + [1] * 40)

    class ScoreManyOnly:  # the model contract without encode: the policy cuts the words itself
        version, created_at, thresholds = model.version, model.created_at, model.thresholds

        def score_many(self, texts, *, top_k=5, spamward_from=None):
            return model.score_many(texts, top_k=top_k, spamward_from=spamward_from)

    class Recording(CampaignPolicy):
        def will_hold(self, state, comments, words=None):
            self.given.append(None if words is None else words.flat)
            return super().will_hold(state, comments, words)

    def run(scorer):
        client, clock = fakeredis.FakeRedis(server=fakeredis.FakeServer()), Clock()
        p = Recording(hasher=MinHasher(num_perm=32, shingle=3), bands=16, min_size=10, min_authors=3,
                      window_s=600, min_words=6, hold=True, warmup_s=0, clock=clock)
        p.given = []
        c = redis_consumer(client=client, keys=KEYS, settings=WorkerSettings(block_ms=5, overlap_commit=False),
                           model_source=StaticModelSource(model=scorer), consumer="w", policies=(p,), clock=clock)
        c.prepare()
        texts = _words_texts()
        for batch in range(4):
            for i in range(12):
                text = campaign_text(12 * batch + i) if i % 2 else texts[(12 * batch + i) % len(texts)]
                client.xadd(KEYS.comments, {"id": f"c{batch}-{i}", "text": text, "site": "news.example",
                                            "author": f"fresh{12 * batch + i}"})
            client.xadd(KEYS.comments, {"id": f"dup{batch}", "text": campaign_text(12 * batch + 1),
                                        "site": "news.example", "author": "again"})
            c.step()
            clock.t += 20
        # every field but the comment's stream id (the time it was sent)
        return [{k: v for k, v in f.items() if k != b"stream_id"} for _sid, f in client.xrange(KEYS.verdicts)], p.given

    got, given = run(model)
    want, given_none = run(ScoreManyOnly())
    assert got == want and len(got) == 52
    assert sum(f.get(b"rule") == b"campaign" for f in got) >= 10
    assert given_none == [None] * 4 and len(given) == 4 and all(w is not None for w in given)
    from model.tokens import Tokenizer
    tok = Tokenizer()
    assert given[0] == [w for i in range(12) for w in tok.words(
        campaign_text(i) if i % 2 else _words_texts()[i])] + tok.words(campaign_text(1))
