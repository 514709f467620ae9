"""Quality figures, checked against scikit-learn's metrics and a brute-force count."""
from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics

from model.calibration import Thresholds
from model.errors import DataError
from model.evaluation import evaluate, recall_at_fpr


def scored(seed, n=3_000, ties=False):
    rng = np.random.default_rng(seed)
    labels = (rng.random(n) < 0.3).astype(int)
    scores = np.clip(rng.normal(0.35 + 0.3 * labels, 0.15), 0, 1)
    if ties:
        scores = np.round(scores, 2)
    return labels, scores


def brute_recall_at_fpr(labels, scores, fpr):
    """Every distinct score as a threshold (flag >= t): the best recall with FPR <= fpr."""
    ham, spam = scores[labels == 0], scores[labels == 1]
    best = 0.0
    for t in np.unique(scores):
        if np.mean(ham >= t) <= fpr:
            best = max(best, float(np.mean(spam >= t)))
    return best


@pytest.mark.parametrize("ties", [False, True], ids=["distinct", "tied"])
@pytest.mark.parametrize("seed", [0, 1])
def test_ranking_figures_match_sklearn(seed, ties):
    labels, scores = scored(seed, ties=ties)
    r = evaluate(labels, scores)
    # Reference: scikit-learn's metrics (sklearn.metrics.roc_auc_score, average_precision_score).
    assert r["roc_auc"] == pytest.approx(metrics.roc_auc_score(labels, scores), abs=1e-12)
    assert r["average_precision"] == pytest.approx(metrics.average_precision_score(labels, scores), abs=1e-12)
    assert r["recall_at_1pct_fpr"] == pytest.approx(brute_recall_at_fpr(labels, scores, 0.01))
    assert r["recall_at_0_1pct_fpr"] == pytest.approx(brute_recall_at_fpr(labels, scores, 0.001))
    assert (r["n"], r["n_spam"], r["n_ham"]) == (labels.size, labels.sum(), labels.size - labels.sum())


def test_recall_at_fpr_on_a_hand_counted_case():
    # 1,000 ham, 10 spam. Thresholds at or below 0.95 flag the ham at 0.95 too.
    labels = np.array([0] * 1000 + [1] * 10)
    ham = np.linspace(0.0, 0.5, 1000)
    ham[-1], ham[-2] = 0.95, 0.85  # two ham above most spam
    spam = np.array([0.99, 0.98, 0.97, 0.9, 0.9, 0.8, 0.7, 0.6, 0.55, 0.52])
    scores = np.concatenate([ham, spam])
    assert recall_at_fpr(labels, scores, 0.0) == pytest.approx(0.3)   # above 0.95: 3 spam, 0 ham
    assert recall_at_fpr(labels, scores, 0.001) == pytest.approx(0.5)  # one ham allowed: down to 0.9
    assert recall_at_fpr(labels, scores, 0.002) == pytest.approx(1.0)  # two ham allowed: all spam


def test_threshold_figures_match_sklearn():
    labels, scores = scored(3)
    t = Thresholds(hold=0.5, reject=0.7)
    r = evaluate(labels, scores, t)
    for name, threshold in (("hold", 0.5), ("reject", 0.7)):
        predicted = (scores >= threshold).astype(int)
        tn, fp, fn, tp = metrics.confusion_matrix(labels, predicted).ravel()
        part = r[name]
        assert part["threshold"] == threshold
        assert part["confusion_matrix"] == {"tn": tn, "fp": fp, "fn": fn, "tp": tp}
        assert part["precision"] == pytest.approx(metrics.precision_score(labels, predicted))
        assert part["recall"] == pytest.approx(metrics.recall_score(labels, predicted))
        assert part["f1"] == pytest.approx(metrics.f1_score(labels, predicted))
        assert part["fpr"] == pytest.approx(fp / (fp + tn))


def test_threshold_nobody_reaches_gives_zero_precision_not_an_error():
    r = evaluate([0, 1, 0, 1], [0.1, 0.2, 0.3, 0.4], Thresholds(hold=0.99, reject=1.0))
    assert r["reject"]["precision"] == 0.0 and r["reject"]["confusion_matrix"]["tp"] == 0


def test_generators_are_accepted():
    labels, scores = scored(4, n=200)
    r = evaluate(iter(labels.tolist()), iter(scores.tolist()))
    assert r["n"] == 200


@pytest.mark.parametrize(
    "labels, scores, match",
    [
        ([], [], "no data"),
        ([1, 1, 1], [0.1, 0.2, 0.3], "single class"),
        ([0, 1], [0.1], "2 labels but 1 scores"),
        ([0, 2], [0.1, 0.2], "0 \\(ham\\) or 1 \\(spam\\)"),
    ],
    ids=["empty", "single-class", "mismatch", "bad-label"],
)
def test_unusable_input_is_a_data_error(labels, scores, match):
    with pytest.raises(DataError, match=match):
        evaluate(labels, scores)
