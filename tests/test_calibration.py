"""Thresholds chosen on held-out ham to target false-positive rates."""
from __future__ import annotations

import numpy as np
import pytest

from model.calibration import DEFAULT_THRESHOLDS, Thresholds, calibrate, resolvable, threshold_for_fpr
from model.errors import DataError


def held_out(rng, n_ham=20_000, n_spam=2_000):
    ham = rng.beta(2, 8, size=n_ham)
    spam = rng.beta(8, 2, size=n_spam)
    scores = np.concatenate([ham, spam])
    labels = np.concatenate([np.zeros(n_ham, int), np.ones(n_spam, int)])
    return scores, labels


def flagged_share(ham, threshold):
    return float(np.mean(ham >= threshold))


@pytest.mark.parametrize("fpr", [0.001, 0.02, 0.1], ids=["0.1%", "2%", "10%"])
def test_threshold_flags_at_most_the_target_share_and_is_the_lowest_such(fpr):
    rng = np.random.default_rng(0)
    ham = rng.random(5_000)
    t = threshold_for_fpr(ham, fpr)
    assert flagged_share(ham, t) <= fpr
    # One notch lower lets the next ham through and breaks the target.
    lower = np.max(ham[ham < t])
    assert flagged_share(ham, lower) > fpr


def test_ties_never_push_the_rate_over_the_target():
    ham = np.array([0.9] * 5 + [0.1] * 95)
    t = threshold_for_fpr(ham, 0.02)
    assert flagged_share(ham, t) <= 0.02
    assert t > 0.9


def test_defaults_target_point_one_and_two_percent_of_ham():
    rng = np.random.default_rng(1)
    scores, labels = held_out(rng)
    t = calibrate(scores, labels)
    ham = scores[labels == 0]
    assert flagged_share(ham, t.reject) <= 0.001 < flagged_share(ham, np.max(ham[ham < t.reject]))
    assert flagged_share(ham, t.hold) <= 0.02 < flagged_share(ham, np.max(ham[ham < t.hold]))
    assert t.hold <= t.reject


def test_fresh_ham_from_the_same_distribution_stays_near_the_targets():
    rng = np.random.default_rng(2)
    t = calibrate(*held_out(rng, n_ham=50_000))
    fresh, labels = held_out(np.random.default_rng(3), n_ham=50_000)
    ham = fresh[labels == 0]
    assert flagged_share(ham, t.hold) == pytest.approx(0.02, abs=0.003)
    assert flagged_share(ham, t.reject) == pytest.approx(0.001, abs=0.0006)


def test_too_little_ham_to_measure_a_rate_falls_back_to_the_defaults():
    # 300 hams cannot measure 0.1 %; they can measure 2 %.
    assert not resolvable(300, 0.001) and resolvable(300, 0.02) and resolvable(1000, 0.001)
    rng = np.random.default_rng(4)
    scores, labels = held_out(rng, n_ham=300, n_spam=100)
    t = calibrate(scores, labels)
    ham = scores[labels == 0]
    assert t.reject == max(DEFAULT_THRESHOLDS.reject, float(np.nextafter(ham.max(), 1)))
    assert t.hold == threshold_for_fpr(ham, 0.02)


def test_custom_targets_and_fallback():
    rng = np.random.default_rng(5)
    scores, labels = held_out(rng, n_ham=200, n_spam=50)
    t = calibrate(scores, labels, reject_fpr=0.001, hold_fpr=0.05,
                  fallback=Thresholds(hold=0.2, reject=0.99))
    assert t.reject >= 0.99


@pytest.mark.parametrize(
    "kwargs, error, match",
    [
        ({"hold": 0.9, "reject": 0.5}, ValueError, "must not exceed"),
        ({"hold": -0.1, "reject": 0.5}, ValueError, "hold"),
        ({"hold": 0.1, "reject": 1.5}, ValueError, "reject"),
        ({"hold": float("nan"), "reject": 0.5}, ValueError, "hold"),
    ],
    ids=["hold-above-reject", "negative", "above-one", "nan"],
)
def test_thresholds_are_validated(kwargs, error, match):
    with pytest.raises(error, match=match):
        Thresholds(**kwargs)


def test_actions_and_overrides():
    t = Thresholds(hold=0.6, reject=0.95)
    assert t.actions(np.array([0.1, 0.6, 0.94, 0.95, 1.0])) == ["publish", "hold", "hold", "reject", "reject"]
    assert t.with_overrides(hold=0.5) == Thresholds(hold=0.5, reject=0.95)
    assert t.with_overrides() == t
    assert Thresholds.from_dict(t.to_dict()) == t
    with pytest.raises(ValueError, match="must not exceed"):
        t.with_overrides(hold=0.99)


def test_calibrate_needs_ham_and_consistent_targets():
    with pytest.raises(DataError, match="no ham"):
        calibrate(np.array([0.9, 0.8]), np.array([1, 1]))
    with pytest.raises(ValueError, match="must not exceed"):
        calibrate(np.array([0.1, 0.9]), np.array([0, 1]), reject_fpr=0.05, hold_fpr=0.01)


def test_classifier_calibrate_sets_and_stores_thresholds():
    from model.classifier import EmbeddingClassifier
    from test_network import small_corpus

    texts, labels = small_corpus()
    clf = EmbeddingClassifier(dim=3, min_df=1, validation_share=0.0).fit(texts, labels)
    t = clf.calibrate(texts, labels, reject_fpr=0.01, hold_fpr=0.02)
    assert clf.thresholds == t
    assert EmbeddingClassifier.from_bytes(clf.to_bytes()).thresholds == t
