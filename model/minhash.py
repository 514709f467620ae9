"""MinHash signatures over word shingles (Broder 1997) and LSH band keys.

The Jaccard similarity of two comments' sets of word shingles (runs of
``shingle`` consecutive words) is estimated by the share of equal entries of
their MinHash signatures: for ``k`` random hash functions, each entry is the
minimum hash over the comment's shingles, and ``P(equal) = J``.  The estimate
is unbiased with standard error ``sqrt(J (1 - J) / k)``.

Everything here is deterministic across processes and hosts (CRC-32 of each
word's UTF-8 bytes, combined per shingle, then ``k`` seeded universal hashes),
because signatures computed by different workers must meet in the same LSH
buckets.

LSH: the signature is cut into ``bands`` bands of ``rows = k / bands`` rows;
two comments share a band's key with probability ``J**rows``, and at least one
of ``bands`` keys with ``1 - (1 - J**rows)**bands``, an S-curve whose middle
is near ``(1 / bands) ** (1 / rows)``.  :func:`band_hashes` gives every
band of a whole batch its 64-bit key in one numpy pass.
"""
from __future__ import annotations

import hashlib
import re
import unicodedata
import zlib
from collections.abc import Callable, Iterable
from itertools import chain

import numpy as np

from model.params import integer, set_params

EMPTY = 0xFFFFFFFF  # every entry of a comment with no shingles; such signatures match nothing
_WORD = re.compile(r"\w+")

_PARAMS = {
    "num_perm": integer(1, 4096),
    "shingle": integer(1, 16),
    "seed": integer(0, 2**63 - 1),
    "max_words": integer(1),
}


def default_words(text: str) -> list[str]:
    """NFKC, casefold, then runs of word characters."""
    if text.isascii():  # NFKC leaves ASCII as it is, and casefold() of ASCII is lower()
        return _WORD.findall(text.lower())
    return _WORD.findall(unicodedata.normalize("NFKC", text).casefold())


class MinHasher:
    """Signatures of texts, shingled by words.

    Parameters
    ----------
    num_perm : signature length ``k``.
    shingle : words per shingle.
    seed : seed of the universal hash functions; every worker must use the same.
    words : text -> list of words; the default folds case and Unicode forms,
        a stronger normalizer (e.g. the tokenizer's) may be passed in.
    max_words : only the first this many words are shingled: a campaign's
        template shows in its opening, and the cost per comment stays bounded.

    Examples
    --------
    >>> mh = MinHasher(num_perm=64, shingle=2)
    >>> a = mh.signature("win a free prize at prize.example today")
    >>> b = mh.signature("win a free prize at prize.example now")
    >>> 0.4 < jaccard_estimate(a, b) < 1.0
    True
    """

    def __init__(self, *, num_perm: int = 128, shingle: int = 3, seed: int = 0,
                 words: Callable[[str], list[str]] = default_words, max_words: int = 64):
        set_params(self, _PARAMS, locals())
        self.words = words
        rng = np.random.default_rng(seed)
        self._a = rng.integers(0, 1 << 63, size=num_perm, dtype=np.uint64) * np.uint64(2) + np.uint64(1)
        self._b = rng.integers(0, 1 << 63, size=num_perm, dtype=np.uint64)
        self._word_crc = _WordCrc()

    def shingles(self, text: str) -> set[str]:
        """The set of word shingles (for exact Jaccard); a text shorter than ``shingle`` words is one shingle."""
        words = self.words(text)[: self.max_words]
        if not words:
            return set()
        n = self.shingle
        if len(words) <= n:
            return {" ".join(words)}
        return {" ".join(words[i:i + n]) for i in range(len(words) - n + 1)}

    def signature(self, text: str) -> np.ndarray:
        """The MinHash signature, shape ``(num_perm,)``, dtype uint32."""
        return self.signatures([text])[0]

    def signatures(self, texts: Iterable[str]) -> np.ndarray:
        """Signatures of many texts at once, shape ``(n, num_perm)``, dtype uint32.

        A shingle's hash combines its words' CRC-32s (so each word is hashed
        once, however many shingles it is in), then ``num_perm``
        multiply-add-shift hashes ``(a x + b) mod 2**64 >> 32`` (Dietzfelbinger
        1996) stand in for the random permutations.
        """
        return self.signatures_of_words([self.words(t) for t in texts])

    def signatures_of_words(self, word_lists: list[list[str]]) -> np.ndarray:
        """:meth:`signatures` of texts already split into words."""
        word_lists = [w[: self.max_words] for w in word_lists]
        lengths = np.fromiter((len(w) for w in word_lists), dtype=np.int64, count=len(word_lists))
        wh = np.fromiter(map(self._word_crc.__getitem__, chain.from_iterable(word_lists)), dtype=np.uint64,
                         count=int(lengths.sum()))
        return self._signatures_of_hashes(wh, lengths)

    def signatures_of_flat(self, words: list[str], counts) -> np.ndarray:
        """:meth:`signatures` of texts given as one flat word list and each text's word count.

        ``words`` holds the first text's ``counts[0]`` words, then the
        second's, and so on (the form :meth:`model.tokens.Tokenizer.words_many`
        returns); equal to :meth:`signatures_of_words` on the same texts.

        Examples
        --------
        >>> mh = MinHasher(num_perm=8, shingle=2)
        >>> a = mh.signatures_of_flat(["free", "prize", "now", "hello", "there"], [3, 2])
        >>> bool((a == mh.signatures_of_words([["free", "prize", "now"], ["hello", "there"]])).all())
        True
        """
        counts = np.asarray(counts, dtype=np.int64)
        if counts.ndim != 1 or (counts < 0).any() or int(counts.sum()) != len(words):
            raise ValueError(f"signatures_of_flat: counts must be >= 0 and add up to {len(words)} words")
        wh = np.fromiter(map(self._word_crc.__getitem__, words), dtype=np.uint64, count=len(words))
        if counts.size and int(counts.max()) > self.max_words:  # keep each text's first max_words words
            starts = np.repeat(np.cumsum(counts) - counts, counts)
            wh = wh[np.arange(len(words)) - starts < self.max_words]
            counts = np.minimum(counts, self.max_words)
        return self._signatures_of_hashes(wh, counts)

    def _signatures_of_hashes(self, wh: np.ndarray, lengths: np.ndarray) -> np.ndarray:
        """Signatures from every text's word hashes, concatenated (``lengths[i]`` for text ``i``)."""
        n_texts, n = len(lengths), self.shingle
        out = np.full((n_texts, self.num_perm), EMPTY, dtype=np.uint32)
        total = int(lengths.sum())
        if total == 0:
            return out
        wh = np.concatenate([wh, np.zeros(n, dtype=np.uint64)])
        starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
        text_of = np.repeat(np.arange(n_texts), lengths)
        pos = np.arange(total)
        end_of = (starts + lengths)[text_of]
        with np.errstate(over="ignore"):
            combined = np.zeros(total, dtype=np.uint64)
            for j in range(n):
                inside = (pos + j) < end_of
                combined = combined * _MIX + np.where(inside, wh[j:total + j] + np.uint64(1), np.uint64(0))
            # a shingle starts at each position leaving n - 1 words after it, or at a short text's first word
            offset = pos - starts[text_of]
            valid = (offset <= np.maximum(lengths[text_of] - n, 0))
            x = _fmix64(combined[valid]) >> np.uint64(32)
            owners = text_of[valid]
            hashed = np.empty((self.num_perm, x.size), dtype=np.uint64)  # written in place: no temporaries
            np.multiply(self._a[:, None], x[None, :], out=hashed)
            np.add(hashed, self._b[:, None], out=hashed)
        seg_starts = np.flatnonzero(np.concatenate([[True], owners[1:] != owners[:-1]]))
        # the shift is monotone, so the minimum's high half is the minimum of the high halves: shifting the
        # per-text minima gives the same signature as shifting every shingle's hash first
        lowest = np.minimum.reduceat(hashed, seg_starts, axis=1)
        out[owners[seg_starts]] = (lowest >> np.uint64(32)).T.astype(np.uint32)
        return out


_MIX = np.uint64(0x9E3779B97F4A7C15)


class _WordCrc(dict):
    """word -> CRC-32 of its UTF-8 bytes, remembered: a site's common words cost one C lookup.

    Bounded: when it holds ``cap`` words it starts afresh (a plain dict keeps
    the hit path in C; recomputing a CRC is cheap).
    """

    cap = 1 << 16

    def __missing__(self, word: str) -> int:
        if len(self) >= self.cap:
            self.clear()
        value = self[word] = zlib.crc32(word.encode("utf-8"))
        return value


def _fmix64(x: np.ndarray) -> np.ndarray:
    """MurmurHash3's 64-bit finalizer: every input bit reaches every output bit."""
    x = x ^ (x >> np.uint64(33))
    x = x * np.uint64(0xFF51AFD7ED558CCD)
    x = x ^ (x >> np.uint64(33))
    x = x * np.uint64(0xC4CEB9FE1A85EC53)
    return x ^ (x >> np.uint64(33))


def jaccard_estimate(a: np.ndarray, b: np.ndarray) -> float:
    """Share of equal signature entries: the MinHash estimate of the Jaccard similarity."""
    a, b = np.asarray(a), np.asarray(b)
    if a.shape != b.shape or a.ndim != 1 or a.size == 0:
        raise ValueError(f"jaccard_estimate: signatures must be 1-d of equal length, got {a.shape} and {b.shape}")
    if np.all(a == EMPTY) or np.all(b == EMPTY):
        return 0.0
    return float(np.mean(a == b))


def exact_jaccard(a: set, b: set) -> float:
    """``|a & b| / |a | b|`` (0 for two empty sets)."""
    union = len(a | b)
    return len(a & b) / union if union else 0.0


def band_keys(signature: np.ndarray, bands: int) -> list[str]:
    """One short hex key per band (band index included), equal iff the band's rows are equal."""
    sig = np.asarray(signature, dtype=np.uint32)
    if bands < 1 or sig.size % bands:
        raise ValueError(f"band_keys: {bands} bands do not divide a signature of {sig.size}")
    rows = sig.size // bands
    return [
        f"{b}:{hashlib.blake2b(sig[b * rows:(b + 1) * rows].astype('<u4').tobytes(), digest_size=8).hexdigest()}"
        for b in range(bands)
    ]


def band_hashes(signatures: np.ndarray, bands: int) -> np.ndarray:
    """A 64-bit key per band of each signature, shape ``(n, bands)``, dtype uint64.

    Equal for two signatures iff their band's rows are equal (up to 64-bit
    hash collisions, about ``2**-64`` per pair); the band index is mixed in, so
    keys of different bands never meet.  One numpy pass over a whole batch:
    each row is folded in with a multiply-add and MurmurHash3's finalizer.

    Examples
    --------
    >>> sig = np.arange(8, dtype=np.uint32).reshape(1, 8)
    >>> band_hashes(sig, 4).shape
    (1, 4)
    """
    sig = np.asarray(signatures, dtype=np.uint32)
    if sig.ndim == 1:
        sig = sig[None, :]
    if sig.ndim != 2 or bands < 1 or sig.shape[1] % bands:
        raise ValueError(f"band_hashes: {bands} bands do not divide signatures of shape {sig.shape}")
    rows = sig.shape[1] // bands
    cells = sig.reshape(sig.shape[0], bands, rows).astype(np.uint64)
    with np.errstate(over="ignore"):
        h = np.broadcast_to(_fmix64(np.arange(1, bands + 1, dtype=np.uint64) * _MIX), cells.shape[:2])
        for r in range(rows):
            h = _fmix64(h * _MIX + cells[:, :, r])
    return h


def collision_probability(j: float, *, bands: int, rows: int) -> float:
    """Probability that two texts of Jaccard ``j`` share at least one band key."""
    return 1.0 - (1.0 - j ** rows) ** bands

