"""Calibrated probabilities, and thresholds that are the stricter of a false-positive-rate target and a floor.

Outside checks: Platt scaling against scikit-learn's ``CalibratedClassifierCV(method="sigmoid")``
(Platt 1999, as scikit-learn implements it) on the same held-out data, and isotonic regression
against scikit-learn's ``IsotonicRegression``.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from model.calibration import (DEFAULT_THRESHOLDS, IDENTITY, HeldOutHam, ProbabilityMap, Thresholds, ThresholdTargets,
                               calibrate, choose_thresholds, fit_probability_map, resolvable, threshold_for_fpr)
from model.errors import DataError


def held_out(rng, n_ham=20_000, n_spam=2_000):
    ham = rng.beta(2, 8, size=n_ham)
    spam = rng.beta(8, 2, size=n_spam)
    scores = np.concatenate([ham, spam])
    labels = np.concatenate([np.zeros(n_ham, int), np.ones(n_spam, int)])
    return scores, labels


def flagged_share(ham, threshold):
    return float(np.mean(ham >= threshold))


NO_FLOORS = Thresholds(hold=0.0, reject=0.0)


# --- thresholds: the target ---------------------------------------------------------------------

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


def test_without_floors_the_defaults_target_point_one_and_two_percent_of_ham():
    rng = np.random.default_rng(1)
    scores, labels = held_out(rng)
    t = calibrate(scores, labels, fallback=NO_FLOORS)
    ham = scores[labels == 0]
    assert flagged_share(ham, t.reject) <= 0.001 < flagged_share(ham, np.max(ham[ham < t.reject]))
    assert flagged_share(ham, t.hold) <= 0.02 < flagged_share(ham, np.max(ham[ham < t.hold]))
    assert t.hold <= t.reject


def test_fresh_ham_from_the_same_distribution_stays_near_the_targets():
    rng = np.random.default_rng(2)
    t = calibrate(*held_out(rng, n_ham=50_000), fallback=NO_FLOORS)
    fresh, labels = held_out(np.random.default_rng(3), n_ham=50_000)
    ham = fresh[labels == 0]
    assert flagged_share(ham, t.hold) == pytest.approx(0.02, abs=0.003)
    assert flagged_share(ham, t.reject) == pytest.approx(0.001, abs=0.0006)


@pytest.mark.parametrize("n", [1, 7, 300, 1_000, 4_000, 100_000], ids=lambda n: f"{n}-hams")
def test_the_kept_ham_tail_never_flags_more_than_the_target(n):
    # Up to 1,024 ranks are kept exactly; above, a target between two kept ranks uses the stricter one.
    ham_scores = np.random.default_rng(n).random(n)
    ham = HeldOutHam.from_scores(ham_scores)
    assert len(ham.ranks) <= 2_049
    for fpr in (0.0005, 0.001, 0.0123, 0.02, 0.1, 0.5):
        exact = threshold_for_fpr(ham_scores, fpr)
        kept = ham.threshold_for(fpr)
        assert flagged_share(ham_scores, kept) <= fpr
        assert exact <= kept <= exact + 0.01 + 1e-6
        if int(fpr * n) < 1024:
            assert kept == pytest.approx(exact, abs=2e-6)  # exact, up to the 6-decimal rounding (upwards)
    assert HeldOutHam.from_dict(ham.to_dict()) == ham


# --- thresholds: the floors ------------------------------------------------------------------------

def test_a_separable_held_out_set_leaves_the_thresholds_at_their_floors_and_says_so():
    # The failure this guards against: 2 % of ham far below every spam put the hold threshold near 0.
    ham = HeldOutHam.from_scores(np.linspace(0.0001, 0.03, 2_000))
    choice = choose_thresholds(ham)
    assert choice.hold.from_target < 0.03 and choice.reject.from_target < 0.031
    assert choice.thresholds == Thresholds(hold=0.5, reject=0.9)
    assert choice.hold.at_floor and choice.reject.at_floor
    warnings = choice.warnings()
    assert len(warnings) == 2 and all("sits at its floor" in w for w in warnings)


def test_a_target_above_its_floor_wins():
    ham_scores = np.random.default_rng(5).beta(6, 2, size=5_000)  # ham that overlaps spam
    choice = choose_thresholds(HeldOutHam.from_scores(ham_scores))
    assert choice.hold.value == choice.hold.from_target > 0.5
    assert choice.reject.value == choice.reject.from_target > 0.9
    assert flagged_share(ham_scores, choice.hold.value) <= 0.02
    assert choice.warnings() == []


def test_too_little_ham_to_measure_a_rate_is_said_and_the_floor_still_holds():
    # 300 hams cannot measure 0.1 %; they can measure 2 %.
    assert not resolvable(300, 0.001) and resolvable(300, 0.02) and resolvable(1000, 0.001)
    rng = np.random.default_rng(4)
    scores, labels = held_out(rng, n_ham=300, n_spam=100)
    ham = scores[labels == 0]
    choice = choose_thresholds(HeldOutHam.from_scores(ham))
    assert choice.reject.value == pytest.approx(max(DEFAULT_THRESHOLDS.reject, threshold_for_fpr(ham, 0.001)), abs=2e-6)
    assert not choice.reject.measurable and choice.hold.measurable
    assert any("300 held-out hams are too few to measure a 0.10% false-positive rate (that needs 1000)" in w
               for w in choice.warnings())
    assert calibrate(scores, labels) == choice.thresholds


def test_custom_targets_and_floors():
    rng = np.random.default_rng(5)
    scores, labels = held_out(rng, n_ham=2_000, n_spam=50)
    t = calibrate(scores, labels, reject_fpr=0.001, hold_fpr=0.05, fallback=Thresholds(hold=0.2, reject=0.99))
    ham = scores[labels == 0]
    assert t.reject >= 0.99
    assert t.hold == pytest.approx(max(0.2, threshold_for_fpr(ham, 0.05)), abs=2e-6)  # kept to 6 decimals, upwards


def test_a_model_without_held_out_ham_uses_its_stored_thresholds_under_the_floors():
    choice = choose_thresholds(None, ThresholdTargets(hold_floor=0.6), stored=Thresholds(hold=0.3, reject=0.95))
    assert choice.thresholds == Thresholds(hold=0.6, reject=0.95)
    assert "no held-out ham" in choice.warnings()[0]


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"hold_fpr": 0.0}, "hold_fpr"),
        ({"reject_fpr": 0.6}, "reject_fpr"),
        ({"hold_floor": 1.5}, "hold_floor"),
        ({"hold_fpr": 0.001, "reject_fpr": 0.01}, "must not exceed"),
        ({"hold_floor": 0.95, "reject_floor": 0.9}, "must not exceed"),
        ({"reject_floor": True}, "reject_floor"),
    ],
    ids=["zero-rate", "rate-above-half", "floor-above-one", "rates-crossed", "floors-crossed", "bool"],
)
def test_targets_are_validated(kwargs, match):
    with pytest.raises(ValueError, match=match):
        ThresholdTargets(**kwargs)


@pytest.mark.parametrize(
    "kwargs, error, match",
    [
        ({"hold": 0.9, "reject": 0.5}, ValueError, "must not exceed"),
        ({"hold": -0.1, "reject": 0.5}, ValueError, "hold"),
        ({"hold": 0.1, "reject": 1.5}, ValueError, "reject"),
        ({"hold": float("nan"), "reject": 0.5}, ValueError, "hold"),
        ({"hold": True, "reject": 0.5}, ValueError, "hold"),
        ({"hold": 0.1, "reject": "0.9"}, ValueError, "reject"),
    ],
    ids=["hold-above-reject", "negative", "above-one", "nan", "bool", "string"],
)
def test_thresholds_are_validated(kwargs, error, match):
    with pytest.raises(error, match=match):
        Thresholds(**kwargs)


def test_overrides_and_dict_round_trip():
    t = Thresholds(hold=0.6, reject=0.95)
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


# --- probability maps -------------------------------------------------------------------------------

def noisy_log_odds(seed=0, n=600):
    """Held-out raw log-odds of an over-confident model: separated, with a few errors."""
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(int)
    z = np.where(y == 1, rng.normal(6.0, 3.0, n), rng.normal(-7.0, 3.0, n))
    return z, y


def test_platt_scaling_matches_scikit_learn_sigmoid_calibration():
    # Outside check: scikit-learn's CalibratedClassifierCV(method="sigmoid") on a frozen
    # estimator (sklearn >= 1.6; cv="prefit" before), fitted on the same held-out data.
    from sklearn.base import BaseEstimator, ClassifierMixin
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.frozen import FrozenEstimator

    class Given(ClassifierMixin, BaseEstimator):
        def fit(self, X, y):
            self.classes_ = np.array([0, 1])
            return self

        def decision_function(self, X):
            return np.asarray(X, dtype=np.float64)[:, 0]

        def predict(self, X):
            return (self.decision_function(X) > 0).astype(int)

    for seed in range(3):
        z, y = noisy_log_odds(seed)
        ref = CalibratedClassifierCV(FrozenEstimator(Given().fit(None, None)), method="sigmoid").fit(z[:, None], y)
        ours = fit_probability_map(z, y, "platt")
        grid = np.linspace(-25, 25, 501)
        np.testing.assert_allclose(ours.probability(grid), ref.predict_proba(grid[:, None])[:, 1], atol=1e-9)


def test_temperature_scaling_minimises_the_smoothed_log_loss():
    z, y = noisy_log_odds(3)
    m = fit_probability_map(z, y, "temperature")
    assert m.intercept == 0.0 and m.probability(np.array([0.0]))[0] == 0.5  # the decision point stays put
    n1, n0 = y.sum(), y.size - y.sum()
    t = np.where(y == 1, (n1 + 1) / (n1 + 2), 1 / (n0 + 2))

    def loss(beta):
        return float(np.sum(np.logaddexp(0.0, beta * z) - t * beta * z))

    grid = np.exp(np.linspace(-4, 2, 4001))
    best = grid[np.argmin([loss(b) for b in grid])]
    assert m.slope == pytest.approx(best, rel=2e-3)
    assert loss(m.slope) <= min(loss(b) for b in grid) + 1e-9


def test_isotonic_matches_scikit_learn_isotonic_regression():
    # Outside check: scikit-learn's IsotonicRegression with the same bounds (Platt's smoothed targets).
    from sklearn.isotonic import IsotonicRegression

    z, y = noisy_log_odds(4)
    z = np.round(z, 1)  # ties in the log-odds
    m = fit_probability_map(z, y, "isotonic")
    n1, n0 = y.sum(), y.size - y.sum()
    ref = IsotonicRegression(y_min=1 / (n0 + 2), y_max=(n1 + 1) / (n1 + 2), out_of_bounds="clip").fit(z, y)
    grid = np.linspace(z.min() - 3, z.max() + 3, 997)
    np.testing.assert_allclose(m.probability(grid), ref.predict(grid), atol=1e-12)
    assert np.all(np.diff(m.probability(grid)) >= 0)


@pytest.mark.parametrize("method", ["platt", "temperature", "isotonic"])
def test_every_map_rises_with_the_score_and_stays_off_zero_and_one(method):
    z, y = noisy_log_odds(5)
    m = fit_probability_map(z, y, method)
    grid = np.linspace(-200, 200, 4001)
    p = m.probability(grid)
    assert np.all(np.diff(p) >= 0)
    assert ProbabilityMap.from_dict(m.to_dict()) == m
    if method != "isotonic":
        assert m.contribution_scale == m.slope
    if method == "isotonic":
        n1, n0 = y.sum(), y.size - y.sum()
        assert p.min() >= 1 / (n0 + 2) - 1e-12 and p.max() <= (n1 + 1) / (n1 + 2) + 1e-12


def test_a_model_that_ranks_spam_below_ham_is_not_calibrated():
    z, y = noisy_log_odds(6)
    with pytest.raises(DataError, match="does not score above the ham"):
        fit_probability_map(-z, y, "platt")
    with pytest.raises(DataError, match="both spam and ham"):
        fit_probability_map(z[y == 1], y[y == 1])
    with pytest.raises(ValueError, match="method"):
        fit_probability_map(z, y, "magic")


# --- the classifier ------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def trained():
    from ops.lab.communities import CommunityScenario
    from model.classifier import EmbeddingClassifier

    rows = CommunityScenario("sq", seed=1).labelled(1500)
    return EmbeddingClassifier(seed=0, epochs=4).fit([c.text for c in rows], [c.label for c in rows])


@pytest.fixture(scope="module")
def held():
    from ops.lab.communities import CommunityScenario

    rows = CommunityScenario("sq", seed=2).labelled(400)
    return [c.text for c in rows], [c.label for c in rows]


def test_fit_calibrates_on_its_held_out_share_and_scores_are_calibrated(trained, held):
    from model import network

    texts, _ = held
    cal = trained.calibration_
    assert cal.method == "temperature" and cal.n_ham + cal.n_spam == trained.summary_["n_validation"]
    assert trained.held_out_ham_.n == cal.n_ham
    assert trained.thresholds == trained.threshold_choice().thresholds
    logits = trained.logits_many(texts)
    np.testing.assert_allclose(trained.predict_proba_many(texts), cal.probability(logits), atol=1e-12)
    assert not np.allclose(trained.predict_proba_many(texts), network.sigmoid(logits))
    # the one-comment path too
    assert trained.predict_proba_one(texts[0]) == pytest.approx(float(cal.probability(logits[:1])[0]), abs=1e-12)


def test_classifier_platt_matches_scikit_learn_on_the_same_held_out_comments(trained, held):
    # Outside check: scikit-learn's CalibratedClassifierCV(method="sigmoid") around the same frozen
    # model (its raw log-odds as decision_function), fitted on the same held-out comments.
    from sklearn.base import BaseEstimator, ClassifierMixin
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.frozen import FrozenEstimator

    from model.classifier import EmbeddingClassifier

    texts, labels = held
    model = EmbeddingClassifier.from_bytes(trained.to_bytes())
    model.calibrate(texts, labels, method="platt")

    class RawLogOdds(ClassifierMixin, BaseEstimator):
        def fit(self, X, y):
            self.classes_ = np.array([0, 1])
            return self

        def decision_function(self, X):
            return model.logits_many([str(x) for x in X])

        def predict(self, X):
            return (self.decision_function(X) > 0).astype(int)

    ref = CalibratedClassifierCV(FrozenEstimator(RawLogOdds().fit(None, None)), method="sigmoid")
    ref.fit(np.asarray(texts, dtype=object), np.asarray(labels))
    from ops.lab.communities import CommunityScenario

    other = [c.text for c in CommunityScenario("lc", seed=3).labelled(300)]
    np.testing.assert_allclose(model.predict_proba_many(other), ref.predict_proba(np.asarray(other, dtype=object))[:, 1],
                               atol=1e-9)


def test_reasons_add_up_to_the_calibrated_log_odds(trained, held):
    from model.classifier import EmbeddingClassifier

    model = EmbeddingClassifier.from_bytes(trained.to_bytes())
    model.calibrate(*held, method="platt")
    texts = held[0][:40]
    scores, reasons = model.score_many(texts, top_k=10_000)
    cal = model.calibration_
    bias = float(model._stored[2]["b2"][0])
    for score, why in zip(scores, reasons):
        log_odds = math.log(score / (1 - score))
        assert sum(c for _, c in why) + cal.slope * bias + cal.intercept == pytest.approx(log_odds, abs=1e-6)


def test_calibration_and_held_out_ham_are_stored_in_the_manifest(trained):
    from model.classifier import EmbeddingClassifier

    loaded = EmbeddingClassifier.from_bytes(trained.to_bytes())
    stored = loaded.manifest["calibration"]
    assert stored["probability"]["method"] == "temperature"
    assert stored["held_out_ham"]["n"] == trained.held_out_ham_.n
    assert loaded.calibration_ == trained.calibration_ and loaded.held_out_ham_ == trained.held_out_ham_
    assert loaded.thresholds == trained.thresholds


def test_an_older_model_file_without_calibration_loads_with_identity(trained):
    from model import artifact, network
    from model.classifier import EmbeddingClassifier

    arrays, manifest = trained._arrays_and_manifest()
    del manifest["calibration"]
    manifest["thresholds"] = {"hold": 0.001, "reject": 0.9}  # what an older train stored
    old, _ = artifact.dumps(arrays, manifest)
    model = EmbeddingClassifier.from_bytes(old)
    assert model.calibration_ == IDENTITY and model.held_out_ham_ is None
    texts = ["See you at the meeting", "Cheap pills at pill-warehouse.invalid now"]
    np.testing.assert_allclose(model.predict_proba_many(texts), network.sigmoid(model.logits_many(texts)))
    choice = model.threshold_choice()
    assert choice.thresholds == Thresholds(hold=0.5, reject=0.9)  # the floors over the stored 0.001
    assert "no held-out ham" in choice.warnings()[0]


def test_classifier_calibrate_refits_the_map_and_the_thresholds(trained, held):
    from model.classifier import EmbeddingClassifier

    model = EmbeddingClassifier.from_bytes(trained.to_bytes())
    t = model.calibrate(*held, reject_fpr=0.01, hold_fpr=0.02, hold_floor=0.4, reject_floor=0.8, method="platt")
    assert model.calibration_.method == "platt" and model.thresholds == t
    assert model.held_out_ham_.n == sum(1 for y in held[1] if y == 0)
    assert t.hold >= 0.4 and t.reject >= 0.8
    reloaded = EmbeddingClassifier.from_bytes(model.to_bytes())
    assert reloaded.thresholds == t and reloaded.calibration_ == model.calibration_
    with pytest.raises(DataError, match="both spam and ham"):
        model.calibrate([held[0][i] for i, y in enumerate(held[1]) if y == 1][:20], [1] * 20)
    assert model.calibration_.method == "platt"  # a refused calibration changes nothing


def test_bench_calibration_compares_the_maps_beside_scikit_learn(capsys):
    import json

    from ops.cli import main

    assert main(["bench", "calibration", "--train", "300", "--held-out", "80", "--judge", "150", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["pairs"] == 12
    assert rows["sklearn_sigmoid_max_abs_difference"] < 1e-9  # scikit-learn's Platt scaling, same model and rows
    for method in ("identity", "platt", "temperature", "isotonic"):
        r = rows[method]
        assert 0 < r["log_loss"] <= r["log_loss_worst"] and 0 <= r["ordinary_flagged"] <= r["ordinary_flagged_worst"]
        assert r["ordinary_flagged_worst"] <= 0.10  # the floors keep other communities' ordinary comments published


@pytest.mark.parametrize("fitted", [
    ProbabilityMap(),
    ProbabilityMap(method="platt", slope=1.7, intercept=-0.4),
    ProbabilityMap(method="temperature", slope=0.6),
    ProbabilityMap(method="isotonic", knots_z=(-3.0, 0.0, 2.5), knots_p=(0.01, 0.4, 0.97)),
], ids=lambda m: m.method)
def test_one_logit_in_plain_floats_equals_the_array_route(fitted):
    # One comment's probability is computed without numpy arithmetic; it must
    # be the value the array route gives (a few values and many).
    z = np.concatenate([np.linspace(-40.0, 40.0, 161), [-800.0, 800.0, 1e-9, -0.0]])
    for v in z.tolist():
        one = fitted.probability(np.array([v]))
        assert one.shape == (1,) and one.dtype == np.float64
        assert float(one[0]) == fitted.probability_one(v) == float(fitted.probability(np.array([v, 0.0]))[0])
        listed = fitted.probability([v])  # the one-comment scoring path hands over a list of floats
        assert listed.shape == (1,) and listed.dtype == np.float64 and listed.tobytes() == one.tobytes()
        assert fitted.probability([v, 0.0]).tobytes() == fitted.probability(np.array([v, 0.0])).tobytes()
    assert math.isnan(fitted.probability_one(float("nan")))
