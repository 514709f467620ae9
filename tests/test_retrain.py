"""The gated retrain: new labels, warm start, gate, poisoning guard, lock, report, re-score."""
from __future__ import annotations

import dataclasses
import json
import random
import time

import numpy as np
import pytest

from model.evaluation import evaluate
from ops.cli import main
from ops.config import load_config
from ops.registry import Registry
from ops.rescore import rescore_held
from ops.commands.retrain import render
from ops.retrain import (
    LabelRow,
    RetrainBusy,
    RetrainLock,
    cap_moderators,
    choose_candidate,
    compare_to_active,
    corroborate,
    in_holdout,
    judge_set,
    label_rows,
    last_reports,
    moderator_cap,
    near_duplicates,
    recent_set_padding,
    retrain,
)
from worker.labels import iter_label_records
from retrain_kit import KEYS, bootstrap, model_bytes, send_feedback, stream

SETTINGS = load_config(environ={}).retrain


def settings(**changes):
    return dataclasses.replace(SETTINGS, **changes)




def rank_above_ham(model, wave, ham) -> float:
    """Share of (wave, ham) pairs the model ranks the right way round; the campaign's
    words were never in the training set, so feedback must raise it."""
    h = model.predict_proba_many([c.text for c in ham])
    w = model.predict_proba_many([c.text for c in wave])
    return float((w[:, None] > h[None, :]).mean())


def quality(model, comments) -> dict:
    return evaluate([c.label for c in comments], model.predict_proba_many([c.text for c in comments]))


# -- pure steps -----------------------------------------------------------------------------

@pytest.mark.parametrize(
    "counts, share, cap",
    [
        ({"a": 10, "b": 10}, 0.5, None),
        ({"a": 100, "b": 10, "c": 10}, 0.5, 20),
        ({"a": 100, "b": 30, "c": 30, "d": 30}, 0.25, 30),
        ({"a": 100, "b": 30}, 0.25, 0),
        ({"a": 50}, 0.5, 0),
        ({"a": 50}, 1.0, None),
        ({}, 0.5, None),
    ],
    ids=["balanced", "one-floods", "quarter-share", "share-below-one-over-sources", "single-source", "share-one-disables", "empty"],
)
def test_moderator_cap(counts, share, cap):
    assert moderator_cap(counts, share) == cap
    if cap is not None and counts:
        kept = {m: min(n, cap) for m, n in counts.items()}
        assert max(kept.values()) <= share * sum(kept.values()) + 1e-9


def test_cap_moderators_keeps_the_honest_labels_whole():
    rows = [LabelRow(f"{i}-0", f"c{i}", "t", 1, "flood") for i in range(90)]
    rows += [LabelRow(f"{i}-1", f"h{i}", "t", 0, m) for i, m in enumerate(["ana", "bo"] * 10)]
    kept, by_source = cap_moderators(rows, 0.4, random.Random(0))
    assert by_source["ana"] == {"given": 10, "kept": 10} and by_source["bo"] == {"given": 10, "kept": 10}
    assert by_source["flood"]["given"] == 90 and by_source["flood"]["kept"] == 13
    assert len(kept) == 33


PITCH = ("I put two Zorvex capsules in the water butt every week and my leeks did really well this year, "
         "so much healthier now, search Zorvex and quote {}")


def test_near_duplicates_are_found_by_word_shingle_jaccard():
    pool = [PITCH.format("AB12"), "Giving away a wheelbarrow, collect from Mill Lane.", PITCH.format("CD34"), "?!"]
    found = near_duplicates([PITCH.format("EF56"), "Is the canal towpath flooded again?", "..."], pool, 0.6)
    assert found == [[0, 2], [], []]  # 3-shingle Jaccard of two pitches: 25/27; texts without words match nothing
    assert near_duplicates([PITCH.format("EF56")], pool, 0.95) == [[]]
    assert near_duplicates([], pool, 0.6) == [] and near_duplicates(["x"], [], 0.6) == [[]]


def test_corroboration_sets_aside_a_trimmed_sources_unbacked_labels_only():
    row = lambda i, cid, text, y, who: LabelRow(f"{i}-0", cid, text, y, who)  # noqa: E731
    witnesses = [
        row(1, "c-same", "the canal towpath is flooded near Mill Lane", 1, "ana"),  # later relabelled by the flood
        row(2, "c-w1", PITCH.format("AB12"), 1, "ana"),
        row(3, "c-w2", PITCH.format("CD34"), 1, "bo"),
        row(4, "c-w3", "Selling a cold frame for a fiver, collect from Orchard Row this Saturday morning", 0, "ana"),
        row(5, "c-w4", "Selling a cold frame for a fiver, collect from Orchard Row this Saturday evening", 1, "bo"),
        row(6, "c-bo", "Lovely photos of the harvest supper", 0, "bo"),
    ]
    rows = [
        row(10, "c-same", "the canal towpath is flooded near Mill Lane", 1, "flood"),   # same id, same label
        row(11, "c-f1", PITCH.format("EF56"), 1, "flood"),                             # near-identical, agrees
        row(12, "c-f2", PITCH.format("GH78"), 0, "flood"),                             # near-identical, contradicts
        row(13, "c-f3", "Free manure at the stables on Cooper Street, a fiver a bag", 1, "flood"),  # nobody else
        row(14, "c-f4", "Selling a cold frame for a fiver, collect from Orchard Row this Saturday night", 0, "flood"),
        row(15, "c-o1", PITCH.format("IJ90"), 0, "other"),                             # a second trimmed source
        row(16, "c-o2", PITCH.format("KL12"), 0, "flood"),                             # backed only by "other"
        row(17, "c-bo", "Lovely photos of the harvest supper", 0, "bo"),               # untrimmed: untouched
        row(18, "c-cy", "A comment nobody else labelled, by an untrimmed source", 1, "cy"),
    ]
    kept, counts = corroborate(rows, witnesses + [rows[5]], {"flood", "other"}, similarity=0.6)
    assert [r.id for r in kept] == ["c-same", "c-f1", "c-bo", "c-cy"]
    # c-f2 and c-o2: two witnesses against; c-f4: one for and one against (a tie is not backing);
    # c-o1: contradicted too; c-f3: no witness at all.  A trimmed source never backs another one.
    assert counts == {"flood": {"set_aside": 4, "contradicted": 3}, "other": {"set_aside": 1, "contradicted": 1}}
    # No trimmed source: nothing changes.
    assert corroborate(rows, witnesses, set(), similarity=0.6) == (rows, {})


def test_latest_label_of_an_id_wins_and_bad_records_are_skipped():
    stored = [("1-0", {"id": "c1", "label": "spam", "text": "x", "moderator": "ana"}),
              ("2-0", {"id": "c2", "label": "ham", "text": "y"}),
              ("3-0", {"id": "c1", "label": "ham", "text": "x", "moderator": "bo"}),
              ("4-0", {"id": "c3", "label": "eh", "text": "z"}),
              ("5-0", {"id": "c4", "label": "ham", "text": "  "})]
    rows = label_rows(list(iter_label_records(stored)))
    assert [(r.id, r.y, r.moderator) for r in rows] == [("c2", 0, "(unattributed)"), ("c1", 0, "bo")]


def test_holdout_assignment_is_stable_and_near_its_share():
    ids = [f"comment-{i}" for i in range(4000)]
    first = [in_holdout(i, 0.2) for i in ids]
    assert first == [in_holdout(i, 0.2) for i in ids]
    assert 0.17 < sum(first) / len(ids) < 0.23


# -- the gate: paired comparisons and the choice between two candidates ---------------------

def gate_scores(seed: int = 0, n: int = 3000):
    """Labels and an active model's scores (ROC-AUC about 0.9975), as the gate sees them."""
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(int)
    active = 4.0 * y + rng.normal(0, 1, n) + 0.3 * rng.normal(0, 1, n)
    return y, active


def forgetful(y, active, share: float = 0.02):
    """A candidate that forgot one kind of spam: ``share`` of the spam rows drop among the ham."""
    out = active.copy()
    spam = np.flatnonzero(y == 1)
    out[spam[: int(share * spam.size)]] -= 2.5
    return out


def test_gate_refuses_a_warm_start_the_flat_allowance_let_through():
    y, active = gate_scores()
    warm = forgetful(y, active)
    comparison = compare_to_active(y, active, warm, SETTINGS)
    auc, rec = comparison["roc_auc"], comparison["recall_at_gate_fpr"]
    # The code before this gate promoted it: ROC-AUC and recall within 0.005 and 0.02 of the active model's.
    assert -0.005 < auc["difference"] < -0.002 and -0.02 < rec["difference"] < 0
    # Paired, DeLong's bound shows the loss is real: 0.9975 -> 0.9945 on 3,000 rows.
    assert auc["lower"] < -SETTINGS.auc_tolerance and not comparison["not_worse"]
    line = judge_set("warm_start", "holdout", comparison, SETTINGS)
    assert line.startswith("holdout: the warm start may be below the active model beyond the tolerance (ROC-AUC")
    # The scratch fit that did not forget is promoted instead; without it, nothing is.
    scratch = active + 0.05 * np.random.default_rng(1).normal(0, 1, y.size)
    entries = {"warm_start": {"not_worse": False, "sets": {"holdout": comparison}},
               "scratch": {"not_worse": compare_to_active(y, active, scratch, SETTINGS)["not_worse"]}}
    assert entries["scratch"]["not_worse"]
    chosen, why = choose_candidate(entries, None)
    assert chosen == "scratch" and why == ("chose the scratch fit, the only candidate not worse than the active "
                                           "model; the warm start may be below it")
    assert choose_candidate({"warm_start": entries["warm_start"], "scratch": {"not_built": "the fit failed"}}, None) == (
        None, "refused: the warm start may be below the active model beyond the tolerance")


@pytest.mark.parametrize(
    "lower, chosen",
    [(0.0004, "scratch"), (0.0, "warm_start"), (-0.003, "warm_start")],
    ids=["scratch-shown-better", "indistinguishable", "scratch-looks-worse"],
)
def test_when_both_candidates_pass_the_scratch_fit_must_be_shown_better(lower, chosen):
    entries = {"warm_start": {"not_worse": True}, "scratch": {"not_worse": True}}
    head_to_head = {"candidate": 0.999, "reference": 0.998, "difference": 0.001, "lower": lower}
    assert choose_candidate(entries, head_to_head)[0] == chosen
    assert choose_candidate({"warm_start": {"not_worse": True}}, None)[0] == "warm_start"  # retrain.scratch = false
    assert choose_candidate({"warm_start": {"not_worse": False}, "scratch": {"not_worse": False}}, head_to_head) == (
        None, "refused: the warm start and the scratch fit may both be below the active model beyond the tolerance")


def test_a_candidate_equal_to_the_active_model_is_not_worse():
    y, active = gate_scores(2, n=500)
    comparison = compare_to_active(y, active, active.copy(), SETTINGS)
    assert comparison["not_worse"]
    assert comparison["roc_auc"]["lower"] == comparison["recall_at_gate_fpr"]["lower"] == 0.0


# -- against a real server --------------------------------------------------------------------

@pytest.fixture
def started(redis_client):
    """``(client, registry, first version, first model, feedback window, unseen comments)``: the first model
    active, the stream cut at 2,500 comments."""
    registry, first = bootstrap(redis_client)
    comments = stream()
    return redis_client, registry, first, registry.load(), comments[:2500], comments[2500:]


@pytest.mark.redis_server
def test_retrain_promotes_a_better_model_and_records_why(started):
    r, registry, first, old, feedback, test = started
    send_feedback(r, feedback)
    started = time.time()
    report = retrain(r, KEYS, SETTINGS)

    assert report["decision"] == "promoted", report["reasons"]
    new_version = report["candidate"]
    assert registry.active() == new_version and registry.history() == [new_version, first]
    meta = registry.meta(new_version)
    assert meta["source"] == "retrain" and meta["parent"] == first
    # The retrained model is new: its age (seawall_model_age_seconds, `seawall watch`) starts at the retrain,
    # not at the first model's training.
    assert float(registry.meta(first)["created_at"]) < started <= float(meta["created_at"])
    assert float(meta["created_at"]) <= float(meta["promoted_at"]) <= time.time()
    assert registry.load(new_version).created_at == pytest.approx(float(meta["created_at"]), abs=1e-3)
    assert meta["labels_cursor"] == report["labels"]["cursor_to"]
    labels = report["labels"]
    assert labels["drained"] == 2500 and labels["new"] == 2500
    assert labels["holdout"] + labels["trained_new"] == 2500 and labels["replay_original"] > 0
    assert set(report["gate"]["sets"]) == {"holdout", "canary"}
    # Both candidates are built, judged on both sets and reported; the one promoted is the one chosen.
    candidates = report["candidates"]
    assert set(candidates) == {"warm_start", "scratch"} and report["chosen"] in candidates
    assert candidates[report["chosen"]]["version"] == new_version and candidates[report["chosen"]]["not_worse"]
    assert candidates["scratch"]["train_rows"] == (labels["trained_new"] + labels["older_trainable"]
                                                  + len(registry.replay()))
    for entry in candidates.values():
        assert set(entry["sets"]) == {"holdout", "canary"} and entry["train_seconds"] > 0
        assert {"hold", "reject"} <= set(entry["thresholds"])
    for figures in report["gate"]["sets"].values():
        assert {"active", "warm_start", "scratch"} <= set(figures)
    assert report["gate"]["scratch_vs_warm_start"]["method"] == "delong"
    text = render(report)
    chosen_name = {"warm_start": "warm start", "scratch": "scratch fit"}[report["chosen"]]
    assert text.splitlines()[0] == f"retrain: promoted {new_version}, the {chosen_name} (was {first})"
    assert "  warm start: " in text and "  scratch fit: " in text
    assert sum(line.endswith("  not worse") for line in text.splitlines()) == 4  # 2 candidates x 2 sets
    assert report["reasons"][-1].startswith(f"chose the {chosen_name}")
    assert last_reports(r, KEYS)[0] == json.loads(json.dumps(report))
    kinds = [f[b"type"] for _i, f in r.xrange(KEYS.events)]
    assert kinds == [b"promote", b"promote", b"retrain"]
    event = json.loads(r.xrange(KEYS.events)[-1][1][b"data"])
    assert event["decision"] == "promoted" and event["candidate"] == new_version

    # Labels since the last promotion only: nothing new now.
    again = retrain(r, KEYS, SETTINGS)
    assert again["decision"] == "skipped" and "0 new labels" in again["reasons"][0]

    new = registry.load()
    wave = [c for c in test if c.kind == "wave"]
    ham = [c for c in test if c.label == 0]
    assert wave, "the invented stream has campaign comments after the feedback window"
    assert rank_above_ham(new, wave, ham) > rank_above_ham(old, wave, ham)
    assert quality(new, test)["roc_auc"] > quality(old, test)["roc_auc"]


@pytest.mark.redis_server
def test_a_worse_warm_start_is_refused_and_the_scratch_fit_promoted(started, monkeypatch):
    import ops.retrain

    r, registry, first, old, feedback, unseen = started
    send_feedback(r, feedback)
    # A broken update: the warm start learns every label the wrong way round.  The scratch fit,
    # built from the same labels, is fine; the gate must not ship the warm start.
    real = ops.retrain._warm_start
    monkeypatch.setattr(ops.retrain, "_warm_start",
                        lambda active_bytes, train, s: real(active_bytes, [(t, 1 - y) for t, y in train], s))

    alone = retrain(r, KEYS, settings(scratch=False))
    assert alone["decision"] == "refused" and alone["chosen"] is None and set(alone["candidates"]) == {"warm_start"}
    assert alone["candidates"]["warm_start"]["not_worse"] is False
    assert alone["reasons"][-1] == "refused: the warm start may be below the active model beyond the tolerance"
    assert registry.active() == first
    text = render(alone).splitlines()
    assert text[0] == f"retrain: kept {first}; the gate refused the candidates"
    assert sum(line.endswith("  may be worse") for line in text) == 2 and "scratch fit" not in "\n".join(text)

    report = retrain(r, KEYS, SETTINGS)  # the refused labels are still new
    assert report["labels"]["new"] == 2500
    assert report["decision"] == "promoted" and report["chosen"] == "scratch", report["reasons"]
    warm, scratch = report["candidates"]["warm_start"], report["candidates"]["scratch"]
    assert not warm["not_worse"] and scratch["not_worse"]
    assert registry.active() == report["candidate"] == scratch["version"]
    assert any(x.startswith("holdout: the warm start may be below the active model") for x in report["reasons"])
    assert report["reasons"][-1] == ("chose the scratch fit, the only candidate not worse than the active model; "
                                     "the warm start may be below it")
    assert quality(registry.load(), unseen)["roc_auc"] > quality(old, unseen)["roc_auc"]


def test_labels_an_earlier_retrain_set_aside_stay_out_of_the_next_one(fake_redis):
    r = fake_redis
    registry, _ = bootstrap(r)
    comments = stream()
    window = comments[:2300]
    honest, flood = window[::8], [c for i, c in enumerate(window) if i % 8]
    send_feedback(r, honest)
    send_feedback(r, flood, moderators=("mallory",), flip=True)
    first = retrain(r, KEYS, SETTINGS)
    assert first["decision"] == "promoted", first["reasons"]
    mallory = first["labels"]["moderators"]["mallory"]

    send_feedback(r, comments[2300:3300])
    report = retrain(r, KEYS, SETTINGS)
    labels = report["labels"]
    # The flood is older now; the same guard keeps what it dropped and set aside out of the replay
    # and out of the scratch fit (the cap's sample differs, its size does not).
    assert labels["older"] == len(window)
    assert labels["older_kept"] <= len(window) - mallory["over_cap"]
    assert any(x.startswith(f"poisoning guard on the older labels: {len(window) - labels['older_kept']} of "
                            f"{len(window)} neither replay nor train the scratch fit (mallory: {mallory['over_cap']} "
                            "over the cap, ") for x in report["reasons"])
    assert labels["older_trainable"] < labels["older_kept"]  # the holdout's ids stay out too
    scratch_rows = report["candidates"]["scratch"]["train_rows"]
    assert scratch_rows == labels["trained_new"] + labels["older_trainable"] + len(registry.replay())


@pytest.mark.redis_server
def test_a_flood_of_contrary_labels_is_capped_and_refused_by_the_gate(redis_client):
    r = redis_client
    registry, first = bootstrap(r)
    comments = stream()
    window, test = comments[:2300], comments[2300:]
    # Honest moderators label one comment in eight across the window (campaign included);
    # one account labels all the others, each label the opposite of the truth.
    honest = window[::8]
    flood = [c for i, c in enumerate(window) if i % 8]
    send_feedback(r, honest)
    send_feedback(r, flood, moderators=("mallory",), flip=True)

    # Without the cap the flood is most of the holdout too, so only the canary set catches it.
    uncapped = retrain(r, KEYS, settings(max_moderator_share=1.0))
    assert uncapped["decision"] == "refused"
    assert uncapped["labels"]["moderators"]["mallory"] == {"given": len(flood), "kept": len(flood)}
    assert any(x.startswith("canary: the warm start may be below the active model") for x in uncapped["reasons"])
    assert registry.active() == first

    capped = retrain(r, KEYS, SETTINGS)
    mods = capped["labels"]["moderators"]
    honest_total = sum(v["kept"] for m, v in mods.items() if m != "mallory")
    assert mods["mallory"]["given"] == len(flood)
    # The trimmed source's labels that no honest moderator backs neither train nor judge; here the honest
    # moderators labelled the campaign too, so the flipped campaign labels are contradicted, not just unbacked.
    mallory = mods["mallory"]
    assert mallory["set_aside"] > 0 and mallory["contradicted"] > 0
    assert mallory["given"] == mallory["over_cap"] + mallory["set_aside"] + mallory["kept"]
    assert capped["labels"]["kept_after_guard"] == capped["labels"]["kept_after_cap"] - mallory["set_aside"]
    assert capped["labels"]["holdout_judging"] == capped["labels"]["holdout"]
    assert mallory["kept"] <= SETTINGS.max_moderator_share * (honest_total + mallory["kept"])
    assert any(x.startswith(f"poisoning guard: mallory supplied {len(flood)} of {len(window)} new labels")
               for x in capped["reasons"])
    # Whatever the gate decided, the model now serving is not worse on unseen comments.
    serving = registry.load()
    assert quality(serving, test)["roc_auc"] >= quality(registry.load(first), test)["roc_auc"] - SETTINGS.auc_tolerance
    assert capped["decision"] in ("refused", "promoted")


@pytest.mark.redis_server
def test_a_trimmed_honest_moderator_still_teaches_the_campaign_where_others_back_her(started):
    r, registry, first, old, window, test = started
    # One busy moderator labels four comments in five; two others the rest. She is over the cap, so
    # what she kept trains only where the others labelled the same kind of comment the same way: the
    # campaign (near-duplicates) and repeated background spam, not her one-off ham labels.
    busy = [c for i, c in enumerate(window) if i % 5]
    others = window[::5]
    send_feedback(r, busy, moderators=("mod-ana",))
    send_feedback(r, others, moderators=("mod-bo", "mod-cy"))
    report = retrain(r, KEYS, SETTINGS)

    ana = report["labels"]["moderators"]["mod-ana"]
    assert ana["given"] == len(busy) and ana["over_cap"] > 0
    assert ana["kept"] > 0 and ana["set_aside"] > 0
    assert ana["contradicted"] == 0  # honest moderators do not contradict each other
    assert report["labels"]["moderators"]["mod-bo"] == {"given": 250, "kept": 250}
    assert report["decision"] == "promoted", report["reasons"]
    new = registry.load()
    wave = [c for c in test if c.kind == "wave"]
    ham = [c for c in test if c.label == 0]

    assert rank_above_ham(new, wave, ham) > rank_above_ham(old, wave, ham)
    assert quality(new, test)["roc_auc"] > quality(old, test)["roc_auc"]


@pytest.mark.redis_server
def test_two_retrains_never_run_at_once(redis_server, redis_client, capsys):
    bootstrap(redis_client)
    send_feedback(redis_client, stream()[:100])
    with RetrainLock(client=redis_client, keys=KEYS, ttl_s=30):
        with pytest.raises(RetrainBusy, match="another retrain is running"):
            retrain(redis_client, KEYS, SETTINGS)
        assert main(["retrain", "--redis", redis_server.url]) == 2
        assert "another retrain is running" in capsys.readouterr().err
    assert redis_client.ttl("seawall:retrain:lock") == -2  # released by its holder
    assert main(["retrain", "--redis", redis_server.url, "--json", "--rescore", "off"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["decision"] in ("promoted", "refused") and report["labels"]["new"] == 100


def test_lock_expires_if_its_holder_dies(fake_redis):
    lock = RetrainLock(client=fake_redis, keys=KEYS, ttl_s=5)
    lock.__enter__()
    assert 0 < fake_redis.ttl("seawall:retrain:lock") <= 5
    other = RetrainLock(client=fake_redis, keys=KEYS, ttl_s=5)
    fake_redis.delete("seawall:retrain:lock")  # as when the TTL ran out
    with other:
        lock.__exit__(None, None, None)  # the first holder's late release must not free the new lock
        assert fake_redis.get("seawall:retrain:lock").decode() == other.token


def test_retrain_without_enough_labels_does_nothing(fake_redis):
    registry, first = bootstrap(fake_redis)
    send_feedback(fake_redis, stream()[:5])
    report = retrain(fake_redis, KEYS, SETTINGS)
    assert report["decision"] == "skipped" and "min_new_labels" in report["reasons"][0]
    assert registry.active() == first


@pytest.mark.parametrize(
    "holdout, canary, expected",
    [
        ([1, 1, 0, 0], [0, 1], None),           # both classes: nothing borrowed
        ([1] * 50, [0] * 3 + [1] * 9, 0),       # spam only: the canary set's ham
        ([0] * 50, [0] * 9 + [1] * 3, 1),       # ham only: the canary set's spam
        ([1] * 50, [0] + [1] * 9, None),        # the canary set holds too little ham
        ([1] * 50, [], None),                   # no canary set
    ],
    ids=["both-classes", "spam-only", "ham-only", "canary-too-thin", "no-canary"],
)
def test_a_one_class_holdout_borrows_the_missing_class_from_the_canary_set(holdout, canary, expected):
    assert recent_set_padding(holdout, canary) == expected


def test_a_night_of_spam_labels_only_is_judged_against_the_canary_ham(fake_redis):
    # Moderators mostly label what the worker held: a night of feedback can be all spam.
    registry, first = bootstrap(fake_redis)
    spam = [c for c in stream() if c.label == 1][:400]
    send_feedback(fake_redis, spam)
    report = retrain(fake_redis, KEYS, SETTINGS)
    assert report["decision"] != "refused" or "min_holdout" not in report["reasons"][-1], report["reasons"]
    holdout = report["gate"]["sets"]["holdout"]
    assert holdout["spam"] == report["labels"]["holdout"] and holdout["rows"] > holdout["spam"]
    assert any("judged together with the canary set's ham" in r for r in report["reasons"])


def test_gate_refuses_on_a_holdout_too_small(fake_redis):
    registry = Registry(client=fake_redis, keys=KEYS)
    registry.promote(registry.push(model_bytes(0)))  # no canary set pushed
    send_feedback(fake_redis, stream()[:60])
    report = retrain(fake_redis, KEYS, settings(min_holdout=100))
    assert report["decision"] == "refused" and "min_holdout" in report["reasons"][-1]


@pytest.mark.redis_server
def test_rescore_releases_held_comments_the_new_model_is_sure_about(redis_client):
    r = redis_client
    registry, _first = bootstrap(r)
    held = [c for c in stream()[:400]]
    for c in held:
        r.hset(KEYS.text(c.id), mapping={"text": c.text, "site": c.site, "stream_id": "1-0", "action": "hold"})
        r.zadd(KEYS.held, {c.id: 1.0})
    r.zadd(KEYS.held, {"expired-text": 1.0})
    model = registry.load()
    decided = held[0].id
    original = model.score_many

    def score_while_a_moderator_decides(texts, top_k=5, **kwargs):
        r.zrem(KEYS.held, decided)  # feedback lands while the batch is scored
        return original(texts, top_k=top_k, **kwargs)

    model.score_many = score_while_a_moderator_decides
    counts = rescore_held(r, KEYS, model, batch=150)
    assert counts["held"] == 401 and counts["no_text"] == 1
    verdicts = [f for _i, f in r.xrange(KEYS.verdicts)]
    assert len(verdicts) == counts["rescored"] == 399
    assert all(v[b"rescored"] == b"1" and v[b"model"] == model.version.encode() for v in verdicts)
    assert decided.encode() not in {v[b"id"] for v in verdicts}
    still = {m.decode() for m in r.zrange(KEYS.held, 0, -1)}
    released = {v[b"id"].decode() for v in verdicts if v[b"action"] != b"hold"}
    assert counts["released"] == len(released) > 0
    assert not released & still and "expired-text" in still
    sample = next(iter(released))
    assert r.hget(KEYS.text(sample), "model") == model.version.encode()


@pytest.mark.parametrize(
    "n_new, n_older, n_original, ratio, expected",
    [
        (100, 0, 5000, 1.0, (0, 100)),
        (100, 30, 5000, 1.0, (30, 70)),
        (100, 500, 500, 1.0, (50, 50)),
        (100, 500, 0, 1.0, (100, 0)),
        (100, 10, 20, 1.0, (10, 20)),
        (100, 500, 500, 0.0, (0, 0)),
    ],
    ids=["first-retrain", "few-older", "both-plenty", "no-original", "under-budget", "ratio-zero"],
)
def test_replay_sizes_share_the_budget(n_new, n_older, n_original, ratio, expected):
    from ops.retrain import replay_sizes

    assert replay_sizes(n_new, n_older, n_original, settings(replay_ratio=ratio)) == expected


def test_a_retrain_that_cannot_run_is_recorded_as_failed(fake_redis):
    from ops.registry import RegistryError

    send_feedback(fake_redis, stream()[:50])
    with pytest.raises(RegistryError, match="no active model"):
        retrain(fake_redis, KEYS, SETTINGS)
    report = last_reports(fake_redis, KEYS)[0]
    assert report["decision"] == "failed" and "no active model" in report["error"]
    event = json.loads(fake_redis.xrange(KEYS.events)[-1][1][b"data"])
    assert event["decision"] == "failed"
    assert fake_redis.get("seawall:retrain:lock") is None
