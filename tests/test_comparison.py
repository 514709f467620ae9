"""Paired comparisons of two scorers (model/comparison.py), checked against outside references.

* DeLong's AUC covariance: its variance of an AUC difference equals the
  two-sample jackknife variance of that difference, where each leave-one-out
  AUC is scikit-learn's ``roc_auc_score`` (reference library).  The identity
  is exact: leaving out spam row i moves the AUC to (m*AUC - V10_i)/(m - 1), so
  the jackknife sum over spam rows is sum((V10_i - AUC)^2)/(m(m - 1)) = S10/m,
  DeLong's term; the same holds for the ham rows (Hanley & Hajian-Tilaki 1997
  discuss the equivalence; cited from memory).
* A published worked example, from memory: Hanley & McNeil (1982), "The
  meaning and use of the area under a receiver operating characteristic
  (ROC) curve", Table 1, a radiologist's five-point ratings of 58 normal and 51
  abnormal CT images; area 0.893, standard error 0.032 by their formula.
* The recall at a fixed false-positive rate with row multiplicities matches
  ``sklearn.metrics.roc_curve`` on the rows repeated that many times.
"""
from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from model.comparison import (
    PairedDifference,
    bootstrap_recall_difference,
    delong_covariance,
    delong_difference,
    weighted_recall_at_fpr,
)
from model.errors import DataError
from model.evaluation import recall_at_fpr


def correlated_scorers(n: int, seed: int, *, gap: float = 0.0, decimals: int | None = 2):
    """Labels and two scorers sharing most of their noise (as an active model and its candidate do)."""
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(int)
    shared = rng.normal(0, 1, n)
    a = 1.2 * y + shared + 0.4 * rng.normal(0, 1, n)
    b = (1.2 - gap) * y + shared + 0.4 * rng.normal(0, 1, n)
    if decimals is not None:  # ties, as int8-quantized scores have
        a, b = np.round(a, decimals), np.round(b, decimals)
    return y, a, b


def jackknife_variance(y, a, b) -> float:
    """Two-sample jackknife variance of roc_auc(a) - roc_auc(b), each AUC from scikit-learn."""
    def diff(keep):
        return roc_auc_score(y[keep], a[keep]) - roc_auc_score(y[keep], b[keep])

    everything = np.arange(y.size)
    total = 0.0
    for cls in (1, 0):
        rows = np.flatnonzero(y == cls)
        leave_one_out = np.array([diff(np.delete(everything, i)) for i in rows])
        total += (rows.size - 1) / rows.size * float(((leave_one_out - leave_one_out.mean()) ** 2).sum())
    return total


@pytest.mark.parametrize("seed, decimals", [(0, None), (1, 2), (2, 1)], ids=["no-ties", "some-ties", "many-ties"])
def test_delong_matches_sklearn_aucs_and_the_jackknife_variance(seed, decimals):
    y, a, b = correlated_scorers(160, seed, gap=0.2, decimals=decimals)
    aucs, cov = delong_covariance(y, [a, b])
    assert aucs == pytest.approx([roc_auc_score(y, a), roc_auc_score(y, b)], abs=1e-12)
    d = delong_difference(y, a, b)
    assert d.se ** 2 == pytest.approx(jackknife_variance(y, a, b), rel=1e-9)
    assert cov[0, 1] == pytest.approx(cov[1, 0]) and cov[0, 1] > 0  # shared noise: positively correlated AUCs
    # The pairing is what makes the comparison precise: far tighter than two independent AUCs.
    assert d.se < 0.6 * (cov[0, 0] + cov[1, 1]) ** 0.5


def test_hanley_mcneil_worked_example():
    # Hanley & McNeil (1982), Table 1 (from memory): ratings 1 (definitely normal) .. 5 (definitely abnormal).
    normal = np.repeat([1, 2, 3, 4, 5], [33, 6, 6, 11, 2])
    abnormal = np.repeat([1, 2, 3, 4, 5], [3, 2, 2, 11, 33])
    y = np.r_[np.zeros(normal.size, int), np.ones(abnormal.size, int)]
    scores = np.r_[normal, abnormal].astype(float)
    aucs, cov = delong_covariance(y, [scores])
    assert round(float(aucs[0]), 3) == 0.893  # the published area
    # DeLong's nonparametric SE and the paper's exponential-model SE (0.032) are different
    # estimators of the same quantity; on this table they agree to within a tenth.
    assert float(cov[0, 0]) ** 0.5 == pytest.approx(0.032, rel=0.1)


def test_delong_se_agrees_with_a_paired_bootstrap_of_sklearn_aucs():
    y, a, b = correlated_scorers(300, 5, gap=0.1)
    d = delong_difference(y, a, b)
    rng = np.random.default_rng(0)
    spam, ham = np.flatnonzero(y == 1), np.flatnonzero(y == 0)
    diffs = []
    for _ in range(300):
        rows = np.r_[rng.choice(spam, spam.size), rng.choice(ham, ham.size)]
        diffs.append(roc_auc_score(y[rows], a[rows]) - roc_auc_score(y[rows], b[rows]))
    assert d.se == pytest.approx(np.std(diffs, ddof=1), rel=0.15)


def test_delong_lower_bound_has_its_stated_coverage():
    # Two scorers of equal quality: the one-sided 95% bound should exceed the true difference (0)
    # in about 5% of data sets.  Loose limits: 400 data sets give a binomial SE of about 1.1%.
    above = 0
    for seed in range(400):
        y, a, b = correlated_scorers(200, 1000 + seed, decimals=None)
        above += delong_difference(y, a, b, confidence=0.95).lower > 0
    assert 0.02 <= above / 400 <= 0.09


def test_delong_refuses_what_it_cannot_estimate():
    with pytest.raises(DataError, match="at least two spam and two ham"):
        delong_covariance([0, 0, 0, 1], [[0.1, 0.2, 0.3, 0.4]])
    with pytest.raises(DataError, match="3 labels but 4 scores"):
        delong_covariance([0, 1, 0], [[0.1, 0.2, 0.3, 0.4]])
    with pytest.raises(ValueError, match="confidence must be in"):
        delong_difference([0, 0, 1, 1], [0.1, 0.2, 0.3, 0.4], [0.1, 0.2, 0.3, 0.4], confidence=1.0)


@pytest.mark.parametrize("fpr", [0.0, 0.01, 0.05, 0.2], ids=["fpr-0", "fpr-1pct", "fpr-5pct", "fpr-20pct"])
def test_weighted_recall_at_fpr_matches_sklearn_roc_curve(fpr):
    y, a, _ = correlated_scorers(500, 3, decimals=1)
    assert weighted_recall_at_fpr(y, a, np.ones((1, y.size)), fpr)[0] == pytest.approx(recall_at_fpr(y, a, fpr))
    counts = np.random.default_rng(4).integers(0, 4, size=(3, y.size))
    for row in counts:  # a row counted k times = the row repeated k times (sklearn on the expanded data)
        expanded = np.repeat(np.arange(y.size), row)
        assert weighted_recall_at_fpr(y, a, row[None, :], fpr)[0] == pytest.approx(
            recall_at_fpr(y[expanded], a[expanded], fpr))


def test_bootstrap_of_recall_is_paired_seeded_and_one_sided():
    y, a, b = correlated_scorers(600, 7, gap=0.6)
    worse = bootstrap_recall_difference(y, b, a, fpr=0.05, rounds=500)
    assert worse.difference == pytest.approx(recall_at_fpr(y, b, 0.05) - recall_at_fpr(y, a, 0.05))
    assert worse.difference < 0 and worse.lower < worse.difference
    assert not worse.not_worse(0.02) and worse.rounds == 500
    assert bootstrap_recall_difference(y, b, a, fpr=0.05, rounds=500) == worse  # seeded
    same = bootstrap_recall_difference(y, a, a.copy(), fpr=0.05, rounds=200)
    assert (same.difference, same.lower, same.se) == (0.0, 0.0, 0.0) and same.not_worse(0.0)
    with pytest.raises(DataError, match="at least two spam"):
        bootstrap_recall_difference([1, 1, 0], [0.1, 0.2, 0.3], [0.1, 0.2, 0.3], fpr=0.1)
    with pytest.raises(ValueError, match="rounds must be"):
        bootstrap_recall_difference(y, a, b, fpr=0.1, rounds=0)


def test_not_worse_is_the_lower_bound_against_the_tolerance():
    d = PairedDifference("roc_auc", "delong", 0.99, 0.991, -0.001, -0.002, 0.95, se=0.0006)
    assert d.not_worse(0.002) and not d.not_worse(0.0019)
    assert d.to_dict() == {"figure": "roc_auc", "method": "delong", "candidate": 0.99, "reference": 0.991,
                           "difference": -0.001, "lower": -0.002, "confidence": 0.95, "se": 0.0006}
