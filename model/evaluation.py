"""Quality figures of a spam scorer, computed with numpy.

Ranking quality (ROC-AUC, average precision, recall at a fixed false-positive
rate) does not depend on thresholds; the operating figures (precision, recall,
F1, confusion matrix) are given at the hold and the reject threshold when
thresholds are passed.  Label 1 is spam (the positive class), 0 ham.

The definitions are scikit-learn's (``sklearn.metrics.roc_auc_score``,
``average_precision_score``, ``roc_curve``, ``precision_score``...), and
tests/test_evaluation.py checks every figure against scikit-learn, which
stays the reference there.  They are written out here because they run in
the worker, the retrain and the CLI, where importing scikit-learn's metrics
would cost start-up time for a few cumulative sums.
"""
from __future__ import annotations

import numpy as np

from model.actions import THRESHOLD_ACTIONS
from model.calibration import Thresholds
from model.errors import DataError


def roc_points(labels: np.ndarray, scores: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """False- and true-positive rates at every distinct score used as a threshold.

    A comment is flagged when its score is >= the threshold, so tied scores
    are flagged together.  The first point is (0, 0) (nothing flagged), as in
    ``sklearn.metrics.roc_curve(..., drop_intermediate=False)``.

    Returns
    -------
    fpr, tpr, thresholds : arrays of the same length, thresholds decreasing
        (the first one is +inf).
    """
    labels = np.asarray(labels)
    scores = np.asarray(scores, dtype=np.float64)
    order = np.argsort(-scores, kind="mergesort")
    sorted_scores = scores[order]
    positives = labels[order] == 1
    # The last index of each run of tied scores: one point per distinct threshold.
    ends = np.r_[np.flatnonzero(np.diff(sorted_scores)), sorted_scores.size - 1]
    tps = np.cumsum(positives)[ends]
    fps = (ends + 1) - tps
    n_pos, n_neg = tps[-1], fps[-1]
    fpr = np.r_[0.0, fps / n_neg] if n_neg else np.r_[0.0, np.zeros(ends.size)]
    tpr = np.r_[0.0, tps / n_pos] if n_pos else np.r_[0.0, np.zeros(ends.size)]
    return fpr, tpr, np.r_[np.inf, sorted_scores[ends]]


def roc_auc(labels: np.ndarray, scores: np.ndarray) -> float:
    """Area under the ROC curve (trapezoids between the points of :func:`roc_points`)."""
    fpr, tpr, _ = roc_points(labels, scores)
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1]) / 2.0))


def average_precision(labels: np.ndarray, scores: np.ndarray) -> float:
    """Sum over the distinct thresholds of (recall gained) x (precision there), no interpolation."""
    fpr, tpr, _ = roc_points(labels, scores)
    labels = np.asarray(labels)
    n_pos = int(np.sum(labels == 1))
    n_neg = labels.size - n_pos
    tps, fps = tpr[1:] * n_pos, fpr[1:] * n_neg
    precision = tps / np.maximum(tps + fps, 1e-300)
    return float(np.sum(np.diff(tpr) * precision))


def recall_at_fpr(labels: np.ndarray, scores: np.ndarray, fpr: float) -> float:
    """Highest true-positive rate among thresholds whose false-positive rate is <= ``fpr``.

    Read off :func:`roc_points`; a comment is flagged when its score is >= the
    threshold, so tied scores are flagged together.
    """
    fprs, tprs, _ = roc_points(labels, scores)
    ok = fprs <= fpr + 1e-12
    return float(tprs[ok].max()) if ok.any() else 0.0


def at_threshold(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict:
    """Precision, recall, F1, false-positive rate and confusion matrix for ``score >= threshold``."""
    labels = np.asarray(labels)
    flagged = np.asarray(scores) >= threshold
    spam = labels == 1
    tp = int(np.sum(flagged & spam))
    fp = int(np.sum(flagged & ~spam))
    fn = int(np.sum(~flagged & spam))
    tn = int(np.sum(~flagged & ~spam))
    n_ham = tn + fp
    precision = tp / (tp + fp) if tp + fp else 0.0
    recall = tp / (tp + fn) if tp + fn else 0.0
    return {
        "threshold": float(threshold),
        "precision": float(precision),
        "recall": float(recall),
        "f1": float(2 * tp / (2 * tp + fp + fn)) if tp else 0.0,
        "fpr": float(fp / n_ham) if n_ham else 0.0,
        "confusion_matrix": {"tn": tn, "fp": fp, "fn": fn, "tp": tp},
    }


def evaluate(labels, scores, thresholds: Thresholds | None = None) -> dict:
    """Quality figures for spam scores against 0/1 labels.

    Parameters
    ----------
    labels : array-like (n,) of 0/1 (1 = spam).
    scores : array-like (n,) of spam probabilities (any monotone score works
        for the ranking figures).
    thresholds : optional :class:`Thresholds`; adds a ``hold`` and a
        ``reject`` section (score >= threshold counts as flagged).

    Returns
    -------
    dict
        ``n``, ``n_spam``, ``n_ham``, ``roc_auc``, ``average_precision``,
        ``recall_at_1pct_fpr``, ``recall_at_0_1pct_fpr``, and with thresholds
        ``hold`` / ``reject`` dicts of precision, recall, f1, fpr and
        ``confusion_matrix`` (tn, fp, fn, tp).

    Raises
    ------
    DataError
        When the data are empty, of mismatched length, or hold one class only.

    Examples
    --------
    >>> r = evaluate([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8])
    >>> r["roc_auc"], r["n"]
    (0.75, 4)
    """
    labels = np.asarray(list(labels) if not hasattr(labels, "__len__") else labels).astype(np.int64)
    scores = np.asarray(list(scores) if not hasattr(scores, "__len__") else scores, dtype=np.float64)
    if labels.shape != scores.shape:
        raise DataError(f"evaluate: {labels.size} labels but {scores.size} scores; pass one score per label")
    if labels.size == 0:
        raise DataError("evaluate: no data; pass at least one spam and one ham example")
    if not np.isin(labels, (0, 1)).all():
        raise DataError("evaluate: labels must be 0 (ham) or 1 (spam)")
    n_spam = int(labels.sum())
    if n_spam == 0 or n_spam == labels.size:
        raise DataError("evaluate: the data hold a single class; ranking figures need both spam and ham")
    out = {
        "n": int(labels.size),
        "n_spam": n_spam,
        "n_ham": int(labels.size - n_spam),
        "roc_auc": roc_auc(labels, scores),
        "average_precision": average_precision(labels, scores),
        "recall_at_1pct_fpr": recall_at_fpr(labels, scores, 0.01),
        "recall_at_0_1pct_fpr": recall_at_fpr(labels, scores, 0.001),
    }
    if thresholds is not None:
        for action in THRESHOLD_ACTIONS:
            out[action.value] = at_threshold(labels, scores, getattr(thresholds, action))
    return out
