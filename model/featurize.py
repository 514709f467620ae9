"""Whole batches of comments to hashed features in one pass.

:class:`BatchFeaturizer` gives, for a list of comments, exactly the buckets of
``TokenHasher.buckets(Tokenizer.features(text))`` for every text, in the same
order, without building a string per bigram or hashing a token twice:

* each distinct unigram gets a small integer id (a bounded dict); its bucket is
  hashed once, when it is first seen;
* bigrams are pairs of ids, ``first << 32 | second``; a pair's bucket is
  MurmurHash3 of the bigram string ``first_second`` (the same string
  :meth:`Tokenizer.features` emits), built and hashed only when the pair is
  new to the cache;
* explanations get their token names lazily (:class:`TokenNames`): only the
  top-k tokens of a comment are ever spelled out.

The features, and so the buckets and every score, are unchanged; no artifact
format or version changes.  Character n-grams are not fused: a tokenizer with
them on takes the plain ``features`` + ``buckets`` path.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import chain, repeat

import numpy as np
import scipy.sparse as sp

from .hashing import TokenHasher, _hash_many
from .tokens import BIGRAM_JOINER, DOC_SEPARATOR, DOMAIN_PREFIX, Tokenizer

__all__ = ["BatchFeaturizer", "Featurized", "TokenNames"]

_PAIR_SHIFT = 32


class TokenNames:
    """The feature tokens of a batch, concatenated, spelled out only on access.

    ``names[i]`` equals ``list(chain.from_iterable(features))[i]``.
    """

    __slots__ = ("_vocab", "_first", "_second")

    def __init__(self, vocab: list[str], first: np.ndarray, second: np.ndarray):
        self._vocab = vocab
        self._first = first
        self._second = second  # -1 for a unigram

    def __len__(self) -> int:
        return int(self._first.size)

    def __getitem__(self, i):
        # numpy integers index a list directly (__index__); no int() round trips.
        name = self._vocab[self._first[i]]
        second = self._second[i]
        if second < 0:
            return name
        return name + BIGRAM_JOINER + self._vocab[second]

    def __iter__(self):
        return map(self.__getitem__, range(len(self)))


@dataclass
class Featurized:
    """A batch's features: ``lengths[i]`` tokens for comment ``i``, their ``buckets``
    (int64, concatenated in feature order) and their ``tokens`` (a sequence of str)."""

    n: int
    lengths: np.ndarray
    buckets: np.ndarray
    tokens: object


class BatchFeaturizer:
    """Comments to feature buckets, a whole batch at a time.

    Parameters
    ----------
    tokenizer : Tokenizer
    hasher : TokenHasher
    cache_size : int
        Most distinct unigrams (and, separately, bigram pairs) remembered.  When
        either table is full at the start of a call, both are emptied (a bigram
        refers to unigram ids), so memory stays within ``cache_size`` plus one
        batch's distinct tokens.  The default 2**17 keeps both tables to about
        30 MB at worst (measured with tracemalloc: 13 MB of pairs, 16 MB of
        short tokens), within a worker's memory budget.

    Examples
    --------
    >>> from model.tokens import Tokenizer
    >>> from model.hashing import TokenHasher
    >>> tok, h = Tokenizer(), TokenHasher(n_buckets=2**18)
    >>> f = BatchFeaturizer(tokenizer=tok, hasher=h).featurize(["Free casino now", ""])
    >>> f.lengths.tolist(), list(f.tokens)
    ([5, 0], ['free', 'casino', 'now', 'free_casino', 'casino_now'])
    >>> f.buckets.tolist() == h.buckets(tok.features("Free casino now")).tolist()
    True
    """

    def __init__(self, *, tokenizer: Tokenizer, hasher: TokenHasher, cache_size: int = 2**17):
        if not isinstance(tokenizer, Tokenizer):
            raise ValueError(f"BatchFeaturizer: tokenizer must be a Tokenizer, got {tokenizer!r}")
        if not isinstance(hasher, TokenHasher):
            raise ValueError(f"BatchFeaturizer: hasher must be a TokenHasher, got {hasher!r}")
        if isinstance(cache_size, bool) or not isinstance(cache_size, int) or cache_size < 1:
            raise ValueError(f"BatchFeaturizer: cache_size must be an integer >= 1, got {cache_size!r}")
        self.tokenizer = tokenizer
        self.hasher = hasher
        self.cache_size = cache_size
        self._clear()

    def _clear(self) -> None:
        self._ids: dict[str, int] = {}
        self._vocab: list[str] = []
        self._uni_bucket = np.zeros(0, dtype=np.int64)
        self._is_domain = np.zeros(0, dtype=bool)
        self._pairs: dict[int, int] = {}

    # -- unigram ids -------------------------------------------------------- #

    def _unigram_ids(self, flat: list[str]) -> np.ndarray:
        ids_of = self._ids
        ids = np.fromiter(map(ids_of.get, flat, repeat(-1)), dtype=np.int64, count=len(flat))
        missing = np.flatnonzero(ids < 0)
        if missing.size:
            new = list(dict.fromkeys([flat[i] for i in missing.tolist()]))
            start = len(self._vocab)
            ids_of.update(zip(new, range(start, start + len(new))))
            self._vocab.extend(new)
            mask = self.hasher.n_buckets - 1
            buckets = _hash_many(new, self.hasher.seed, mask).astype(np.int64)
            self._uni_bucket = np.concatenate((self._uni_bucket, buckets))
            self._is_domain = np.concatenate(
                (self._is_domain, np.fromiter((t.startswith(DOMAIN_PREFIX) for t in new), dtype=bool, count=len(new)))
            )
            ids[missing] = np.fromiter(map(ids_of.__getitem__, [flat[i] for i in missing.tolist()]),
                                       dtype=np.int64, count=missing.size)
        return ids

    # -- bigram buckets ----------------------------------------------------- #

    def _pair_buckets(self, first: np.ndarray, second: np.ndarray) -> np.ndarray:
        codes = ((first << _PAIR_SHIFT) | second).tolist()
        pairs = self._pairs
        out = np.fromiter(map(pairs.get, codes, repeat(-1)), dtype=np.int64, count=len(codes))
        missing = np.flatnonzero(out < 0)
        if missing.size:
            # Every missing occurrence is spelled and hashed (a repeat within the
            # batch costs less than de-duplicating first).
            new = [codes[i] for i in missing.tolist()]
            vocab = self._vocab
            low = (1 << _PAIR_SHIFT) - 1
            joiner = BIGRAM_JOINER
            names = [vocab[c >> _PAIR_SHIFT] + joiner + vocab[c & low] for c in new]
            buckets = _hash_many(names, self.hasher.seed, self.hasher.n_buckets - 1)
            out[missing] = buckets
            pairs.update(zip(new, buckets.tolist()))
        return out

    # -- the batch ---------------------------------------------------------- #

    def featurize(self, texts: list[str]) -> Featurized:
        """Features of many comments: lengths, buckets and (lazy) token names.

        Parameters
        ----------
        texts : list of str

        Returns
        -------
        Featurized
            ``buckets`` equals ``hasher.buckets(chain(*map(tokenizer.features, texts)))``.
        """
        tok = self.tokenizer
        n = len(texts)
        if tok.char_ngrams[0]:
            feats = tok.features_many(texts)
            lengths = np.fromiter(map(len, feats), dtype=np.int64, count=n)
            flat = list(chain.from_iterable(feats))
            return Featurized(n, lengths, self.hasher.buckets(flat).astype(np.int64), flat)
        if len(self._ids) >= self.cache_size or len(self._pairs) >= self.cache_size:
            self._clear()
        flat = tok.unigram_stream(texts) if n > 1 else None
        if flat is None:
            flat = []
            for i, text in enumerate(texts):
                if i:
                    flat.append(DOC_SEPARATOR)
                flat.extend(tok._unigrams(text))
        ids = self._unigram_ids(flat)
        if n > 1:
            is_sep = ids == self._ids[DOC_SEPARATOR]
            doc = np.cumsum(is_sep)
            word = ~is_sep
            ids, doc = ids[word], doc[word]
        else:
            doc = np.zeros(ids.size, dtype=np.int64)
        ulen = np.bincount(doc, minlength=n).astype(np.int64)
        if not tok.bigrams:
            return Featurized(n, ulen, self._uni_bucket[ids], TokenNames(self._vocab, ids, np.full(ids.size, -1)))
        seq, seq_doc = ids, doc
        url = self._ids.get("<url>")
        if url is not None:
            # Domain tokens stay out of the bigrams of comments that have a link
            # (Tokenizer.features drops them from the word sequence only then).
            has_url = np.zeros(n, dtype=bool)
            has_url[doc[ids == url]] = True
            keep = ~(self._is_domain[ids] & has_url[doc])
            if not keep.all():
                seq, seq_doc = ids[keep], doc[keep]
        same = seq_doc[1:] == seq_doc[:-1]
        first, second, pair_doc = seq[:-1][same], seq[1:][same], seq_doc[1:][same]
        pair_bucket = self._pair_buckets(first, second) if first.size else np.zeros(0, dtype=np.int64)
        blen = np.bincount(pair_doc, minlength=n).astype(np.int64) if n else np.zeros(0, dtype=np.int64)
        # Feature order per comment: its unigrams, then its bigrams.  Both parts
        # are sorted by comment already, so a stable sort is a linear merge.
        order = np.argsort(np.concatenate((doc, pair_doc)), kind="stable")
        buckets = np.concatenate((self._uni_bucket[ids], pair_bucket))[order]
        names_first = np.concatenate((ids, first))[order]
        names_second = np.concatenate((np.full(ids.size, -1, dtype=np.int64), second))[order]
        return Featurized(n, ulen + blen, buckets, TokenNames(self._vocab, names_first, names_second))

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
