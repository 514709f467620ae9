"""Tokens to buckets: MurmurHash3 feature hashing and the averaged document matrix.

Every token is hashed with MurmurHash3 (x86, 32-bit; Appleby's SMHasher
reference, computed by the ``mmh3`` package for strings and by a numpy
re-implementation of the same rounds for 4-byte integer keys) into one of ``B``
buckets.  A never-seen word of a new spam wave therefore still lands in a bucket
the model can learn overnight, with no vocabulary to grow or ship.

``B`` is a power of two so that the bucket is the hash's low bits (a mask, the
same as the modulo).  The default, 2**18 = 262,144, is the scikit-learn
reference's ``n_features``: quality comparisons against it start from the same
collision rate, and training only ever touches and stores the rows it sees.
"""
from __future__ import annotations

import struct
from itertools import islice, repeat
from operator import itemgetter
from numbers import Integral

import mmh3
import numpy as np

__all__ = ["murmur_bucket", "murmur_u32", "pair_hashes", "pair_hash", "rotl16", "TokenHasher", "MAX_BUCKETS", "PAIR_SCHEME"]

#: Largest bucket count: bucket ids must fit the int32 index arrays of the CSR matrix.
MAX_BUCKETS = 2**30
_MAX_SEED = 2**32 - 1
#: How a word pair (bigram) gets its hash; the model manifest records it, and a
#: model whose pairs were hashed another way is refused rather than mis-read.
PAIR_SCHEME = "murmurhash3-x86-32-of-rotl16-xor"
_U32 = np.uint32


def _hash(token: str, seed: int) -> int:
    # Always bytes: a lone surrogate cannot be UTF-8 encoded strictly, so its
    # code units are hashed instead of failing (and never handed to mmh3 as str).
    return mmh3.hash(token.encode("utf-8", "surrogatepass"), seed, False)


def murmur_bucket(token: str, n_buckets: int, seed: int = 0) -> int:
    """Bucket of one token: its unsigned MurmurHash3 (x86, 32-bit) modulo ``n_buckets``.

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


def _hash_many(tokens: list[str], seed: int) -> np.ndarray:
    """Full 32-bit hashes of many tokens at once; equal to ``_hash(t, seed)`` for each."""
    try:
        found = list(map(mmh3.hash, map(str.encode, tokens), repeat(seed), repeat(False)))
    except (UnicodeEncodeError, TypeError):
        # A lone surrogate (hashed by its code units) or a non-str token (named here).
        for token in tokens:
            if not isinstance(token, str):
                raise TypeError(f"TokenHasher: tokens must be str, got {type(token).__name__}") from None
        found = [_hash(t, seed) for t in tokens]
    return np.array(found, dtype=_U32)


_C1, _C2 = _U32(0xCC9E2D51), _U32(0x1B873593)
_F1, _F2 = _U32(0x85EBCA6B), _U32(0xC2B2AE35)


def murmur_u32(keys: np.ndarray, seed: int = 0) -> np.ndarray:
    """MurmurHash3 (x86, 32-bit) of each uint32 taken as its 4 little-endian bytes.

    The reference algorithm's one block, tail-free, then the finaliser, in
    uint32 arithmetic (numpy wraps products modulo 2**32, as the C code does).

    Examples
    --------
    >>> int(murmur_u32(np.array([0x64636261], dtype=np.uint32))[0]) == mmh3.hash(b"abcd", 0, False)
    True
    """
    k = np.asarray(keys, dtype=_U32) * _C1
    k = (k << _U32(15)) | (k >> _U32(17))
    k *= _C2
    h = k ^ _U32(seed)
    h = (h << _U32(13)) | (h >> _U32(19))
    h *= _U32(5)
    h += _U32(0xE6546B64)
    h ^= _U32(4)  # the key length in bytes
    h ^= h >> _U32(16)
    h *= _F1
    h ^= h >> _U32(13)
    h *= _F2
    h ^= h >> _U32(16)
    return h


def pair_hashes(left: np.ndarray, right: np.ndarray, seed: int = 0) -> np.ndarray:
    """Hashes of word pairs from the hashes of their two words.

    The pair ``(a, b)`` hashes to MurmurHash3 (x86, 32-bit, ``seed``) of the
    4-byte little-endian key ``rotl32(h(a), 16) xor h(b)``.  The rotation
    keeps ``(a, b)`` and ``(b, a)`` apart; MurmurHash3 of a 4-byte key is a
    bijection, so two pairs share a hash only when their keys collide (about
    one in 2**32 for distinct pairs).  No pair string is built or hashed,
    which makes bigrams nearly free: one vectorised call per batch.

    Parameters
    ----------
    left, right : array-like of uint32, the full 32-bit hashes of the words.
    seed : MurmurHash3 seed.

    Returns
    -------
    numpy.ndarray
        uint32, one hash per pair.

    Examples
    --------
    >>> a, b = mmh3.hash("free", 0, False), mmh3.hash("casino", 0, False)
    >>> key = ((a << 16 | a >> 16) & 0xFFFFFFFF) ^ b
    >>> int(pair_hashes([a], [b])[0]) == mmh3.hash(key.to_bytes(4, "little"), 0, False)
    True
    """
    left = np.asarray(left, dtype=_U32)
    right = np.asarray(right, dtype=_U32)
    if left.size == 0:
        return np.empty(0, dtype=_U32)
    return murmur_u32(((left << _U32(16)) | (left >> _U32(16))) ^ right, int(seed))


_PACK_U32 = struct.Struct("<I").pack


def rotl16(h: int) -> int:
    """A 32-bit hash rotated left by 16 bits: the left word's part of a pair key.

    Examples
    --------
    >>> hex(rotl16(0x12345678))
    '0x56781234'
    """
    return ((h << 16) | (h >> 16)) & 0xFFFFFFFF


def pair_hash(left: int, right: int, seed: int = 0) -> int:
    """:func:`pair_hashes` of one pair, in plain Python ints (for a handful of comments).

    Examples
    --------
    >>> a, b = mmh3.hash("free", 0, False), mmh3.hash("casino", 0, False)
    >>> pair_hash(a, b) == int(pair_hashes([a], [b])[0])
    True
    """
    key = (((left << 16) | (left >> 16)) & 0xFFFFFFFF) ^ right
    return mmh3.hash(key.to_bytes(4, "little"), seed, False)


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
        # token -> full 32-bit hash; a plain dict so a hit is one C lookup.  Misses are
        # hashed in bulk per call and added; the size never exceeds cache_size.
        self._cache: dict[str, int] = {}

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
        """How many token -> hash results the cache holds now (<= cache_size)."""
        return len(self._cache)

    def buckets(self, tokens) -> np.ndarray:
        """Bucket of each token, in order, as an int32 array.

        Parameters
        ----------
        tokens : iterable of str

        Returns
        -------
        numpy.ndarray
            int32, one bucket per token: the low bits of :meth:`hashes`.
        """
        if isinstance(tokens, str):
            raise TypeError("TokenHasher.buckets: tokens must be an iterable of str, not one str")
        return (self.hashes(list(tokens)) & _U32(self.n_buckets - 1)).astype(np.int32)

    def hashes(self, tokens: list) -> np.ndarray:
        """Full 32-bit MurmurHash3 of each token (a list of str), as uint32; cached."""
        cache = self._cache
        full = np.fromiter(map(cache.get, tokens, repeat(-1)), dtype=np.int64, count=len(tokens))
        missing = np.flatnonzero(full < 0)
        if missing.size:
            if missing.size == 1:
                missed = [tokens[missing[0]]]
            else:
                missed = list(itemgetter(*missing.tolist())(tokens))
            distinct = list(dict.fromkeys(missed))
            found = _hash_many(distinct, self.seed).tolist()
            fresh = dict(zip(distinct, found))
            full[missing] = list(map(fresh.__getitem__, missed))
            self._remember(fresh)
        return full.astype(_U32)

    def hash_list(self, tokens: list) -> list[int]:
        """:meth:`hashes` as a list of ints, without numpy (for a handful of tokens)."""
        cache = self._cache
        out = list(map(cache.get, tokens))
        if None in out:
            fresh = {}
            for i, value in enumerate(out):
                if value is None:
                    token = tokens[i]
                    if not isinstance(token, str):
                        raise TypeError(f"TokenHasher: tokens must be str, got {type(token).__name__}")
                    value = fresh.get(token)
                    if value is None:
                        value = fresh[token] = _hash(token, self.seed)
                    out[i] = value
            self._remember(fresh)
        return out

    def pairs(self, left: np.ndarray, right: np.ndarray) -> np.ndarray:
        """:func:`pair_hashes` with this hasher's seed."""
        return pair_hashes(left, right, self.seed)

    def pair_list(self, left: list[int], right: list[int]) -> list[int]:
        """:meth:`pairs` as a list of ints, without numpy (for a handful of pairs).

        Pairs are taken up to the shorter of ``left`` and ``right``, so
        ``pair_list(h, h[1:])`` gives the pairs of neighbours in ``h``.  Not
        cached: a miss in a big table of pairs costs more than the hash.
        """
        return self.rotated_pair_list(list(map(rotl16, left)), right)

    def rotated_pair_list(self, rotated_left: list[int], right: list[int]) -> list[int]:
        """:meth:`pair_list` with each left hash already rotated (:func:`rotl16`)."""
        seed = self.seed
        murmur = mmh3.hash
        pack = _PACK_U32
        return [murmur(pack(a ^ b), seed, False) for a, b in zip(rotated_left, right)]

    def rotated_pair_buckets(self, rotated_left, right, mask: int) -> list[int]:
        """``[h & mask for h in self.rotated_pair_list(rotated_left, right)]`` in one pass.

        Examples
        --------
        >>> h = TokenHasher(n_buckets=16)
        >>> a, b = h.hash_list(["free", "casino"])
        >>> h.rotated_pair_buckets([rotl16(a)], [b], 15) == [pair_hash(a, b) & 15]
        True
        """
        seed = self.seed
        murmur = mmh3.hash
        pack = _PACK_U32
        return [murmur(pack(a ^ b), seed, False) & mask for a, b in zip(rotated_left, right)]

    def _remember(self, fresh: dict) -> None:
        cap = self.cache_size
        if not cap:
            return
        cache = self._cache
        if len(cache) + len(fresh) > cap:
            # Drop the oldest entries (insertion order) down to half the cap,
            # or all of them when this batch alone fills the cache.
            keep = max(0, cap // 2 - len(fresh))
            for token in list(islice(cache, len(cache) - keep)):
                del cache[token]
            if len(fresh) > cap:
                fresh = dict(islice(fresh.items(), cap))
        cache.update(fresh)

    def matrix(self, token_lists) -> "sp.csr_matrix":
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
        import scipy.sparse as sp  # only this reference helper needs scipy

        flat: list[str] = []
        extend = flat.extend
        ends = [0]
        mark = ends.append
        for tokens in token_lists:
            if isinstance(tokens, str):
                raise TypeError("TokenHasher.matrix: each document must be a list of tokens, not a str")
            extend(tokens)
            mark(len(flat))
        if len(flat) > 2**31 - 1:
            raise ValueError("TokenHasher.matrix: more than 2**31 - 1 tokens in one call; pass fewer documents")
        indices = self.buckets(flat)
        indptr = np.array(ends, dtype=np.int32)
        lengths = np.diff(indptr).astype(np.float32)
        data = np.ones(len(flat), dtype=np.float32)
        out = sp.csr_matrix((data, indices, indptr), shape=(len(ends) - 1, self.n_buckets))
        out.sum_duplicates()  # in place: sorts each row, adds up repeats and collisions
        out.data /= np.repeat(lengths, np.diff(out.indptr))
        return out
