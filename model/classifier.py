"""``EmbeddingClassifier``: the averaged-embedding spam scorer.

Text → tokens (:mod:`model.tokens`) → MurmurHash3 buckets, word pairs
hashed from their words' hashes (:mod:`model.features`, :mod:`model.hashing`)
→ the pooled mean of the buckets' embedding rows →
a small dense head → a spam probability.  Training is mini-batch Adam with
sparse updates (:mod:`model.training`); the model saves to one checksummed
int8 file (:mod:`model.artifact`) and carries its own hold and reject
thresholds (:mod:`model.calibration`).

Pooling.  ``pooling="mean"`` weighs each bucket by its share of the comment's
token occurrences (the plain mean).  ``pooling="l2"`` (the default) rescales
that mean by ``‖c‖₁ / ‖c‖₂`` of the comment's bucket counts ``c``: the token
weights become ``c / ‖c‖₂``, the normalisation a linear text model uses, so a
long message's spam words are not drowned by its length.  It is still an
average of embedding rows, times one per-comment factor.
"""
from __future__ import annotations

import math
import time
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass
from operator import mul

import numpy as np

from model import artifact, budget, network, training
from model.calibration import (DEFAULT_HOLD_FLOOR, DEFAULT_HOLD_FPR, DEFAULT_METHOD, DEFAULT_REJECT_FLOOR,
                               DEFAULT_REJECT_FPR, DEFAULT_TARGETS, IDENTITY, METHODS, HeldOutHam,
                               ProbabilityMap, ThresholdChoice, Thresholds, ThresholdTargets, choose_thresholds,
                               fit_probability_map)
from model.errors import ArtifactError, BudgetError, DataError
from model.evaluation import evaluate
from model.explain import top_contributions
from model.features import BatchWords, FeatureEncoder, Features
from model.hashing import PAIR_SCHEME, TokenHasher
from model.tokens import Tokenizer

#: Up to this many comments per call are scored by the pure-Python path.
FEW = 4


def auto_dim(distinct_tokens: int) -> int:
    """Embedding width by the rule of thumb d ≈ (distinct tokens) ** (1/4) (common practice).

    Examples
    --------
    >>> auto_dim(2000)
    7
    """
    return max(1, int(round(max(distinct_tokens, 1) ** 0.25)))


# --- the parameter table -----------------------------------------------------

def _int_at_least(low: int):
    def check(v):
        return isinstance(v, int) and not isinstance(v, bool) and v >= low
    return check, f"an int >= {low}"


def _power_of_two(v):
    return isinstance(v, int) and not isinstance(v, bool) and v >= 1 and v & (v - 1) == 0


def _auto_or_positive(v):
    return v == "auto" or (isinstance(v, int) and not isinstance(v, bool) and v >= 1)


def _max_bytes(v):
    return v is None or (isinstance(v, int) and not isinstance(v, bool) and v >= 1)


def _positive_float(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0


def _nonnegative_float(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v >= 0


def _share(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and 0 <= v < 0.5


def _class_weight(v):
    if v is None or v == "balanced":
        return True
    return (
        isinstance(v, dict) and set(v) == {0, 1}
        and all(_positive_float(x) for x in v.values())
    )


def _char_ngrams(v):
    if not (isinstance(v, (tuple, list)) and len(v) == 2 and all(isinstance(x, int) for x in v)):
        return False
    lo, hi = v
    return (lo, hi) == (0, 0) or 1 <= lo <= hi <= 8


PARAMS = {
    # name: (default, check, what it must be, what it means)
    "buckets": (2**18, _power_of_two, "a power of two", "hash buckets B (rows of the embedding table)"),
    "dim": ("auto", _auto_or_positive, "'auto' or an int >= 1",
            "embedding width d; auto = round(distinct tokens ** 0.25), narrowed if the size budget needs it"),
    "hidden": (0, *_int_at_least(0), "units of the head's hidden ReLU layer; 0 = a linear head"),
    "pooling": ("l2", lambda v: v in ("l2", "mean"), "'l2' or 'mean'", "bucket weights c/‖c‖₂ or c/‖c‖₁"),
    "bigrams": (True, lambda v: isinstance(v, bool), "a bool", "word bigrams as features"),
    "char_ngrams": ((0, 0), _char_ngrams, "(0, 0) or (lo, hi) with 1 <= lo <= hi <= 8", "character n-gram sizes"),
    "epochs": (10, *_int_at_least(1), "maximum passes over the training data"),
    "batch_size": (32, *_int_at_least(1), "comments per Adam step"),
    "learning_rate": (0.01, _positive_float, "a float > 0", "Adam step size"),
    "l2": (0.0, _nonnegative_float, "a float >= 0", "L2 penalty on the touched embedding rows"),
    "class_weight": ("balanced", _class_weight, "None, 'balanced' or {0: w, 1: w}", "loss weight per class"),
    "validation_share": (0.1, _share, "a float in [0, 0.5)", "share held out for early stopping and thresholds"),
    "patience": (2, *_int_at_least(1), "epochs without validation improvement before stopping"),
    "min_df": ("auto", _auto_or_positive, "'auto' or an int >= 1",
               "buckets in fewer training comments get no row; auto = 2, raised if the size budget needs it"),
    "max_bytes": (2**20, _max_bytes, "None or an int >= 1",
                  "size budget of the model file in bytes (None = no budget); see model.budget"),
    "quant_block": (1, *_int_at_least(1), "rows sharing one int8 scale and zero point (1 = per row)"),
    "shuffle": (True, lambda v: isinstance(v, bool), "a bool", "shuffle the order of examples each epoch"),
    "seed": (0, *_int_at_least(0), "seed of the initialisation, shuffling and validation split"),
    "calibration": (DEFAULT_METHOD, lambda v: v in METHODS, f"one of {METHODS}",
                    "probability calibration fitted on the held-out share (model.calibration)"),
}


def _grouping_order(doc: np.ndarray, bucket: np.ndarray, shift: int, key_bits: int, key_type,
                    *, packed: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """The stable order of the keys ``doc << shift | bucket`` and the keys in that order.

    Token occurrences are grouped into (comment, bucket) pairs, and the
    earliest occurrence of each pair names its bucket in an explanation, so it
    must come first in its run: a stable order.  With each occurrence's
    position in the low bits every key is distinct, and a plain sort of the
    values (numpy's SIMD quicksort) gives that order several times faster than
    a stable argsort; keys of more than ``63 - key_bits`` position bits (or
    ``packed=False``) take the stable argsort.

    Examples
    --------
    >>> order, keys = _grouping_order(np.array([0, 0, 1, 0]), np.array([5, 2, 2, 2]), 3, 5, np.int32)
    >>> order.tolist(), keys.tolist()
    ([1, 3, 0, 2], [2, 2, 5, 10])
    """
    size = bucket.size
    position_bits = max(1, (size - 1).bit_length())
    if packed and key_bits + position_bits <= 63:
        keys = doc.astype(np.int64) << np.int64(shift + position_bits)
        keys |= bucket.astype(np.int64) << np.int64(position_bits)
        keys |= np.arange(size, dtype=np.int64)
        keys.sort()
        return keys & np.int64((1 << position_bits) - 1), (keys >> np.int64(position_bits)).astype(key_type, copy=False)
    keys = (doc.astype(key_type, copy=False) << key_type(shift)) | bucket.astype(key_type, copy=False)
    order = np.argsort(keys, kind="stable")
    return order, keys[order]


@dataclass
class _Bag:
    """A batch of comments as (comment, bucket) pairs with their pooling weights."""

    n: int
    doc: np.ndarray
    bucket: np.ndarray
    weight: np.ndarray
    first: np.ndarray
    names: object
    indptr: np.ndarray

    def matrix(self, n_buckets: int) -> "sp.csr_matrix":
        import scipy.sparse as sp  # training only; scoring needs numpy alone

        return sp.csr_matrix(
            (self.weight.astype(np.float32), self.bucket.astype(np.int32), self.indptr),
            shape=(self.n, n_buckets),
        )


@dataclass
class _Tables:
    """A fitted model's scoring tables.

    ``index`` maps bucket → row (0 = no row), ``table`` holds the rows (row 0
    is zeros), ``head`` the dense head; with a linear head ``row_logit`` is each
    row's logit term and ``bucket_logit`` each bucket's (one gather instead of
    two on the hot paths), else both are ``None``.
    """

    index: np.ndarray
    table: np.ndarray
    row_logit: np.ndarray | None
    head: dict
    bucket_logit: np.ndarray | None
    bias: float


@dataclass(frozen=True)
class EncodedBatch:
    """Texts a model cut into features (:meth:`EmbeddingClassifier.encode`), scored later by that model.

    ``features`` is None for a batch small enough for the plain-Python path,
    which cuts each text itself when it scores.
    """

    texts: list[str]
    features: Features | None
    tokenizer: Tokenizer

    def words(self, rows=None) -> BatchWords:
        """The words of the comments ``rows`` (indices into :attr:`texts`, repeats allowed; all by default),
        from the scoring pass when it ran on the whole batch, else cut here by the same tokenizer."""
        if self.features is not None:
            flat, counts = self.features.words(rows)
        else:
            texts = self.texts if rows is None else [self.texts[i] for i in np.asarray(rows).tolist()]
            flat, counts = self.tokenizer.words_many(texts)
            counts = np.asarray(counts, dtype=np.int64)
        return BatchWords(flat, counts, self.tokenizer.word_params())


class EmbeddingClassifier:
    """Spam probability of short texts from an averaged, hashed token embedding.

    Parameters
    ----------
    All keyword-only; see :data:`PARAMS` for each one's default and meaning.
    The constructor only checks and stores them.

    Examples
    --------
    >>> texts = ["win a free prize now at prize.example", "see you at the meeting",
    ...          "free prize click now", "thanks for the notes"] * 10
    >>> labels = [1, 0, 1, 0] * 10
    >>> clf = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0).fit(texts, labels)
    >>> bool(clf.predict_proba_one("free prize") > clf.predict_proba_one("the meeting notes"))
    True
    """

    def __init__(self, **params):
        unknown = set(params) - set(PARAMS)
        if unknown:
            raise TypeError(f"EmbeddingClassifier: unknown parameter(s) {sorted(unknown)}")
        for name, (default, check, must, _) in PARAMS.items():
            value = params.get(name, default)
            if not check(value):
                raise ValueError(f"EmbeddingClassifier: {name} must be {must}, got {value!r}")
            setattr(self, name, tuple(value) if name == "char_ngrams" else value)
        self._fitted = False

    # --- parameters -----------------------------------------------------------

    def get_params(self) -> dict:
        """The constructor parameters (JSON-safe)."""
        out = {name: getattr(self, name) for name in PARAMS}
        out["char_ngrams"] = list(out["char_ngrams"])
        if isinstance(out["class_weight"], dict):
            out["class_weight"] = {str(k): v for k, v in out["class_weight"].items()}
        return out

    @classmethod
    def _from_params(cls, params: dict) -> "EmbeddingClassifier":
        params = dict(params)
        params["char_ngrams"] = tuple(params["char_ngrams"])
        if isinstance(params.get("class_weight"), dict):
            params["class_weight"] = {int(k): v for k, v in params["class_weight"].items()}
        return cls(**params)

    def __repr__(self) -> str:
        changed = {k: getattr(self, k) for k, (d, *_) in PARAMS.items() if getattr(self, k) != d}
        return f"EmbeddingClassifier({', '.join(f'{k}={v!r}' for k, v in changed.items())})"

    # --- features -------------------------------------------------------------

    def _make_featurizers(self, tokenizer_params: dict | None = None, hashing: dict | None = None) -> None:
        if tokenizer_params is None:
            self._tokenizer = Tokenizer(bigrams=self.bigrams, char_ngrams=tuple(self.char_ngrams))
        else:
            self._tokenizer = Tokenizer(**tokenizer_params)
        seed = 0 if hashing is None else int(hashing.get("seed", 0))
        if hashing is not None and hashing.get("pairs") != PAIR_SCHEME:
            raise ArtifactError(
                f"load model: word pairs were hashed as {hashing.get('pairs')!r}, this Seawall hashes them as "
                f"{PAIR_SCHEME!r}; retrain the model with this version"
            )
        self._hasher = TokenHasher(n_buckets=self.buckets, seed=seed)
        self._encoder = FeatureEncoder(self._tokenizer, self._hasher)

    def _features(self, texts: list[str]) -> Features:
        return self._encoder.texts(texts)

    def _bag(self, features: Features) -> _Bag:
        n = features.n
        lengths = features.lengths
        buckets = features.bucket
        key_type = np.int32 if n * self.buckets < 2**31 else np.int64
        shift = key_type(self.buckets.bit_length() - 1)  # buckets is a power of two
        order, sorted_keys = _grouping_order(features.doc, buckets, int(shift), (n * self.buckets).bit_length(),
                                             key_type)
        edge = np.empty(sorted_keys.size, dtype=bool)
        if sorted_keys.size:
            edge[0] = True
            np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=edge[1:])
        starts = np.flatnonzero(edge)
        keys = sorted_keys[starts]
        first = order[starts]
        counts = np.diff(np.append(starts, sorted_keys.size)).astype(np.float64)
        pair_doc = keys >> shift
        if self.pooling == "l2":
            norm = np.sqrt(np.bincount(pair_doc, weights=counts * counts, minlength=n))
        else:
            norm = lengths.astype(np.float64)
        indptr = np.searchsorted(pair_doc, np.arange(n + 1, dtype=pair_doc.dtype))  # pair_doc is sorted
        weight = counts / np.repeat(norm, np.diff(indptr)) if keys.size else counts
        bucket = keys & key_type(self.buckets - 1)
        return _Bag(n, pair_doc, bucket, weight, first, features.names, indptr)

    def _matrix(self, texts: list[str], seen: list | None = None, chunk: int = 8192) -> sp.csr_matrix:
        """Pooling-weight rows of many texts, built in chunks so that only one
        chunk's token strings are alive at a time; ``seen`` collects each
        chunk's distinct feature hashes (see :meth:`_distinct`)."""
        import scipy.sparse as sp

        parts = []
        for start in range(0, len(texts), chunk):
            feats = self._features(texts[start:start + chunk])
            if seen is not None:
                seen.append(np.unique(feats.hashes))
            parts.append(self._bag(feats).matrix(self.buckets))
        if len(parts) == 1:
            return parts[0]
        return sp.vstack(parts, format="csr") if parts else sp.csr_matrix((0, self.buckets), dtype=np.float32)

    # --- checks ---------------------------------------------------------------

    @staticmethod
    def _texts(texts, op: str) -> list[str]:
        if isinstance(texts, str):
            raise DataError(f"{op}: texts must be a list of strings, not one string")
        texts = list(texts)
        for i, t in enumerate(texts):
            if not isinstance(t, str):
                raise DataError(f"{op}: text {i} is {type(t).__name__}, not str")
        return texts

    @staticmethod
    def _labels(labels, n: int, op: str) -> np.ndarray:
        y = list(labels)
        if len(y) != n:
            raise DataError(f"{op}: {n} texts but {len(y)} labels; pass one label per text")
        bad = next((v for v in y if v not in (0, 1) or isinstance(v, float) and not float(v).is_integer()), None)
        if bad is not None:
            raise DataError(f"{op}: labels must be 0 (ham) or 1 (spam), got {bad!r}")
        return np.asarray(y, dtype=np.float64)

    def _require_fitted(self, op: str) -> None:
        if not self._fitted:
            raise DataError(f"{op}: the model is not trained; call fit() or load a model first")

    # --- training ---------------------------------------------------------------

    def _resolve_class_weight(self, y: np.ndarray) -> tuple[float, float]:
        if self.class_weight is None:
            return 1.0, 1.0
        if isinstance(self.class_weight, dict):
            return float(self.class_weight[0]), float(self.class_weight[1])
        n1 = float(y.sum())
        n0 = float(y.size - n1)
        return y.size / (2.0 * n0), y.size / (2.0 * n1)

    def _split(self, y: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Stratified train/validation indices; no validation when a class is too small."""
        n = y.size
        if self.validation_share <= 0:
            return np.arange(n), np.empty(0, dtype=np.int64)
        val = []
        for cls in (0, 1):
            idx = np.flatnonzero(y == cls)
            take = int(round(self.validation_share * idx.size))
            if take < 1 or take >= idx.size:
                return np.arange(n), np.empty(0, dtype=np.int64)
            val.append(rng.permutation(idx)[:take])
        val_idx = np.sort(np.concatenate(val))
        mask = np.ones(n, dtype=bool)
        mask[val_idx] = False
        return np.flatnonzero(mask), val_idx

    def _sample_weights(self, y: np.ndarray) -> np.ndarray:
        w0, w1 = self._class_weights
        return np.where(y == 1, w1, w0)

    def fit(self, texts: Iterable[str], labels: Iterable[int], *, on_epoch=None) -> "EmbeddingClassifier":
        """Train a fresh model.

        Parameters
        ----------
        texts : iterable of str.
        labels : iterable of 0/1 (1 = spam), one per text.
        on_epoch : optional callable receiving a
            :class:`model.training.EpochReport` after each epoch (progress).

        Returns
        -------
        self

        Raises
        ------
        DataError
            On empty data, mismatched lengths, labels other than 0/1, or a
            single class.
        """
        texts = self._texts(texts, "fit")
        y = self._labels(labels, len(texts), "fit")
        if not texts:
            raise DataError("fit: no training data; pass labelled spam and ham texts")
        if y.min() == y.max():
            raise DataError("fit: the training data hold a single class; pass both spam and ham examples")
        started = time.perf_counter()
        rng = np.random.default_rng(self.seed)
        self._make_featurizers()
        seen: list[np.ndarray] = []
        matrix = self._matrix(texts, seen)
        distinct = self._distinct(seen)
        del seen
        self._class_weights = self._resolve_class_weight(y)
        train_idx, val_idx = self._split(y, rng)
        train_m = matrix[train_idx]
        df = np.bincount(train_m.indices, minlength=self.buckets)
        chosen = budget.plan(budget.rows_by_cut(df), rule_dim=auto_dim(distinct), dim=self.dim, min_df=self.min_df,
                             max_bytes=self.max_bytes)
        self.dim_, self.min_df_ = chosen.dim, chosen.min_df
        train_m = self._restrict(train_m, df >= self.min_df_)
        self._weights = training.Weights(
            np.zeros((self.buckets, self.dim_), dtype=np.float32),
            network.init_head(self.dim_, self.hidden, rng),
        )
        self._opt = training.Optimizer(self.learning_rate, l2=self.l2)
        self._touched = np.bincount(train_m.indices, minlength=self.buckets) > 0
        self._rng = rng
        y_train = y[train_idx]
        validation = None
        if val_idx.size:
            validation = (matrix[val_idx], y[val_idx], self._sample_weights(y[val_idx]))
        summary = training.run_epochs(
            self._weights, self._opt, train_m, y_train, self._sample_weights(y_train),
            epochs=self.epochs, batch_size=self.batch_size, rng=rng, shuffle=self.shuffle,
            validation=validation, patience=self.patience, on_epoch=on_epoch,
        )
        self._fitted = True
        self._invalidate()
        self.budget_ = {"max_bytes": self.max_bytes, "dim": self.dim_, "rule_dim": auto_dim(distinct),
                        "min_df": self.min_df_, "steps": list(chosen.steps)}
        val_m = matrix[val_idx] if validation is not None else None
        # The calibration is part of the file, so the budget is fitted with it in place; pruning changes
        # the scores a little, so the calibration is then fitted again on the rows that were kept.
        self._calibrate_on(val_m, y[val_idx])
        self._fit_budget("fit")
        metrics = {}
        if self.budget_.get("pruned_by"):
            self._calibrate_on(val_m, y[val_idx])
        if val_m is not None:
            val_logits = training.predict_logits(self._weights, val_m)
            metrics["validation"] = evaluate(y[val_idx], self.calibration_.probability(val_logits), self.thresholds)
        self.summary_ = {
            "n_train": int(train_idx.size),
            "n_validation": int(val_idx.size),
            "n_spam": int(y.sum()),
            "n_ham": int(y.size - y.sum()),
            "distinct_tokens": distinct,
            "dim": self.dim_,
            "rows": int(self._touched.sum()),
            "class_weights": list(self._class_weights),
            "seconds": round(time.perf_counter() - started, 3),
            "updates": 0,
            **summary,
        }
        self.metrics_ = metrics
        self.created_at = time.time()
        self._manifest = None
        return self

    @staticmethod
    def _distinct(seen: list[np.ndarray]) -> int:
        """Distinct tokens (words, word pairs, n-grams) of the training texts,
        counted by their full 32-bit hashes: a pair has no string to count, and
        two tokens share a hash about once in 2**32 pairs."""
        if not seen:
            return 0
        return int(np.unique(np.concatenate(seen)).size)

    @staticmethod
    def _restrict(matrix: sp.csr_matrix, allowed: np.ndarray) -> sp.csr_matrix:
        """Drop entries of buckets that get no row; the pooling weights stay as they were.

        The dropped tokens still count in the comment's normalisation, exactly as
        at scoring time, where their (absent) rows contribute zero.
        """
        keep = allowed[matrix.indices]
        if keep.all():
            return matrix
        m = matrix.copy()
        m.data[~keep] = 0.0
        m.eliminate_zeros()
        return m

    def _ensure_trainable(self) -> None:
        """After loading, rebuild the full float table and a fresh optimizer."""
        if getattr(self, "_weights", None) is None:
            table = np.zeros((self.buckets, self.dim_), dtype=np.float32)
            rows, values, head = self._stored
            table[rows] = values
            self._weights = training.Weights(table, {k: v.copy() for k, v in head.items()})
        if getattr(self, "_opt", None) is None:
            self._opt = training.Optimizer(self.learning_rate, l2=self.l2)
        if getattr(self, "_rng", None) is None:
            self._rng = np.random.default_rng([self.seed, self.summary_.get("updates", 0)])

    def _learn(self, texts, labels, *, epochs: int, min_df: int, op: str) -> "EmbeddingClassifier":
        self._require_fitted(op)
        texts = self._texts(texts, op)
        y = self._labels(labels, len(texts), op)
        if not texts:
            return self
        self._ensure_trainable()
        m = self._matrix(texts)
        df = np.bincount(m.indices, minlength=self.buckets)
        m = self._restrict(m, self._touched | (df >= min_df))
        training.run_epochs(
            self._weights, self._opt, m, y, self._sample_weights(y),
            epochs=epochs, batch_size=self.batch_size, rng=self._rng, shuffle=self.shuffle,
        )
        self._touched |= np.bincount(m.indices, minlength=self.buckets) > 0
        self._invalidate()
        self._fit_budget(op)
        self.summary_["updates"] = self.summary_.get("updates", 0) + len(texts)
        self.summary_["rows"] = int(self._touched.sum())
        self.created_at = time.time()  # the weights changed: this is a new model
        self._manifest = None
        return self

    def learn_many(self, texts: Iterable[str], labels: Iterable[int], *, epochs: int | None = None) -> "EmbeddingClassifier":
        """Warm-start training on more labelled texts (same update routine as :meth:`fit`).

        Buckets seen in at least ``min_df_`` (the cut the model was trained
        with) of these texts get rows if they had none; rows with the smallest
        norm are then dropped if the file would be over ``max_bytes``.  No validation split, no early stopping: the caller gates the
        result (the nightly retrain checks it on a holdout).
        """
        return self._learn(texts, labels, epochs=epochs or self.epochs, min_df=self.min_df_, op="learn_many")

    def learn_one(self, text: str, label: int) -> "EmbeddingClassifier":
        """One Adam step on one labelled text; every one of its buckets may get a row."""
        return self._learn([text], [label], epochs=1, min_df=1, op="learn_one")

    # --- scoring --------------------------------------------------------------

    def _invalidate(self) -> None:
        self._scoring = None

    def _score_few(self, docs, top_k: int, spamward_from=None):
        """Plain-Python scoring for a handful of comments (linear head only).

        ``docs`` holds one ``(buckets, names)`` per comment: its feature
        buckets as a list of ints and an indexable naming each position.
        Same arithmetic as the vectorised path, in Python floats (IEEE
        doubles, as numpy's float64): for one comment (the latency case) each
        numpy call costs about as much as a pass over its ~60 values in C-level
        ``map``, ``sum`` and ``sorted``, and the lists need no conversions.
        The probability comes from the same :meth:`_probabilities` as on every
        other path.
        """
        tables = self._scoring_tables()
        logit_of = memoryview(tables.bucket_logit).__getitem__  # float32 items read as exact Python floats
        bias = tables.bias
        l2 = self.pooling == "l2"
        scale = self.calibration_.contribution_scale
        logits = []
        reasons = []
        explain = []  # (comment, buckets, names, distinct buckets, their terms), ranked once scores are known
        for buckets, names in docs:
            n = len(buckets)
            if not n:
                logits.append(bias)
                reasons.append([])
                continue
            counts = Counter(buckets)  # insertion order = order of first appearance
            unique = list(counts)
            times = list(counts.values())
            # exact: a sum of squares of small integers, as the vectorised path's float64 dot
            norm = math.sqrt(sum(map(mul, times, times))) if l2 else float(n)
            # Each distinct bucket's term, pooling weight (count / norm, float64)
            # times logit term (float32), summed in order of first appearance,
            # as the vectorised path computes it.
            terms = list(map(mul, map(norm.__rtruediv__, times), map(logit_of, unique)))
            logits.append(bias + sum(terms))
            reasons.append([])
            if top_k > 0:
                explain.append((len(reasons) - 1, buckets, names, unique, terms))
        scores = self._probabilities(logits)
        single = isinstance(spamward_from, (int, float))
        for i, buckets, names, unique, terms in explain:
            # Largest magnitude first; a stable sort keeps ties in the order the
            # tokens appear (``reverse`` keeps it stable).  Buckets without a
            # row contribute 0 and are left out.
            at = buckets.index
            spamward = spamward_from is not None and scores[i] >= (spamward_from if single else spamward_from[i])
            if not spamward:
                top = sorted(terms, key=abs, reverse=True)[:top_k]
                if len(set(top)) == len(top):  # no two equal: each names the one distinct bucket with its term
                    where = terms.index
                    reasons[i] = [(names[at(unique[where(t)])], t * scale) for t in top if t]
                    continue
            magnitude = list(map(abs, terms))
            if spamward:
                # spam-ward tokens first, then the rest by magnitude
                lift = max(magnitude) + 1.0
                magnitude = [m + lift if t > 0 else m for m, t in zip(magnitude, terms)]
            ranked = sorted(range(len(terms)), key=magnitude.__getitem__, reverse=True)[:top_k]
            reasons[i] = [(names[at(unique[j])], terms[j] * scale) for j in ranked if terms[j]]
        return scores, reasons

    def _probabilities(self, logits) -> np.ndarray:
        """Spam probabilities from raw logits (an array, or a list of floats) through the fitted
        calibration: the one last step of every scoring path."""
        return self.calibration_.probability(logits)

    def _few_from_features(self, features: Features):
        """Per-comment ``(buckets, names)`` of a small :class:`Features` batch."""
        if features.n == 1:
            return [(features.bucket.tolist(), features.names)]
        out = []
        for i in range(features.n):
            at = np.flatnonzero(features.doc == i).tolist()
            names = features.names
            out.append((features.bucket[at].tolist(), [names[j] for j in at]))
        return out

    def _scoring_tables(self) -> "_Tables":
        """Compact scoring tables (see :class:`_Tables`), built once per model state."""
        if self._scoring is None:
            if getattr(self, "_weights", None) is not None:
                rows = np.flatnonzero(self._touched)
                values = self._weights.table[rows]
                head = self._weights.head
            else:
                rows, values, head = self._stored
            index = np.zeros(self.buckets, dtype=np.int32)
            index[rows] = np.arange(1, rows.size + 1, dtype=np.int32)
            table = np.zeros((rows.size + 1, self.dim_), dtype=np.float32)
            table[1:] = values
            row_logit = table @ head["w2"] if "w1" not in head else None
            bucket_logit = row_logit[index] if row_logit is not None else None
            self._scoring = _Tables(index, table, row_logit, {k: v.copy() for k, v in head.items()}, bucket_logit,
                                    float(head["b2"][0]))
        return self._scoring

    def _logits_and_contributions(self, bag: _Bag, want_contributions: bool):
        tables = self._scoring_tables()
        index, table, row_logit, head, bucket_logit = (tables.index, tables.table, tables.row_logit, tables.head,
                                                       tables.bucket_logit)
        if row_logit is not None:
            contrib = bag.weight * bucket_logit[bag.bucket]
            logits = np.bincount(bag.doc, weights=contrib, minlength=bag.n) + float(head["b2"][0])
            return logits, contrib
        import scipy.sparse as sp  # a hidden layer is scored through a sparse product

        rows = index[bag.bucket]
        local = sp.csr_matrix((bag.weight.astype(np.float32), rows, bag.indptr), shape=(bag.n, table.shape[0]))
        h = np.asarray(local @ table, dtype=np.float32)
        logits, _ = network.head_forward(h, head)
        contrib = None
        if want_contributions:
            g = network.token_direction(h, head)
            contrib = bag.weight * np.einsum("ij,ij->i", table[rows], g[bag.doc])
        return logits.astype(np.float64), contrib

    def score_many(self, texts: Iterable[str], *, top_k: int = 5,
                   spamward_from=None) -> tuple[np.ndarray, list[list[tuple[str, float]]]]:
        """Calibrated spam probabilities and explanations in one pass (the worker's hot path).

        Parameters
        ----------
        texts : iterable of str.
        top_k : tokens per comment in the explanation (0 = none).
        spamward_from : ``None``, a probability, or one per text: a comment
            whose score is at or above it (one that will be held or rejected)
            lists its spam-ward tokens first, strongest first, then the others.

        Returns
        -------
        scores : np.ndarray (n,) of float64 in [0, 1], calibrated (see :attr:`calibration_`).
        reasons : per comment, up to ``top_k`` ``(token, contribution)`` pairs,
            largest magnitude first; contribution > 0 pushes toward spam, in
            calibrated log-odds (raw log-odds times the calibration's slope).
        """
        return self.score_encoded(self.encode(texts), top_k=top_k, spamward_from=spamward_from)

    def encode(self, texts: Iterable[str]) -> "EncodedBatch":
        """Cut texts into features once: :meth:`score_encoded` scores them as :meth:`score_many` would, and
        :meth:`EncodedBatch.words` gives their words from the same pass.

        Examples
        --------
        >>> clf = EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0).fit(
        ...     ["win a free prize", "see you soon", "free prize now", "thanks a lot", "a b c d e"] * 4,
        ...     [1, 0, 1, 0, 0] * 4)
        >>> batch = clf.encode(["Win a FREE prize", "see you", "x", "y", "z"])
        >>> bool((clf.score_encoded(batch)[0] == clf.score_many(batch.texts)[0]).all())
        True
        >>> batch.words([1, 0]).flat
        ['see', 'you', 'win', 'a', 'free', 'prize']
        """
        self._require_fitted("score")
        if not (type(texts) is list and len(texts) == 1 and type(texts[0]) is str):  # one str: nothing more to check
            texts = self._texts(texts, "score")
        if len(texts) <= FEW and self._scoring_tables().row_logit is not None:
            return EncodedBatch(texts, None, self._tokenizer)  # the plain-Python path cuts each text itself
        return EncodedBatch(texts, self._features(texts), self._tokenizer)

    def score_encoded(self, batch: "EncodedBatch", *, top_k: int = 5,
                      spamward_from=None) -> tuple[np.ndarray, list[list[tuple[str, float]]]]:
        """:meth:`score_many` of the texts of a batch this model encoded (:meth:`encode`)."""
        if batch.features is None:
            return self._score_few([self._encoder.one(t) for t in batch.texts], top_k, spamward_from)
        return self._score(batch.features, top_k, spamward_from)

    def score_features(self, feature_lists: list[list[str]], *, top_k: int = 5):
        """:meth:`score_many` for comments already cut into feature tokens.

        Lets a caller (or a test) score a comment with some tokens removed; a
        token ``a_b`` is the word pair (a, b), as :meth:`Tokenizer.features` writes it.
        """
        self._require_fitted("score")
        return self._score(self._encoder.tokens(feature_lists), top_k)

    def _score(self, features: Features, top_k: int, spamward_from=None):
        if features.n <= FEW and self._scoring_tables().row_logit is not None:
            return self._score_few(self._few_from_features(features), top_k, spamward_from)
        bag = self._bag(features)
        logits, contrib = self._logits_and_contributions(bag, top_k > 0)
        scores = self._probabilities(logits)
        if top_k <= 0:
            return scores, [[] for _ in range(bag.n)]
        scale = self.calibration_.contribution_scale
        if scale != 1.0:
            contrib = contrib * scale
        spamward = None if spamward_from is None else scores >= np.asarray(spamward_from, dtype=np.float64)
        return scores, top_contributions(bag.doc, contrib, bag.first, bag.names, bag.n, top_k, spamward=spamward,
                                         indptr=bag.indptr)

    def logits_many(self, texts: Iterable[str]) -> np.ndarray:
        """The network's raw log-odds of spam per text, before calibration, shape (n,)."""
        self._require_fitted("score")
        bag = self._bag(self._features(self._texts(texts, "score")))
        return self._logits_and_contributions(bag, False)[0]

    def predict_proba_many(self, texts: Iterable[str]) -> np.ndarray:
        """Spam probability of each text, shape (n,)."""
        return self.score_many(texts, top_k=0)[0]

    def predict_proba_one(self, text: str) -> float:
        """Spam probability of one text."""
        return float(self.score_many([text], top_k=0)[0][0])

    def explain_one(self, text: str, top_k: int = 5) -> list[tuple[str, float]]:
        """The ``top_k`` tokens with the largest signed contributions (positive = toward spam)."""
        return self.score_many([text], top_k=top_k)[1][0]

    def calibrate(self, texts, labels, *, reject_fpr: float = DEFAULT_REJECT_FPR, hold_fpr: float = DEFAULT_HOLD_FPR,
                  hold_floor: float = DEFAULT_HOLD_FLOOR, reject_floor: float = DEFAULT_REJECT_FLOOR,
                  method: str | None = None) -> Thresholds:
        """Refit the probability calibration and the thresholds on held-out labelled texts.

        Parameters
        ----------
        texts, labels : data the model did not train on, with both classes.
        reject_fpr, hold_fpr : false-positive-rate targets (share of this ham).
        hold_floor, reject_floor : each threshold is at least its floor.
        method : the calibration (default: the ``calibration`` parameter).

        Returns
        -------
        Thresholds
            Also set as :attr:`thresholds`; :attr:`calibration_`,
            :attr:`held_out_ham_` and :attr:`threshold_choice_` change with them.

        Raises
        ------
        DataError
            When the data lack a class, or the model ranks their spam below their ham.
        """
        self._require_fitted("calibrate")
        texts = self._texts(texts, "calibrate")
        y = self._labels(labels, len(texts), "calibrate")
        targets = ThresholdTargets(hold_fpr=hold_fpr, reject_fpr=reject_fpr, hold_floor=hold_floor,
                                   reject_floor=reject_floor)
        self._set_calibration(*self._fit_calibration(self.logits_many(texts), y, targets, method or self.calibration))
        return self.thresholds

    def _calibrate_on(self, matrix, y: np.ndarray) -> None:
        """Fit the probability map and thresholds on held-out rows (``None``: identity, default thresholds)."""
        if matrix is None:
            self._set_calibration(IDENTITY, None, choose_thresholds(None, DEFAULT_TARGETS))
            return
        logits = training.predict_logits(self._weights, matrix)
        try:
            fitted = self._fit_calibration(logits, y, DEFAULT_TARGETS, self.calibration)
        except DataError:  # a model that ranks its own held-out data backwards keeps raw scores
            fitted = self._fit_calibration(logits, y, DEFAULT_TARGETS, "identity")
        self._set_calibration(*fitted)

    @staticmethod
    def _fit_calibration(logits: np.ndarray, y: np.ndarray, targets: ThresholdTargets, method: str):
        calibration = fit_probability_map(logits, y, method)
        ham = HeldOutHam.from_scores(calibration.probability(logits)[y == 0])
        return calibration, ham, choose_thresholds(ham, targets)

    def _set_calibration(self, calibration: ProbabilityMap, ham: HeldOutHam | None, choice: ThresholdChoice) -> None:
        self.calibration_ = calibration
        self.held_out_ham_ = ham
        self.threshold_choice_ = choice
        self.thresholds = choice.thresholds

    def threshold_choice(self, targets: ThresholdTargets = DEFAULT_TARGETS) -> ThresholdChoice:
        """The thresholds these targets and floors give on the model's held-out ham, with how each was set."""
        self._require_fitted("thresholds")
        return choose_thresholds(self.held_out_ham_, targets, stored=self.thresholds)

    # --- artifact -------------------------------------------------------------

    def _arrays_and_manifest(self, *, arrays: bool = True) -> tuple[dict | None, dict]:
        if not arrays:
            stored = None
        elif getattr(self, "_weights", None) is None:
            # Loaded and not trained since: keep the stored arrays bit for bit
            # (re-quantizing dequantized values need not give the same bytes).
            stored = self._stored_arrays
        else:
            tables = self._scoring_tables()
            stored = self._row_arrays(np.flatnonzero(tables.index), tables.table[1:], tables.head)
        manifest = {
            "created_at": getattr(self, "created_at", 0.0),
            "params": self.get_params(),
            "tokenizer": self._tokenizer.params(),
            "hashing": {
                "scheme": "murmurhash3_x86_32", "pairs": PAIR_SCHEME,
                "n_buckets": self.buckets, "seed": self._hasher_seed(),
            },
            "dim": self.dim_,
            "min_df": self.min_df_,
            "budget": getattr(self, "budget_", {}),
            "quantization": {"scheme": "affine-int8", "block": self.quant_block},
            "thresholds": self.thresholds.to_dict(),
            "calibration": {
                "probability": self.calibration_.to_dict(),
                "held_out_ham": None if self.held_out_ham_ is None else self.held_out_ham_.to_dict(),
            },
            "training": getattr(self, "summary_", {}),
            "metrics": getattr(self, "metrics_", {}),
        }
        return stored, manifest

    def _fit_budget(self, op: str) -> None:
        """Drop the rows with the smallest L2 norm until the file fits ``max_bytes``
        (less :data:`model.budget.HEADROOM`); record what was kept in ``budget_``.

        Raises
        ------
        BudgetError
            In ``fit``, when the manifest and head alone are over the budget or
            fewer than :data:`model.budget.MIN_KEPT_SHARE` of the rows would
            fit; the message names the settings to change.  A warm start
            (``learn_many``) always prunes instead, unless nothing fits at all.
        """
        rows = np.flatnonzero(self._touched)
        record = {"max_bytes": self.max_bytes, "dim": self.dim_, "min_df": self.min_df_,
                  "rows_trained": int(rows.size), "rows_kept": int(rows.size), "pruned_by": None}
        if self.max_bytes is not None:
            limit = self.max_bytes - budget.HEADROOM
            table, head = self._weights.table, self._weights.head
            order = rows[np.argsort(-np.linalg.norm(table[rows], axis=1), kind="stable")]  # strongest first
            _, manifest = self._arrays_and_manifest(arrays=False)

            def size_of(k: int) -> int:
                keep = np.sort(order[:k])
                return len(artifact.dumps(self._row_arrays(keep, table[keep], head), manifest)[0])

            try:
                kept = budget.largest_fit(size_of, rows.size, limit)
            except BudgetError:
                raise BudgetError(
                    f"{op}: even with no embedding rows the model file is over max_bytes={self.max_bytes} "
                    f"(the manifest and a head of hidden={self.hidden}, d={self.dim_} take more); "
                    f"raise max_bytes (seawall train --max-bytes) or lower hidden"
                ) from None
            if op == "fit" and kept < budget.MIN_KEPT_SHARE * rows.size:
                raise BudgetError(
                    f"fit: only {kept} of {rows.size} trained rows fit in max_bytes={self.max_bytes} at d={self.dim_}, "
                    f"min_df={self.min_df_}; raise max_bytes (seawall train --max-bytes), lower dim (--dim) "
                    f"or raise min_df (--min-df), or leave dim and min_df at 'auto'"
                )
            if kept < rows.size:
                dropped = order[kept:]
                self._touched[dropped] = False
                table[dropped] = 0.0
                if self._opt is not None and self._opt.m_table is not None:
                    self._opt.m_table[dropped] = 0.0
                    self._opt.v_table[dropped] = 0.0
                self._invalidate()
                record.update(rows_kept=int(kept), pruned_by="row_norm")
        self.budget_ = {**getattr(self, "budget_", {}), **record}
        self._manifest = None

    def _row_arrays(self, rows: np.ndarray, values: np.ndarray, head: dict) -> dict:
        """The stored arrays of ``rows`` (sorted bucket ids) with embedding ``values`` (:mod:`model.artifact`)."""
        return artifact.encode_model(rows, values, head, self.quant_block)

    def _hasher_seed(self) -> int:
        return int(getattr(self._hasher, "seed", 0))

    def to_bytes(self) -> bytes:
        """The model as one ``.npz`` artifact (see :mod:`model.artifact`)."""
        self._require_fitted("save model")
        arrays, manifest = self._arrays_and_manifest()
        data, self._manifest = artifact.dumps(arrays, manifest)
        if self.max_bytes is not None and len(data) > self.max_bytes and getattr(self, "_weights", None) is not None:
            # Training fitted the rows with budget.HEADROOM to spare; only a
            # manifest grown past that (huge metrics) can get here.
            raise BudgetError(f"save model: the file would be {len(data)} bytes, over max_bytes={self.max_bytes}; "
                              f"raise max_bytes or retrain (training fits the rows to the budget)")
        return data

    @classmethod
    def from_bytes(cls, data: bytes) -> "EmbeddingClassifier":
        """Rebuild a model from :meth:`to_bytes` output.

        Raises
        ------
        ArtifactError
            On a bad checksum, a truncated file, a wrong format version or a
            pickled array.
        """
        arrays, manifest = artifact.loads(data)
        try:
            clf = cls._from_params(manifest["params"])
            clf._make_featurizers(manifest["tokenizer"], manifest["hashing"])
            clf.dim_ = int(manifest["dim"])
            # Files from before the size budget have an int min_df parameter and no "min_df" entry.
            clf.min_df_ = int(manifest.get("min_df", manifest["params"]["min_df"]))
            clf.budget_ = dict(manifest.get("budget", {}))
            rows, values, head = artifact.decode_model(arrays, int(manifest["quantization"]["block"]))
            if values.shape != (rows.size, clf.dim_) or (rows.size and (rows[-1] >= clf.buckets or rows[0] < 0)):
                raise ArtifactError("load model: stored rows do not match the manifest; the file is corrupt")
            thresholds = Thresholds.from_dict(manifest["thresholds"])
            # A file written before calibration was stored scores with the raw sigmoid (identity).
            stored = manifest.get("calibration") or {}
            calibration = ProbabilityMap.from_dict(stored["probability"]) if "probability" in stored else IDENTITY
            ham = HeldOutHam.from_dict(stored["held_out_ham"]) if stored.get("held_out_ham") else None
            clf._set_calibration(calibration, ham, choose_thresholds(ham, DEFAULT_TARGETS, stored=thresholds))
            clf.thresholds = thresholds
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, ArtifactError):
                raise
            raise ArtifactError(f"load model: the manifest is incomplete or invalid ({exc}); retrain the model") from None
        clf._stored = (rows, values, head)
        clf._stored_arrays = arrays
        clf._weights = None
        clf._opt = None
        clf._rng = None
        clf._touched = np.zeros(clf.buckets, dtype=bool)
        clf._touched[rows] = True
        clf._class_weights = tuple(manifest["training"].get("class_weights", (1.0, 1.0)))
        clf.summary_ = dict(manifest["training"])
        clf.metrics_ = dict(manifest.get("metrics", {}))
        clf.created_at = float(manifest["created_at"])
        clf._manifest = manifest
        clf._fitted = True
        clf._invalidate()
        return clf

    def save(self, path) -> None:
        """Write :meth:`to_bytes` to ``path`` (atomically: a temporary file, then a rename)."""
        import os

        data = self.to_bytes()
        tmp = f"{os.fspath(path)}.tmp-{os.getpid()}"
        with open(tmp, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)

    @classmethod
    def load(cls, path) -> "EmbeddingClassifier":
        """Read a model file written by :meth:`save`."""
        try:
            with open(path, "rb") as fh:
                data = fh.read()
        except OSError as exc:
            raise ArtifactError(f"load model: cannot read {path}: {exc.strerror or exc}") from None
        return cls.from_bytes(data)

    @property
    def thresholds(self) -> Thresholds:
        """Hold and reject thresholds; stored in the artifact, assignable to override."""
        return self._thresholds

    @thresholds.setter
    def thresholds(self, value: Thresholds) -> None:
        if not isinstance(value, Thresholds):
            raise TypeError(f"thresholds must be a Thresholds, got {type(value).__name__}")
        self._thresholds = value
        self._manifest = None

    @property
    def manifest(self) -> dict:
        """The artifact manifest (built by serializing when the model changed since)."""
        self._require_fitted("manifest")
        if self._manifest is None:
            self.to_bytes()
        return self._manifest

    @property
    def version(self) -> str:
        """Short content id: the first 12 hex digits of the artifact's sha256."""
        return self.manifest["sha256"][:12]
