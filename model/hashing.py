"""Tokens to buckets: MurmurHash3 feature hashing and the averaged document matrix.

Every token is hashed with MurmurHash3 (x86, 32-bit; Appleby's SMHasher
reference, computed by :func:`sklearn.utils.murmurhash3_32`) into one of ``B``
buckets.  A never-seen word of a new spam wave therefore still lands in a bucket
the model can learn overnight, with no vocabulary to grow or ship.

``B`` is a power of two so that the bucket is the hash's low bits (a mask, the
same as the modulo).  The default, 2**18 = 262,144, is the scikit-learn
reference's ``n_features``: quality comparisons against it start from the same
collision rate, and training only ever touches and stores the rows it sees.
"""
from __future__ import annotations

from itertools import islice
from numbers import Integral

import numpy as np
import scipy.sparse as sp
from sklearn.utils import murmurhash3_32

__all__ = ["murmur_bucket", "TokenHasher", "MAX_BUCKETS"]

#: Largest bucket count: bucket ids must fit the int32 index arrays of the CSR matrix.
MAX_BUCKETS = 2**30
_MAX_SEED = 2**32 - 1


def _hash(token: str, seed: int) -> int:
    try:
        return murmurhash3_32(token, seed=seed, positive=True)
    except UnicodeEncodeError:
        # Lone surrogates cannot be UTF-8 encoded; hash their code units instead of failing.
        return murmurhash3_32(token.encode("utf-8", "surrogatepass"), seed=seed, positive=True)


def murmur_bucket(token: str, n_buckets: int, seed: int = 0) -> int:
    """Bucket of one token: ``murmurhash3_32(token, seed, positive=True) % n_buckets``.

    Parameters
    ----------
    token : str
        The token; hashed as its UTF-8 bytes.
    n_buckets : int
        A power of two between 1 and 2**30.
    seed : int
        MurmurHash3 seed, 0 <= seed < 2**32.

    Returns
    -------
    int
        The bucket, ``0 <= bucket < n_buckets``.

    Examples
    --------
    >>> murmur_bucket("hello", 2**30)  # 0x248BFA47 is below 2**30
    613153351
    >>> murmur_bucket("hello", 16)
    7
    """
    n_buckets = _check_buckets("murmur_bucket", "n_buckets", n_buckets)
    seed = _check_seed("murmur_bucket", "seed", seed)
    if not isinstance(token, str):
        raise TypeError(f"murmur_bucket: token must be str, got {type(token).__name__}")
    return _hash(token, seed) & (n_buckets - 1)


def _check_int(where, name, value):
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise ValueError(f"{where}: {name} must be an integer, got {value!r}")
    return int(value)


def _check_buckets(where, name, value):
    value = _check_int(where, name, value)
    if value < 1 or value > MAX_BUCKETS or value & (value - 1):
        raise ValueError(f"{where}: {name} must be a power of two between 1 and 2**30, got {value!r}")
    return value


def _check_seed(where, name, value):
    value = _check_int(where, name, value)
    if not 0 <= value <= _MAX_SEED:
        raise ValueError(f"{where}: {name} must be between 0 and 2**32 - 1, got {value!r}")
    return value


def _check_cache(where, name, value):
    value = _check_int(where, name, value)
    if value < 0:
        raise ValueError(f"{where}: {name} must be >= 0 (0 turns the cache off), got {value!r}")
    return value


# One declarative table: parameter -> (default, check).
_PARAMS = {
    "n_buckets": (2**18, _check_buckets),
    "seed": (0, _check_seed),
    "cache_size": (2**18, _check_cache),
}


class _BucketCache(dict):
    """Token -> bucket, filled on a miss; holds at most ``cap`` tokens.

    A hit is a plain dict lookup in C.  When full, the oldest half (insertion
    order) is dropped, so memory stays bounded while recent tokens stay warm.
    """

    __slots__ = ("_seed", "_mask", "_cap")

    def __init__(self, seed, mask, cap):
        super().__init__()
        self._seed = seed
        self._mask = mask
        self._cap = cap

    def __missing__(self, token):
        if not isinstance(token, str):
            raise TypeError(f"TokenHasher: tokens must be str, got {type(token).__name__}")
        bucket = _hash(token, self._seed) & self._mask
        if self._cap:
            if len(self) >= self._cap:
                for old in list(islice(self, max(1, len(self) // 2))):
                    del self[old]
            self[token] = bucket
        return bucket


class TokenHasher:
    """Hash tokens into ``n_buckets`` buckets and build averaged document rows.

    Parameters
    ----------
    n_buckets : int
        Number of buckets ``B``, a power of two (1 to 2**30); default 2**18.
    seed : int
        MurmurHash3 seed (0 to 2**32 - 1).
    cache_size : int
        Most tokens whose bucket is remembered; 0 turns the cache off.

    Examples
    --------
    >>> h = TokenHasher(n_buckets=16)
    >>> h.buckets(["hello", "hello"]).tolist()
    [7, 7]
    >>> m = h.matrix([["hello", "hello", "world"], []])
    >>> m.shape, m.dtype.name, m.sum(axis=1).A1.round(6).tolist()
    ((2, 16), 'float32', [1.0, 0.0])
    """

    def __init__(self, *, n_buckets=2**18, seed=0, cache_size=2**18):
        given = dict(n_buckets=n_buckets, seed=seed, cache_size=cache_size)
        for name, (_, check) in _PARAMS.items():
            setattr(self, name, check("TokenHasher", name, given[name]))
        self._cache = _BucketCache(self.seed, self.n_buckets - 1, self.cache_size)

    def params(self) -> dict:
        """JSON-safe parameters; ``TokenHasher(**h.params())`` rebuilds this hasher."""
        return {name: getattr(self, name) for name in _PARAMS}

    def __eq__(self, other):
        return isinstance(other, TokenHasher) and self.params() == other.params()

    def __hash__(self):
        return hash(tuple(self.params().values()))

    def __repr__(self):
        return "TokenHasher(" + ", ".join(f"{k}={v!r}" for k, v in self.params().items()) + ")"

    def __getstate__(self):
        return self.params()

    def __setstate__(self, state):
        self.__init__(**state)

    @property
    def cached(self) -> int:
        """How many token -> bucket results the cache holds now (<= cache_size)."""
        return len(self._cache)

    def buckets(self, tokens) -> np.ndarray:
        """Bucket of each token, in order, as an int32 array.

        Parameters
        ----------
        tokens : iterable of str

        Returns
        -------
        numpy.ndarray
            int32, one bucket per token.
        """
        if isinstance(tokens, str):
            raise TypeError("TokenHasher.buckets: tokens must be an iterable of str, not one str")
        return np.fromiter(map(self._cache.__getitem__, tokens), dtype=np.int32)

    def matrix(self, token_lists) -> sp.csr_matrix:
        """Documents as rows of bucket frequencies: the mean over token occurrences.

        Entry ``(i, b)`` is (occurrences in document ``i`` of tokens in bucket
        ``b``) / (tokens in document ``i``), so every non-empty row sums to 1 and
        an empty document is an all-zero row.  Colliding tokens add up.

        Parameters
        ----------
        token_lists : iterable of iterables of str
            One token list per document; a generator is fine.

        Returns
        -------
        scipy.sparse.csr_matrix
            float32, shape ``(n_docs, n_buckets)``, canonical (sorted indices,
            no duplicates), int32 indices.
        """
        lookup = self._cache.__getitem__
        flat: list[int] = []
        extend = flat.extend
        ends = [0]
        mark = ends.append
        for tokens in token_lists:
            if isinstance(tokens, str):
                raise TypeError("TokenHasher.matrix: each document must be a list of tokens, not a str")
            extend(map(lookup, tokens))
            mark(len(flat))
        return self._rows(flat, ends)

    def _rows(self, flat, ends) -> sp.csr_matrix:
        n_docs = len(ends) - 1
        indptr = np.array(ends, dtype=np.int64)
        counts = np.diff(indptr)
        indices = np.array(flat, dtype=np.int32)
        data = np.ones(len(flat), dtype=np.float32)
        if len(flat) >= 2**31 - 1:
            raise ValueError("TokenHasher.matrix: more than 2**31 tokens in one call; pass fewer documents")
        out = sp.csr_matrix((data, indices, indptr.astype(np.int32)), shape=(n_docs, self.n_buckets))
        out.sum_duplicates()  # sorts each row's indices and adds up repeats and collisions
        per_entry = np.repeat(counts.astype(np.float32), np.diff(out.indptr))
        out.data /= per_entry
        return out
