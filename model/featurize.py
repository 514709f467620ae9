"""Whole batches of comments to hashed features in one pass.

:class:`BatchFeaturizer` gives, for a list of comments, exactly the buckets of
``TokenHasher.buckets(Tokenizer.features(text))`` for every text, in the same
order: the unigrams of the whole batch come from one
:meth:`Tokenizer.unigram_stream` pass, and all tokens are hashed in one bulk
MurmurHash3 call.

Measured and dropped: a token -> id table with id-pair bigram buckets (a
bigram string built and hashed only when new).  Its dict lookups (~75 ns
each, memory bound) cost as much as hashing in C, and on text with a large
vocabulary most pairs are new, so it was slower than hashing every token.

The features, and so the buckets and every score, are unchanged; no artifact
format or version changes.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import chain

import numpy as np
import scipy.sparse as sp

from .hashing import TokenHasher
from .tokens import Tokenizer

__all__ = ["BatchFeaturizer", "Featurized"]


@dataclass
class Featurized:
    """A batch's features: ``lengths[i]`` tokens for comment ``i``, their ``buckets``
    (int64, concatenated in feature order) and their ``tokens`` (list of str)."""

    n: int
    lengths: np.ndarray
    buckets: np.ndarray
    tokens: list


class BatchFeaturizer:
    """Comments to feature buckets, a whole batch at a time.

    Parameters
    ----------
    tokenizer : Tokenizer
    hasher : TokenHasher

    Examples
    --------
    >>> from model.tokens import Tokenizer
    >>> from model.hashing import TokenHasher
    >>> tok, h = Tokenizer(), TokenHasher(n_buckets=2**18)
    >>> f = BatchFeaturizer(tokenizer=tok, hasher=h).featurize(["Free casino now", ""])
    >>> f.lengths.tolist(), f.tokens
    ([5, 0], ['free', 'casino', 'now', 'free_casino', 'casino_now'])
    >>> f.buckets.tolist() == h.buckets(tok.features("Free casino now")).tolist()
    True
    """

    def __init__(self, *, tokenizer: Tokenizer, hasher: TokenHasher):
        if not isinstance(tokenizer, Tokenizer):
            raise ValueError(f"BatchFeaturizer: tokenizer must be a Tokenizer, got {tokenizer!r}")
        if not isinstance(hasher, TokenHasher):
            raise ValueError(f"BatchFeaturizer: hasher must be a TokenHasher, got {hasher!r}")
        self.tokenizer = tokenizer
        self.hasher = hasher

    def featurize(self, texts: list[str]) -> Featurized:
        """Features of many comments: lengths, buckets and token names.

        Parameters
        ----------
        texts : list of str

        Returns
        -------
        Featurized
            ``buckets`` equals ``hasher.buckets(chain(*map(tokenizer.features, texts)))``.
        """
        feats = self.tokenizer.features_many(texts)
        lengths = np.fromiter(map(len, feats), dtype=np.int64, count=len(feats))
        flat = list(chain.from_iterable(feats))
        return Featurized(len(feats), lengths, self.hasher.buckets(flat).astype(np.int64), flat)

    def matrix(self, texts: list[str]) -> sp.csr_matrix:
        """``hasher.matrix(map(tokenizer.features, texts))``, built from one batch pass.

        Rows are the mean over token occurrences (float32, canonical CSR, an
        empty comment is a zero row), bit for bit what :meth:`TokenHasher.matrix` gives.
        """
        f = self.featurize(texts)
        indptr = np.zeros(f.n + 1, dtype=np.int32)
        np.cumsum(f.lengths, out=indptr[1:])
        out = sp.csr_matrix((np.ones(f.buckets.size, dtype=np.float32), f.buckets.astype(np.int32), indptr),
                            shape=(f.n, self.hasher.n_buckets))
        out.sum_duplicates()  # as TokenHasher.matrix: sorts each row, adds up repeats and collisions
        out.data /= np.repeat(f.lengths.astype(np.float32), np.diff(out.indptr))
        return out
