"""Paired comparison of two scorers on the same labelled rows.

The retrain gate asks whether a candidate model is *not worse* than the
active one.  Both are scored on the same rows, so their figures are
correlated, and the difference is far more precise than either figure alone;
a comparison that ignores the pairing (or a flat allowance on the point
estimates) either refuses good candidates on small sets or waves through a
real loss on large ones.  Two paired methods:

* ROC-AUC: DeLong, DeLong & Clarke-Pearson (1988), "Comparing the areas under
  two or more correlated receiver operating characteristic curves: a
  nonparametric approach", computed with midranks as in Sun & Xu (2014).
  The variance of the difference uses the covariance of the two AUCs'
  structural components.  It equals the two-sample jackknife variance of the
  difference exactly (tests/test_comparison.py checks that against
  scikit-learn's ``roc_auc_score``).
* Recall at a fixed false-positive rate: a stratified paired bootstrap.  Each
  round resamples the spam rows and the ham rows (with replacement, class
  sizes kept), scores both models on the same resample and takes the
  difference; the lower confidence bound is a percentile of those
  differences.  Recall at a fixed FPR is a step function of a few ham scores,
  which no normal approximation describes well.

Both report a one-sided lower confidence bound of ``candidate - reference``;
"not worse by more than a tolerance t at confidence c" means that bound is
``>= -t`` (a non-inferiority test at level ``1 - c``).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

from model.errors import DataError

#: Matrix cells (rounds x rows) one bootstrap block may hold; bounds the scratch memory.
_BLOCK_CELLS = 2_000_000


@dataclass(frozen=True)
class PairedDifference:
    """``candidate - reference`` of one figure on the same rows, with its one-sided lower bound."""

    figure: str
    method: str
    candidate: float
    reference: float
    difference: float
    lower: float
    confidence: float
    se: float | None = None
    rounds: int | None = None

    def not_worse(self, tolerance: float) -> bool:
        """``True`` when the lower bound shows the candidate loses at most ``tolerance``."""
        return self.lower >= -tolerance - 1e-12

    def to_dict(self) -> dict:
        return {k: v for k, v in asdict(self).items() if v is not None}


def _two_classes(labels, n_scores: int, op: str) -> np.ndarray:
    y = np.asarray(labels)
    if y.ndim != 1 or y.size != n_scores:
        raise DataError(f"{op}: {y.size} labels but {n_scores} scores per model; pass one score per label")
    if not np.isin(y, (0, 1)).all():
        raise DataError(f"{op}: labels must be 0 (ham) or 1 (spam)")
    n_spam = int(y.sum())
    if n_spam < 2 or y.size - n_spam < 2:
        raise DataError(f"{op}: needs at least two spam and two ham rows, got {n_spam} spam and "
                        f"{y.size - n_spam} ham")
    return y.astype(bool)


def delong_covariance(labels, scores) -> tuple[np.ndarray, np.ndarray]:
    """ROC-AUCs of ``k`` scorers on the same rows and their DeLong covariance matrix.

    Parameters
    ----------
    labels : array-like (n,) of 0/1 (1 = spam, the positive class).
    scores : array-like (k, n): one row of scores per scorer; higher = more spam.

    Returns
    -------
    aucs : np.ndarray (k,), each equal to ``sklearn.metrics.roc_auc_score``
        (ties count one half).
    cov : np.ndarray (k, k), the estimated covariance of the AUCs.

    Raises
    ------
    DataError
        With fewer than two rows of either class, or mismatched lengths.

    Examples
    --------
    >>> aucs, cov = delong_covariance([0, 0, 1, 1, 0, 1], [[0.1, 0.4, 0.35, 0.8, 0.2, 0.9]])
    >>> round(float(aucs[0]), 4), cov.shape
    (0.8889, (1, 1))
    """
    s = np.atleast_2d(np.asarray(scores, dtype=np.float64))
    pos = _two_classes(labels, s.shape[1], "delong")
    x, y = s[:, pos], s[:, ~pos]            # spam scores (k, m), ham scores (k, n)
    m, n = x.shape[1], y.shape[1]
    tx = stats.rankdata(x, axis=1)           # midranks within each class
    ty = stats.rankdata(y, axis=1)
    tz = stats.rankdata(np.concatenate([x, y], axis=1), axis=1)
    aucs = (tz[:, :m].sum(axis=1) - m * (m + 1) / 2.0) / (m * n)
    v10 = (tz[:, :m] - tx) / n               # per spam row: share of ham scored below it
    v01 = 1.0 - (tz[:, m:] - ty) / m         # per ham row: share of spam scored above it
    cov = np.atleast_2d(np.cov(v10)) / m + np.atleast_2d(np.cov(v01)) / n
    return aucs, cov


def delong_difference(labels, candidate, reference, *, confidence: float = 0.95) -> PairedDifference:
    """DeLong's paired comparison of two ROC-AUCs on the same rows.

    ``lower`` is ``difference - z * se`` with ``z`` the standard normal
    quantile at ``confidence`` (1.645 at 0.95).

    Examples
    --------
    >>> d = delong_difference([0, 0, 0, 1, 1, 1], [0.1, 0.2, 0.3, 0.7, 0.8, 0.9], [0.1, 0.5, 0.3, 0.4, 0.8, 0.9])
    >>> round(d.candidate, 4), round(d.reference, 4), round(d.difference, 4)
    (1.0, 0.8889, 0.1111)
    """
    _check_confidence(confidence)
    aucs, cov = delong_covariance(labels, [candidate, reference])
    var = max(float(cov[0, 0] + cov[1, 1] - 2.0 * cov[0, 1]), 0.0)
    se = var ** 0.5
    diff = float(aucs[0] - aucs[1])
    return PairedDifference("roc_auc", "delong", float(aucs[0]), float(aucs[1]), diff,
                            diff - float(stats.norm.ppf(confidence)) * se, confidence, se=se)


def _check_confidence(confidence: float) -> None:
    if not 0.5 <= confidence < 1.0:
        raise ValueError(f"confidence must be in [0.5, 1), got {confidence!r}")


def weighted_recall_at_fpr(labels, scores, weights, fpr: float) -> np.ndarray:
    """Recall at a false-positive rate of each row of ``weights`` (row multiplicities).

    The highest true-positive rate among thresholds whose false-positive rate
    is ``<= fpr``, a row counted ``weights[b, i]`` times in round ``b``; a
    comment is flagged when its score is >= the threshold, so tied scores
    are flagged together.  With all weights 1 this is
    :func:`model.evaluation.recall_at_fpr`.

    Parameters
    ----------
    labels : array-like (n,) of 0/1.
    scores : array-like (n,).
    weights : array-like (b, n) of non-negative multiplicities.
    fpr : the false-positive rate.

    Returns
    -------
    np.ndarray (b,)
    """
    y = np.asarray(labels).astype(bool)
    s = np.asarray(scores, dtype=np.float64)
    w = np.atleast_2d(np.asarray(weights, dtype=np.float64))
    order = np.argsort(-s, kind="stable")
    s_sorted = s[order]
    ends = np.flatnonzero(np.append(s_sorted[1:] != s_sorted[:-1], True))  # last row of each tie group
    w = w[:, order]
    spam = y[order]
    tp = np.cumsum(w * spam, axis=1)[:, ends]
    fp = np.cumsum(w * ~spam, axis=1)[:, ends]
    n_spam, n_ham = tp[:, -1:], fp[:, -1:]
    ok = fp <= (fpr + 1e-12) * n_ham
    with np.errstate(invalid="ignore", divide="ignore"):
        recall = np.where(ok, tp, 0.0).max(axis=1) / n_spam[:, 0]
    return np.nan_to_num(recall)


def bootstrap_recall_difference(labels, candidate, reference, *, fpr: float, rounds: int = 2000,
                                confidence: float = 0.95, seed: int = 0) -> PairedDifference:
    """Paired, stratified bootstrap of the recall-at-``fpr`` difference of two scorers.

    Every round draws the spam rows and the ham rows with replacement
    (class sizes kept) and evaluates both scorers on that same draw.
    ``lower`` is the ``1 - confidence`` quantile of the round differences;
    ``se`` their standard deviation.  Seeded: the same inputs give the same
    bound.
    """
    _check_confidence(confidence)
    if rounds < 1:
        raise ValueError(f"rounds must be >= 1, got {rounds!r}")
    a = np.asarray(candidate, dtype=np.float64)
    b = np.asarray(reference, dtype=np.float64)
    if a.shape != b.shape:
        raise DataError(f"bootstrap: {a.size} candidate scores but {b.size} reference scores")
    pos = _two_classes(labels, a.size, "bootstrap")
    spam_rows, ham_rows = np.flatnonzero(pos), np.flatnonzero(~pos)
    rng = np.random.default_rng(seed)
    block = max(1, _BLOCK_CELLS // a.size)
    diffs = []
    for start in range(0, rounds, block):
        size = min(block, rounds - start)
        w = np.zeros((size, a.size))
        w[:, spam_rows] = rng.multinomial(spam_rows.size, np.full(spam_rows.size, 1.0 / spam_rows.size), size=size)
        w[:, ham_rows] = rng.multinomial(ham_rows.size, np.full(ham_rows.size, 1.0 / ham_rows.size), size=size)
        diffs.append(weighted_recall_at_fpr(pos, a, w, fpr) - weighted_recall_at_fpr(pos, b, w, fpr))
    d = np.concatenate(diffs)
    ones = np.ones((1, a.size))
    rec_a = float(weighted_recall_at_fpr(pos, a, ones, fpr)[0])
    rec_b = float(weighted_recall_at_fpr(pos, b, ones, fpr)[0])
    return PairedDifference("recall_at_fpr", "paired bootstrap", rec_a, rec_b, rec_a - rec_b,
                            float(np.quantile(d, 1.0 - confidence)), confidence,
                            se=float(d.std(ddof=1)) if d.size > 1 else 0.0, rounds=rounds)
