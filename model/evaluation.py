"""Quality figures of a spam scorer, computed with ``sklearn.metrics``.

Ranking quality (ROC-AUC, average precision, recall at a fixed false-positive
rate) does not depend on thresholds; the operating figures (precision, recall,
F1, confusion matrix) are given at the hold and the reject threshold when
thresholds are passed.  Label 1 is spam (the positive class), 0 ham.
"""
from __future__ import annotations

import numpy as np

from model.calibration import Thresholds
from model.errors import DataError


def recall_at_fpr(labels: np.ndarray, scores: np.ndarray, fpr: float) -> float:
    """Highest true-positive rate among thresholds whose false-positive rate is <= ``fpr``.

    Read off ``sklearn.metrics.roc_curve``; a comment is flagged when its score
    is >= the threshold, so tied scores are flagged together.
    """
    from sklearn import metrics  # imported when needed: scoring never pays for scikit-learn

    fprs, tprs, _ = metrics.roc_curve(labels, scores, drop_intermediate=False)
    ok = fprs <= fpr + 1e-12
    return float(tprs[ok].max()) if ok.any() else 0.0


def at_threshold(labels: np.ndarray, scores: np.ndarray, threshold: float) -> dict:
    """Precision, recall, F1, false-positive rate and confusion matrix for ``score >= threshold``."""
    from sklearn import metrics

    predicted = (scores >= threshold).astype(np.int64)
    tn, fp, fn, tp = metrics.confusion_matrix(labels, predicted, labels=[0, 1]).ravel()
    n_ham = tn + fp
    return {
        "threshold": float(threshold),
        "precision": float(metrics.precision_score(labels, predicted, zero_division=0)),
        "recall": float(metrics.recall_score(labels, predicted, zero_division=0)),
        "f1": float(metrics.f1_score(labels, predicted, zero_division=0)),
        "fpr": float(fp / n_ham) if n_ham else 0.0,
        "confusion_matrix": {"tn": int(tn), "fp": int(fp), "fn": int(fn), "tp": int(tp)},
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
    from sklearn import metrics

    out = {
        "n": int(labels.size),
        "n_spam": n_spam,
        "n_ham": int(labels.size - n_spam),
        "roc_auc": float(metrics.roc_auc_score(labels, scores)),
        "average_precision": float(metrics.average_precision_score(labels, scores)),
        "recall_at_1pct_fpr": recall_at_fpr(labels, scores, 0.01),
        "recall_at_0_1pct_fpr": recall_at_fpr(labels, scores, 0.001),
    }
    if thresholds is not None:
        out["hold"] = at_threshold(labels, scores, thresholds.hold)
        out["reject"] = at_threshold(labels, scores, thresholds.reject)
    return out
