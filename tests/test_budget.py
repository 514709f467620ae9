"""The size budget: every model file fits ``max_bytes``, training says what it
chose, a file that cannot fit is an error naming the setting, and files from
before the budget still load."""
from __future__ import annotations

import io
import json

import numpy as np
import pytest

from model import budget
from model.classifier import EmbeddingClassifier
from model.errors import ArtifactError, BudgetError
from model.evaluation import evaluate
from ops.bench.model import CommentMaker

from test_artifact import manifest_of, rewrite, set_manifest


@pytest.fixture(scope="module")
def corpus():
    maker = CommentMaker(seed=11)
    train = maker.batch(1200)
    test = maker.batch(400)
    return train, test


@pytest.fixture(scope="module")
def unbudgeted(corpus):
    (x, y), _ = corpus
    return EmbeddingClassifier(max_bytes=None, seed=0).fit(x, y)


def size(clf) -> int:
    return len(clf.to_bytes())


def test_without_a_budget_training_keeps_the_rule_and_the_cut_of_two(unbudgeted):
    assert unbudgeted.min_df_ == budget.CUT_START
    assert unbudgeted.dim_ == unbudgeted.budget_["rule_dim"] > budget.DIM_FLOOR
    assert unbudgeted.budget_["steps"] == [] and unbudgeted.budget_["pruned_by"] is None


def test_the_default_levers_bring_the_file_under_the_budget_and_are_reported(corpus, unbudgeted):
    (x, y), (tx, ty) = corpus
    limit = size(unbudgeted) // 3
    clf = EmbeddingClassifier(max_bytes=limit, seed=0).fit(x, y)
    data = clf.to_bytes()
    assert len(data) <= limit
    chosen = clf.budget_
    assert chosen["max_bytes"] == limit and chosen["rule_dim"] == unbudgeted.dim_
    assert chosen["steps"] and (clf.min_df_ > budget.CUT_START or clf.dim_ < unbudgeted.dim_)
    assert chosen["min_df"] == clf.min_df_ and chosen["dim"] == clf.dim_
    # The file carries what was chosen, and a warm start uses the same cut.
    loaded = EmbeddingClassifier.from_bytes(data)
    assert loaded.min_df_ == clf.min_df_ and loaded.budget_ == clf.budget_ and loaded.max_bytes == limit
    assert evaluate(ty, loaded.predict_proba_many(tx))["roc_auc"] > 0.95


def test_fixed_settings_are_kept_and_the_weakest_rows_are_pruned(corpus):
    (x, y), (tx, ty) = corpus
    params = dict(dim=8, min_df=2, seed=0)
    free = EmbeddingClassifier(max_bytes=None, **params).fit(x, y)
    limit = int(size(free) * 0.6)
    clf = EmbeddingClassifier(max_bytes=limit, **params).fit(x, y)
    assert size(clf) <= limit
    assert (clf.dim_, clf.min_df_) == (8, 2) and clf.budget_["steps"] == []
    trained, kept = clf.budget_["rows_trained"], clf.budget_["rows_kept"]
    assert clf.budget_["pruned_by"] == "row_norm" and budget.MIN_KEPT_SHARE * trained <= kept < trained
    # Training is deterministic up to the pruning, so the rows kept are the
    # unbudgeted model's rows with the largest L2 norms.
    rows = np.flatnonzero(free._touched)
    norms = np.linalg.norm(free._weights.table[rows], axis=1)
    strongest = rows[np.argsort(-norms, kind="stable")[:kept]]
    assert set(np.flatnonzero(clf._touched).tolist()) == set(strongest.tolist())
    assert evaluate(ty, clf.predict_proba_many(tx))["roc_auc"] > 0.95


def test_a_budget_below_the_manifest_and_head_is_an_error_naming_max_bytes(corpus):
    (x, y), _ = corpus
    with pytest.raises(BudgetError, match=r"max_bytes=3000.*raise max_bytes \(seawall train --max-bytes\)"):
        EmbeddingClassifier(max_bytes=3000, hidden=64, dim=32, seed=0).fit(x, y)


def test_fixed_settings_that_would_lose_most_rows_are_an_error_naming_them(corpus, unbudgeted):
    (x, y), _ = corpus
    with pytest.raises(BudgetError, match=r"lower dim \(--dim\) or raise min_df \(--min-df\)"):
        EmbeddingClassifier(max_bytes=size(unbudgeted) // 4, dim=64, min_df=1, seed=0).fit(x, y)


def test_a_warm_start_prunes_back_under_the_budget(corpus, unbudgeted):
    (x, y), _ = corpus
    limit = size(unbudgeted) // 2
    clf = EmbeddingClassifier(max_bytes=limit, seed=0).fit(x, y)
    fresh = CommentMaker(seed=99)  # another invented vocabulary: new buckets get rows
    more_x, more_y = fresh.batch(800)
    clf.learn_many(more_x, more_y, epochs=2)
    assert size(clf) <= limit
    assert clf.budget_["rows_trained"] > clf.budget_["rows_kept"] == clf.summary_["rows"]


def test_an_artifact_from_before_the_budget_loads_and_warm_starts(corpus):
    (x, y), (tx, _) = corpus
    old = EmbeddingClassifier(dim=4, min_df=2, max_bytes=None, seed=0).fit(x[:400], y[:400])

    def as_before_the_budget(arrays):
        manifest = manifest_of(arrays)
        del manifest["min_df"], manifest["budget"], manifest["params"]["max_bytes"]
        set_manifest(arrays, manifest, reseal=True)

    blob = rewrite(old.to_bytes(), as_before_the_budget)
    loaded = EmbeddingClassifier.from_bytes(blob)
    assert loaded.min_df_ == 2 and loaded.max_bytes == 2**20  # the default budget applies from now on
    np.testing.assert_array_equal(loaded.predict_proba_many(tx), EmbeddingClassifier.from_bytes(old.to_bytes()).predict_proba_many(tx))
    loaded.learn_many(x[400:800], y[400:800], epochs=1)
    assert "max_bytes" in EmbeddingClassifier.from_bytes(loaded.to_bytes()).get_params()


def test_an_auto_cut_without_its_chosen_value_is_refused(corpus, unbudgeted):
    def drop_chosen_cut(arrays):
        manifest = manifest_of(arrays)
        del manifest["min_df"]
        set_manifest(arrays, manifest, reseal=True)

    with pytest.raises(ArtifactError, match="retrain the model"):
        EmbeddingClassifier.from_bytes(rewrite(unbudgeted.to_bytes(), drop_chosen_cut))


def test_a_model_rebuilt_from_get_params_trains_to_the_same_file(corpus):
    (x, y), _ = corpus
    first = EmbeddingClassifier(max_bytes=40_000, seed=0).fit(x[:600], y[:600])
    params = json.loads(json.dumps(first.get_params()))  # as a registry or a retrain stores them
    assert params["max_bytes"] == 40_000 and params["min_df"] == "auto"
    again = EmbeddingClassifier._from_params(params).fit(x[:600], y[:600])
    with np.load(io.BytesIO(first.to_bytes())) as a, np.load(io.BytesIO(again.to_bytes())) as b:
        for name in ("row_delta", "table_q", "table_scale"):
            np.testing.assert_array_equal(a[name], b[name])


@pytest.mark.parametrize("n_rows,limit,expected", [(1000, 5000, 490), (1000, 10**6, 1000), (10, 100, 0)],
                         ids=["linear", "all-fit", "only-the-fixed-part"])
def test_largest_fit_on_a_linear_size(n_rows, limit, expected):
    calls = []

    def size_of(k):
        calls.append(k)
        return 100 + 10 * k

    assert budget.largest_fit(size_of, n_rows, limit) == expected
    assert len(calls) <= 16


def test_largest_fit_on_a_size_that_is_not_linear():
    sizes = np.cumsum(np.random.default_rng(0).integers(1, 40, size=20_001))  # rows of uneven cost
    limit = int(sizes[12_345])
    found = budget.largest_fit(lambda k: int(sizes[k]), 20_000, limit)
    assert sizes[found] <= limit and found >= 12_345 - 20  # within a tenth of a percent of the rows


def test_largest_fit_refuses_when_nothing_fits():
    with pytest.raises(BudgetError):
        budget.largest_fit(lambda k: 1000 + k, 10, 999)


def test_plan_narrows_d_only_when_auto_and_never_below_the_floor():
    rows_at = budget.rows_by_cut(np.repeat([2, 3, 4, 5, 6, 7, 8], 100_000))
    p = budget.plan(rows_at, rule_dim=30, dim="auto", min_df=3, max_bytes=2**20)
    assert p.min_df == 3 and p.dim == budget.DIM_FLOOR and all(s.startswith("dim") for s in p.steps)
    p = budget.plan(rows_at, rule_dim=30, dim=12, min_df="auto", max_bytes=2**20)
    assert p.dim == 12 and p.min_df > budget.CUT_FIRST
    assert budget.estimate_bytes(rows_at(p.min_df), 12) <= budget.PLAN_SHARE * (2**20 - budget.HEADROOM)
