"""Bad and poisoned feedback against a real server.

* Bad feedback sent to a running ``seawall serve`` (its feedback thread):
  unknown labels, unknown ids, oversized text and other malformed entries each
  become one dead letter with their own reason; the good ones become labels.
* Poisoned feedback: one moderator sends 5,000 contrary labels.  Without the
  per-moderator cap the gate refuses the candidate; with it the flood is cut
  down, what the flooder kept trains only where another moderator backs it,
  and the model that ends up serving is not worse.  The report says why.
"""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

from faults_kit import KEYS, deadletters, verdict_ids, write_model
from kit import Worker, clean_env, stop_all, wait_until
from model.evaluation import evaluate
from retrain_kit import bootstrap, send_feedback, stream

pytestmark = pytest.mark.redis_server

TEXT_MAX = 1024


def test_bad_feedback_to_a_running_worker_is_dead_lettered_with_its_reason(redis_server, tmp_path):
    admin = redis_server.client()
    model = write_model(tmp_path / "model.bin")
    worker = Worker(url=redis_server.url, name="fb-w", log_dir=tmp_path, model_path=model,
                    env={"SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "1",
                         "SEAWALL_RETRAIN_FEEDBACK_TEXT_MAX_BYTES": str(TEXT_MAX)})
    cases = [
        ({"id": "c1", "label": "spam", "moderator": "mod-a"}, None),
        ({"id": "c2", "label": "HAM ", "moderator": "mod-b"}, None),                    # normalized, accepted
        ({"id": "new1", "label": "spam", "text": "a label that carries its own text"}, None),
        ({"id": "c3", "label": "maybe"}, "feedback_unknown_label"),
        ({"id": "c3", "label": ""}, "feedback_unknown_label"),
        ({"id": "c3"}, "feedback_unknown_label"),
        ({"id": "never-seen", "label": "spam"}, "feedback_no_text"),                  # unknown id, no text
        ({"id": "c4", "label": "ham", "text": "x" * (TEXT_MAX + 1)}, "feedback_text_too_large"),
        ({"id": "c4", "label": "ham", "text": "é" * TEXT_MAX}, "feedback_text_too_large"),
        ({"label": "spam"}, "feedback_missing_id"),
        ({"id": "   ", "label": "spam"}, "feedback_missing_id"),
        ({"id": "i" * 300, "label": "spam"}, "feedback_bad_id"),
        ({"id": b"c5\xff", "label": "spam"}, "feedback_invalid_utf8"),
        ({"id": "c5", "label": "spam", "moderator": "m" * 500}, "feedback_bad_field"),
        ({"id": "c5", "label": "spam", **{f"x{i}": "v" for i in range(20)}}, "feedback_too_many_fields"),
    ]
    try:
        worker.start()
        for i in range(1, 6):
            admin.xadd(KEYS.comments, {"id": f"c{i}", "text": f"comment number {i} about the allotment"})
        assert wait_until(lambda: len(verdict_ids(admin)) == 5, timeout=60), worker.output()[-2000:]
        expected = {}
        for fields, reason in cases:
            expected[admin.xadd(KEYS.feedback, fields)] = reason
        bad = sum(1 for r in expected.values() if r)
        assert wait_until(lambda: admin.xlen(KEYS.deadletter) >= bad and admin.xlen(KEYS.key("labels")) >= 3,
                          timeout=30), worker.output()[-2000:]
        assert worker.alive()
    finally:
        codes = stop_all([worker])
    assert codes == [0]
    got = {row["stream_id"].encode(): row["reason"] for row in deadletters(admin)}
    assert got == {sid: reason for sid, reason in expected.items() if reason}
    assert all(row["source"] == KEYS.feedback for row in deadletters(admin))
    labels = [(f[b"id"], f[b"label"]) for _i, f in admin.xrange(KEYS.key("labels"))]
    assert labels == [(b"c1", b"spam"), (b"c2", b"ham"), (b"new1", b"spam")]
    assert admin.xpending(KEYS.feedback, "labellers")["pending"] == 0




def retrain_cli(url: str, **env) -> dict:
    done = subprocess.run([sys.executable, "-m", "ops.cli", "retrain", "--redis", url, "--json", "--rescore", "off"],
                          capture_output=True, text=True, timeout=600, env=clean_env(env))
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


@pytest.mark.slow
def test_five_thousand_contrary_labels_from_one_moderator_keep_a_worse_model_out(redis_server):
    client = redis_server.client()
    registry, first = bootstrap(client)
    comments = stream(6000)
    honest, flood, test = comments[:400], comments[400:5400], comments[5400:]
    send_feedback(client, honest)
    send_feedback(client, flood, moderators=("mod-mallory",), flip=True)
    assert len(flood) == 5000

    # No cap: the flood is most of the new labels and of the holdout; the canary set catches it.
    uncapped = retrain_cli(redis_server.url, SEAWALL_RETRAIN_MAX_MODERATOR_SHARE="1.0")
    assert uncapped["decision"] == "refused"
    assert uncapped["labels"]["moderators"]["mod-mallory"] == {"given": 5000, "kept": 5000}
    assert any(r.startswith("canary: ") and "below the active model" in r for r in uncapped["reasons"])
    assert registry.active() == first

    # The default cap: the flood is cut to at most half of what is kept; what it kept trains only where
    # another moderator backs it.  The honest moderators never labelled the campaign, so the flipped
    # campaign labels (which the active model, publishing the campaign, "agrees" with) are set aside.
    capped = retrain_cli(redis_server.url)
    mods = capped["labels"]["moderators"]
    mallory = mods["mod-mallory"]
    assert mallory["given"] == 5000 and mallory["over_cap"] == 4600
    assert mallory["kept"] == 400 - mallory["set_aside"] and mallory["kept"] <= 5  # a flipped label is rarely backed
    honest_mods = {name: m for name, m in mods.items() if name != "mod-mallory"}
    assert honest_mods and all(m == {"given": m["given"], "kept": m["given"]} for m in honest_mods.values())
    assert capped["labels"]["set_aside"] == mallory["set_aside"]
    guard = [r for r in capped["reasons"] if r.startswith("poisoning guard: ")]
    assert guard == [next(r for r in capped["reasons"] if r.startswith("poisoning guard: mod-mallory supplied 5000 "
                                                                       "of 5400 new labels (cap 50%"))]
    assert "dropped 4600 over the cap" in guard[0] and f"set aside {mallory['set_aside']} that no other" in guard[0]
    serving = registry.load()
    before = evaluate([c.label for c in test], registry.load(first).predict_proba_many([c.text for c in test]))
    after = evaluate([c.label for c in test], serving.predict_proba_many([c.text for c in test]))
    print("faults:", json.dumps({"test": "poisoned_feedback", "contrary_labels": 5000,
                                 "uncapped": uncapped["decision"], "capped": capped["decision"],
                                 "mallory_kept": mallory["kept"], "mallory_set_aside": mallory["set_aside"],
                                 "gate_auc": {name: {side: round(fig["roc_auc"], 4) for side, fig in pair.items()
                                                     if isinstance(fig, dict)}
                                              for name, pair in capped.get("gate", {}).get("sets", {}).items()},
                                 "chosen": capped.get("chosen"),
                                 "guard": guard[0],
                                 "auc_before": round(before["roc_auc"], 4), "auc_after": round(after["roc_auc"], 4)}))
    assert after["roc_auc"] >= before["roc_auc"] - 0.005  # not worse on later comments either
    if capped["decision"] == "refused":
        assert registry.active() == first
        assert any("below the active model" in r for r in capped["reasons"])
    else:
        assert registry.active() == capped["candidate"]
