"""The network and its training: gradients, sparse updates, one update routine, determinism."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from model import network, training
from model.classifier import EmbeddingClassifier, auto_dim
from model.errors import DataError

SPAM = [
    "win a free prize now at prize.example",
    "free casino spins, claim your bonus today",
    "cheap pills, order now, limited offer",
    "click here to claim your free reward",
]
HAM = [
    "the council meeting moved to thursday",
    "thanks for the notes on the garden plan",
    "does anyone know when the library opens",
    "great photo of the harbour this morning",
]


def small_corpus(repeat: int = 6):
    texts = (SPAM + HAM) * repeat
    labels = ([1] * len(SPAM) + [0] * len(HAM)) * repeat
    return texts, labels


def random_batch(rng, n=5, buckets=12, dtype=np.float64) -> sp.csr_matrix:
    dense = (rng.random((n, buckets)) < 0.3) * rng.random((n, buckets))
    dense[:, 0] += 0.1  # no empty row
    dense /= dense.sum(axis=1, keepdims=True)
    return sp.csr_matrix(dense.astype(dtype))


def loss_of(weights: training.Weights, batch, y, w) -> float:
    loss, *_ = training.batch_gradients(weights, batch, y, w)
    return loss


@pytest.mark.parametrize("hidden", [0, 4], ids=["linear-head", "hidden-layer"])
def test_backward_matches_finite_differences(hidden):
    # Central differences on the float64 loss; the analytic gradient must agree
    # to ~1e-6 relative for every table row the batch touches and every head weight.
    rng = np.random.default_rng(3)
    buckets, dim = 12, 3
    batch = random_batch(rng, buckets=buckets)
    y = np.array([1, 0, 1, 0, 0], dtype=np.float64)
    w = np.array([2.0, 1.0, 2.0, 1.0, 1.0])
    head = {k: v.astype(np.float64) for k, v in network.init_head(dim, hidden, rng).items()}
    if hidden:
        head["b1"][:] = 0.3  # keep ReLU units away from their kink
    weights = training.Weights(rng.normal(size=(buckets, dim)), head)
    _, rows, d_rows, d_head = training.batch_gradients(weights, batch, y, w)

    eps = 1e-6
    numeric_rows = np.zeros_like(d_rows)
    for i, r in enumerate(rows):
        for j in range(dim):
            plus, minus = weights.copy(), weights.copy()
            plus.table[r, j] += eps
            minus.table[r, j] -= eps
            numeric_rows[i, j] = (loss_of(plus, batch, y, w) - loss_of(minus, batch, y, w)) / (2 * eps)
    np.testing.assert_allclose(d_rows, numeric_rows, rtol=1e-5, atol=1e-9)

    for key, value in weights.head.items():
        numeric = np.zeros_like(value)
        for idx in np.ndindex(value.shape):
            plus, minus = weights.copy(), weights.copy()
            plus.head[key][idx] += eps
            minus.head[key][idx] -= eps
            numeric[idx] = (loss_of(plus, batch, y, w) - loss_of(minus, batch, y, w)) / (2 * eps)
        np.testing.assert_allclose(d_head[key], numeric, rtol=1e-5, atol=1e-9, err_msg=key)


def test_gradient_exists_only_for_touched_rows():
    rng = np.random.default_rng(0)
    batch = sp.csr_matrix(np.array([[0.5, 0, 0, 0.5, 0, 0], [0, 0, 0, 1.0, 0, 0]]))
    weights = training.Weights(rng.normal(size=(6, 2)), network.init_head(2, 0, rng))
    _, rows, d_rows, _ = training.batch_gradients(weights, batch, np.array([1.0, 0.0]), np.ones(2))
    assert rows.tolist() == [0, 3]
    assert d_rows.shape == (2, 2)


def test_sparse_update_changes_only_the_rows_a_batch_touches():
    rng = np.random.default_rng(1)
    buckets, dim = 40, 4
    weights = training.Weights(np.zeros((buckets, dim), np.float32), network.init_head(dim, 0, rng))
    opt = training.Optimizer(0.05)
    # Warm up so that every row has non-zero weights and moments.
    everything = sp.csr_matrix(np.full((2, buckets), 1.0 / buckets, dtype=np.float32))
    for _ in range(3):
        training.update(weights, opt, everything, np.array([1.0, 0.0]), np.ones(2))
    table, m, v = weights.table.copy(), opt.m_table.copy(), opt.v_table.copy()
    batch = random_batch(rng, n=3, buckets=buckets, dtype=np.float32)
    touched = np.unique(batch.indices)
    training.update(weights, opt, batch, np.array([1.0, 0.0, 1.0]), np.ones(3))
    untouched = np.setdiff1d(np.arange(buckets), touched)
    assert untouched.size > 0
    for before, after in ((table, weights.table), (m, opt.m_table), (v, opt.v_table)):
        np.testing.assert_array_equal(after[untouched], before[untouched])
        assert np.all(np.any(after[touched] != before[touched], axis=1))


def test_learn_one_sequence_equals_learn_many_with_batches_of_one():
    texts, labels = small_corpus(2)
    base = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, epochs=2, seed=5, batch_size=1, shuffle=False)
    base.fit(texts, labels)
    more = ["free prize casino bonus", "the garden meeting notes", "claim your free spins now"]
    more_labels = [1, 0, 1]
    one = EmbeddingClassifier.from_bytes(base.to_bytes())
    many = EmbeddingClassifier.from_bytes(base.to_bytes())
    for t, y in zip(more, more_labels):
        one.learn_one(t, y)
    many.learn_many(more, more_labels, epochs=1)
    np.testing.assert_array_equal(one._weights.table, many._weights.table)
    for k in one._weights.head:
        np.testing.assert_array_equal(one._weights.head[k], many._weights.head[k])
    np.testing.assert_array_equal(one.predict_proba_many(more), many.predict_proba_many(more))


def test_fit_runs_the_same_update_routine_as_direct_updates():
    # fit == run_epochs over update(): replaying update() by hand on the same
    # order gives bit-identical weights.
    rng = np.random.default_rng(7)
    m = random_batch(rng, n=6, buckets=20, dtype=np.float32)
    y = np.array([1, 0, 1, 0, 1, 0], dtype=np.float64)
    w = np.ones(6)
    head = network.init_head(3, 0, np.random.default_rng(1))
    a = training.Weights(np.zeros((20, 3), np.float32), {k: v.copy() for k, v in head.items()})
    b = a.copy()
    training.run_epochs(a, training.Optimizer(0.01), m, y, w, epochs=2, batch_size=2,
                        rng=np.random.default_rng(0), shuffle=False)
    opt = training.Optimizer(0.01)
    for _ in range(2):
        for s in range(0, 6, 2):
            training.update(b, opt, m[s:s + 2], y[s:s + 2], w[s:s + 2])
    np.testing.assert_array_equal(a.table, b.table)


def test_learn_many_gives_new_tokens_rows_and_learns_them():
    texts, labels = small_corpus()
    clf = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, seed=1).fit(texts, labels)
    wave = ["zorblat quexmoney offer", "quexmoney zorblat deal", "zorblat quexmoney now"] * 3
    rows_before = clf.summary_["rows"]
    before = clf.predict_proba_one("zorblat quexmoney")
    clf.learn_many(wave + HAM, [1] * len(wave) + [0] * len(HAM), epochs=30)
    assert clf.summary_["rows"] > rows_before
    assert clf.predict_proba_one("zorblat quexmoney") > before + 0.2


def test_same_seed_same_model_other_seed_other_model():
    texts, labels = small_corpus()

    def trained(seed):
        return EmbeddingClassifier(dim=4, min_df=1, seed=seed, validation_share=0.25).fit(texts, labels)

    a, b, c = trained(3), trained(3), trained(4)
    np.testing.assert_array_equal(a._weights.table, b._weights.table)
    assert a.summary_["best_epoch"] == b.summary_["best_epoch"]
    assert not np.array_equal(a._weights.table, c._weights.table)


def test_auto_dim_follows_the_fourth_root_rule():
    # Rule of thumb (common practice): d ≈ distinct tokens ** 0.25; 2,000 -> 7.
    assert auto_dim(2000) == 7
    assert auto_dim(1) == 1
    syllables = [c + v for c in "bdfgklmnprstvz" for v in "aeiou"]
    words = [a + b for a in syllables for b in syllables][:2000]
    texts = [" ".join(words[i:i + 20]) for i in range(0, 2000, 20)]
    labels = [i % 2 for i in range(len(texts))]
    clf = EmbeddingClassifier(bigrams=False, min_df=1, epochs=1, validation_share=0.0).fit(texts, labels)
    assert clf.summary_["distinct_tokens"] == 2000
    assert clf.dim_ == 7


def test_one_bucket_forces_collisions_and_still_works():
    texts, labels = small_corpus()
    clf = EmbeddingClassifier(buckets=1, dim=2, min_df=1, validation_share=0.0).fit(texts, labels)
    scores = clf.predict_proba_many(texts)
    assert scores.shape == (len(texts),) and np.all(np.isfinite(scores))
    assert clf.summary_["rows"] == 1


def test_generator_input_and_empty_comment():
    texts, labels = small_corpus()
    clf = EmbeddingClassifier(dim=3, min_df=1, validation_share=0.0).fit(iter(texts), iter(labels))
    scores, reasons = clf.score_many(t for t in ["", "free prize", "   "])
    assert scores.shape == (3,)
    assert scores[0] == scores[2]  # no tokens: the bias alone
    assert reasons[0] == [] and reasons[2] == []
    assert clf.predict_proba_one("") == pytest.approx(float(scores[0]))


def test_learned_model_separates_the_classes():
    texts, labels = small_corpus()
    clf = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, seed=2).fit(texts, labels)
    scores = clf.predict_proba_many(texts)
    y = np.asarray(labels)
    assert scores[y == 1].min() > scores[y == 0].max()


@pytest.mark.parametrize(
    "params",
    [
        {"buckets": 1000},
        {"buckets": 0},
        {"dim": 0},
        {"dim": "wide"},
        {"epochs": 0},
        {"learning_rate": -1.0},
        {"validation_share": 0.7},
        {"class_weight": "heavy"},
        {"char_ngrams": (5, 3)},
        {"pooling": "max"},
        {"hidden": True},
        {"min_df": 0},
        {"min_df": "often"},
        {"max_bytes": 0},
        {"max_bytes": "1MB"},
        {"max_bytes": True},
    ],
    ids=lambda p: "-".join(f"{k}={v}" for k, v in p.items()),
)
def test_constructor_rejects_bad_values_naming_field_and_value(params):
    (name, value), = params.items()
    with pytest.raises(ValueError) as err:
        EmbeddingClassifier(**params)
    assert name in str(err.value) and repr(value) in str(err.value)


def test_constructor_is_keyword_only_and_rejects_unknown_names():
    with pytest.raises(TypeError):
        EmbeddingClassifier(8)  # noqa
    with pytest.raises(TypeError, match="colour"):
        EmbeddingClassifier(colour="blue")


@pytest.mark.parametrize(
    "texts, labels, match",
    [
        ([], [], "no training data"),
        (["a", "b"], [1, 1], "single class"),
        (["a", "b"], [1], "one label per text"),
        (["a", "b"], [1, 2], "0 \\(ham\\) or 1 \\(spam\\)"),
        ("free prize", [1], "not one string"),
    ],
    ids=["empty", "single-class", "length-mismatch", "bad-label", "bare-string"],
)
def test_fit_rejects_unusable_data(texts, labels, match):
    with pytest.raises(DataError, match=match):
        EmbeddingClassifier().fit(texts, labels)


def test_scoring_an_untrained_model_is_an_error():
    with pytest.raises(DataError, match="not trained"):
        EmbeddingClassifier().predict_proba_one("hello")


def test_features_built_in_chunks_equal_one_pass():
    texts, labels = small_corpus(2)
    clf = EmbeddingClassifier(dim=2, min_df=1, validation_share=0.0, epochs=1).fit(texts, labels)
    seen_chunked: list = []
    chunked = clf._matrix(texts, seen_chunked, chunk=3)
    whole = clf._matrix(texts, chunk=10_000)
    assert (chunked != whole).nnz == 0 and chunked.shape == whole.shape
    assert clf._distinct(seen_chunked) == clf.summary_["distinct_tokens"]
