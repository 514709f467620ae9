"""Explanations: signed token contributions that are faithful to the score."""
from __future__ import annotations

import numpy as np
import pytest

from model import network
from model.classifier import EmbeddingClassifier

from test_network import HAM, SPAM, small_corpus

UNSEEN_SPAM = [
    "claim your free casino bonus now",
    "free prize, click here today",
    "cheap pills with a free reward, order now",
    "win free spins at prize.example today",
]


@pytest.fixture(scope="module")
def linear() -> EmbeddingClassifier:
    texts, labels = small_corpus(8)
    return EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, seed=3).fit(texts, labels)


@pytest.fixture(scope="module")
def hidden() -> EmbeddingClassifier:
    texts, labels = small_corpus(8)
    return EmbeddingClassifier(dim=4, hidden=6, min_df=1, validation_share=0.0, seed=3).fit(texts, labels)


def test_contributions_add_up_to_the_logit_with_a_linear_head(linear):
    texts = SPAM + HAM + UNSEEN_SPAM
    _, reasons = linear.score_many(texts, top_k=10_000)
    bias = float(linear._weights.head["b2"][0])
    for text, why, logit in zip(texts, reasons, linear.logits_many(texts)):
        assert sum(c for _, c in why) + bias == pytest.approx(logit, abs=1e-5), text


def test_contributions_add_up_to_the_logit_minus_active_biases_with_a_hidden_layer(hidden):
    texts = SPAM + HAM
    _, reasons = hidden.score_many(texts, top_k=10_000)
    head = hidden._weights.head
    feats = [hidden._tokenizer.features(t) for t in texts]
    bag = hidden._bag(hidden._encoder.tokens(feats))
    tables = hidden._scoring_tables()
    index, table = tables.index, tables.table
    pooled = bag.matrix(hidden.buckets) @ hidden._weights.table
    pre = pooled @ head["w1"] + head["b1"]
    active_bias = ((pre > 0) * head["b1"]) @ head["w2"] + head["b2"][0]
    for why, logit, extra in zip(reasons, hidden.logits_many(texts), active_bias):
        assert sum(c for _, c in why) + extra == pytest.approx(logit, abs=1e-4)


def test_reasons_are_sorted_by_magnitude_signed_and_name_real_tokens(linear):
    scores, reasons = linear.score_many(UNSEEN_SPAM + HAM, top_k=5)
    for text, why in zip(UNSEEN_SPAM + HAM, reasons):
        assert 0 < len(why) <= 5
        magnitudes = [abs(c) for _, c in why]
        assert magnitudes == sorted(magnitudes, reverse=True)
        assert all(tok in linear._tokenizer.features(text) for tok, _ in why)
    assert any(c > 0 for _, c in reasons[0])  # spam is explained by spam-ward tokens
    assert all(c < 0 for _, c in reasons[len(UNSEEN_SPAM)][:2])  # ham by ham-ward ones
    assert linear.explain_one(UNSEEN_SPAM[0], top_k=3) == reasons[0][:3]


@pytest.mark.parametrize("k", [1, 2, 3])
def test_removing_the_top_spamward_tokens_lowers_the_score(linear, k):
    # Faithfulness: delete the k tokens the explanation ranks most spam-ward
    # (every occurrence) and the score must drop.
    feats = [linear._tokenizer.features(t) for t in UNSEEN_SPAM + SPAM]
    scores, reasons = linear.score_features(feats, top_k=10_000)
    for tokens, score, why in zip(feats, scores, reasons):
        top = [tok for tok, c in why if c > 0][:k]
        assert top
        kept = [t for t in tokens if t not in set(top)]
        (new_score,), _ = linear.score_features([kept], top_k=0)
        assert new_score < score


def test_removing_spamward_words_from_the_text_lowers_the_score():
    texts, labels = small_corpus(8)
    clf = EmbeddingClassifier(dim=4, bigrams=False, min_df=1, validation_share=0.0, seed=1).fit(texts, labels)
    for text in UNSEEN_SPAM:
        score = clf.predict_proba_one(text)
        top = [tok for tok, c in clf.explain_one(text, top_k=2) if c > 0]
        shorter = " ".join(w for w in text.replace(",", " ").split() if w not in top)
        assert clf.predict_proba_one(shorter) < score


def test_unknown_tokens_are_not_reasons(linear):
    (_, why), = [(0, r) for r in linear.score_many(["zzqx wvvy"], top_k=5)[1]]
    assert why == []


def test_top_k_zero_skips_explanations(linear):
    scores, reasons = linear.score_many(SPAM, top_k=0)
    assert reasons == [[] for _ in SPAM]
    np.testing.assert_allclose(scores, linear.predict_proba_many(SPAM))
    assert np.all(network.sigmoid(linear.logits_many(SPAM)) == scores)


def test_the_one_comment_path_agrees_with_the_batch_path(linear):
    # score_many takes a pure-Python path for a handful of comments and a
    # vectorised one for more; both must give the same scores and reasons.
    from model import classifier

    texts = UNSEEN_SPAM + HAM + ["", "zzqx only unknown words"]
    assert len(texts) > classifier.FEW
    batch_scores, batch_reasons = linear.score_many(texts, top_k=4)
    for text, score, why in zip(texts, batch_scores, batch_reasons):
        (one_score,), (one_why,) = linear.score_many([text], top_k=4)
        assert one_score == pytest.approx(score, abs=1e-12)
        assert [t for t, _ in one_why] == [t for t, _ in why]
        np.testing.assert_allclose([c for _, c in one_why], [c for _, c in why], atol=1e-12)
