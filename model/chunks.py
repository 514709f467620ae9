"""Whitespace chunks to token ids: every distinct chunk's tokens, hashes and marks, held once.

Comments reuse the same few thousand whitespace chunks ("the", "great,",
"free!"), and a chunk always turns into the same tokens.  A
:class:`ChunkStore` gives each chunk it meets an integer id and keeps that
chunk's tokens in flat columns: the token strings (a list), their 32-bit
hashes and their marks (numpy arrays).  Cutting a batch of comments then costs
one C-level dict lookup per chunk; everything after that is numpy gathers over
the ids (:meth:`ChunkStore.expand`), and a token's string is read only when an
explanation names it.

The store is bounded.  When it holds more than ``cap`` chunks (or ``4 * cap``
tokens) it keeps the half that was looked up most often, with counts halved,
and drops the rest; one-off chunks (links with ids, typos, phone numbers) so
never push the common vocabulary out.  That happens only at the start of a
:meth:`~ChunkStore.lookup`, so the ids of one batch stay valid while it is
encoded.  A store is not thread-safe: give each thread its own encoder.
"""
from __future__ import annotations

from operator import itemgetter
from typing import Callable

import numpy as np

from model.hashing import rotl16

__all__ = ["ChunkStore"]

#: Chunks longer than this, or with more tokens than ``max_tokens``, get an id
#: for the batch they are in but no place in the lookup table.
_MAX_KEY_CHARS = 200


def _take(items: list, positions: np.ndarray) -> list:
    """``[items[i] for i in positions]`` in C."""
    index = positions.tolist()
    return [items[i] for i in index] if len(index) < 2 else list(itemgetter(*index)(items))


class _Ids(dict):
    """chunk -> id; a chunk not yet held is added on first lookup."""

    __slots__ = ("_add",)

    def __init__(self, add):
        super().__init__()
        self._add = add

    def __missing__(self, chunk):
        return self._add(chunk)


class _Column:
    """A growable 1-D numpy array (amortised doubling)."""

    __slots__ = ("data", "n")

    def __init__(self, dtype, values=()):
        values = np.asarray(values, dtype=dtype)
        self.data = np.empty(max(1024, values.size), dtype=dtype)
        self.data[:values.size] = values
        self.n = values.size

    def extend(self, values: list) -> None:
        need = self.n + len(values)
        if need > self.data.size:
            grown = np.empty(max(need, 2 * self.data.size), dtype=self.data.dtype)
            grown[:self.n] = self.data[:self.n]
            self.data = grown
        self.data[self.n:need] = values
        self.n = need

    def view(self) -> np.ndarray:
        return self.data[:self.n]


def _entry_tuple(tokens, hashes, marks) -> tuple:
    """``(tokens, hashes, marks, rotated)``: ``marks`` has one byte per token, the
    bits of :func:`model.tokens.token_marks` (the token rules' and ``MARK_URL`` / ``MARK_DOMAIN``);
    ``rotated`` each hash rotated by 16 bits, the left half of a word-pair key
    (:func:`model.hashing.rotl16`)."""
    return tuple(tokens), tuple(hashes), bytes(marks), tuple(map(rotl16, hashes))


def _single(entry: tuple) -> tuple:
    """A one-token entry as ``(token, hash, rotated, marks)`` (see :attr:`ChunkStore.singles`)."""
    (token,), (hashed,), marks, (rotated,) = entry
    return token, hashed, rotated, marks[0]


class ChunkStore:
    """Ids for whitespace chunks, and each chunk's tokens as flat columns.

    Parameters
    ----------
    entry : callable
        ``entry(chunk) -> (tokens, marks, chunk_marks)``: the chunk's tokens (a
        tuple of str), one small int of bit marks per token, and one of the
        chunk's own.
    hash_list : callable
        ``hash_list(tokens) -> list[int]``: the full 32-bit hash of each token.
    alias : callable, optional
        ``alias(chunk) -> key or None``: a key with the same entry as the
        chunk (a string that is never a chunk); many one-off chunks then share
        one held entry.
    cap : int
        Chunks held before the least used half is dropped.
    max_tokens : int
        Chunks with more tokens than this are encoded but not held.

    Examples
    --------
    >>> store = ChunkStore(lambda c: (tuple(c.split(",")), [0] * len(c.split(",")), 0), lambda t: [len(x) for x in t])
    >>> ids = store.lookup(["a,bb", "ccc", "a,bb"])
    >>> pos, size = store.expand(ids)
    >>> [store.tokens[p] for p in pos.tolist()], size.tolist(), store.hashes[pos].tolist()
    (['a', 'bb', 'ccc', 'a', 'bb'], [2, 1, 2], [1, 2, 3, 1, 2])
    """

    def __init__(self, entry: Callable, hash_list: Callable, *, alias: Callable | None = None,
                 cap: int = 1 << 16, max_tokens: int = 64):
        self._entry = entry
        self._alias = alias
        self._hash_list = hash_list
        self.cap = int(cap)
        self._max_tokens = int(max_tokens)
        self._rebuild([], [], [], [], [], [])

    # -- state ---------------------------------------------------------------

    def _rebuild(self, chunks: list, tokens: list, sizes: list, hashes, marks, chunk_marks, hits=()) -> None:
        """Start over holding ``chunks`` (ids 0..k-1 in order) and their tokens."""
        self.ids = _Ids(self._add)
        self.ids.update(zip(chunks, range(len(chunks))))
        self._chunk = list(chunks)
        self.tokens = list(tokens)  # a new list: names of earlier batches keep the old one
        self.entries: list[tuple] = []  # per id: (tokens, hashes, marks, rotated) as Python objects, for one comment
        #: held chunk -> ``(token, hash, rotated hash, marks)`` for the chunks that are one token (most
        #: of them): one lookup per chunk gives a comment of such chunks all it needs.
        self.singles: dict[str, tuple] = {}
        sizes = np.asarray(sizes, dtype=np.int64)
        starts = np.cumsum(sizes) - sizes
        self._start = _Column(np.int64, starts)
        self._size = _Column(np.int32, sizes)
        self._hash = _Column(np.uint32, hashes)
        self._mark = _Column(np.uint8, marks)
        self._chunk_mark = _Column(np.uint8, chunk_marks)
        self._hits = _Column(np.uint32, hits if len(hits) else np.zeros(len(chunks)))
        self._new_start: list[int] = []
        self._new_size: list[int] = []
        self._new_hash: list[int] = []
        self._new_mark: list[int] = []
        self._new_chunk_mark: list[int] = []
        at = 0
        hashes = np.asarray(hashes).tolist()
        marks = np.asarray(marks).tolist()
        for chunk, size in zip(self._chunk, sizes.tolist()):
            entry = _entry_tuple(self.tokens[at:at + size], hashes[at:at + size], marks[at:at + size])
            self.entries.append(entry)
            if size == 1 and chunk is not None:
                self.singles[chunk] = _single(entry)
            at += size

    def __len__(self) -> int:
        """How many chunks the lookup table holds."""
        return len(self.ids)

    @property
    def hashes(self) -> np.ndarray:
        """uint32, the hash of every held token (index with :meth:`expand`'s positions)."""
        return self._hash.view()

    @property
    def marks(self) -> np.ndarray:
        """uint8, the marks of every held token."""
        return self._mark.view()

    @property
    def chunk_marks(self) -> np.ndarray:
        """uint8, the marks of every id (index with ids)."""
        return self._chunk_mark.view()

    # -- adding ----------------------------------------------------------------

    def _add(self, chunk: str) -> int:
        if self._alias is not None:
            alias = self._alias(chunk)
            if alias is not None:  # shares an entry; the chunk itself is not held
                return self.ids[alias]
        tokens, marks, chunk_marks = self._entry(chunk)
        held = len(tokens) <= self._max_tokens and len(chunk) <= _MAX_KEY_CHARS
        return self._append(tokens, marks, chunk_marks, chunk if held else None)

    def _append(self, tokens, marks, chunk_marks, chunk) -> int:
        at = len(self._chunk)
        self._chunk.append(chunk)
        if chunk is not None:
            dict.__setitem__(self.ids, chunk, at)
        self._new_start.append(len(self.tokens))
        self._new_size.append(len(tokens))
        self.tokens.extend(tokens)
        hashes = self._hash_list(tokens)
        self._new_hash.extend(hashes)
        self._new_mark.extend(marks)
        entry = _entry_tuple(tokens, hashes, marks)
        self.entries.append(entry)
        if chunk is not None and len(tokens) == 1:
            self.singles[chunk] = _single(entry)
        self._new_chunk_mark.append(chunk_marks)
        return at

    def add_unheld(self, tokens: list[str], marks: list[int]) -> int:
        """An id for a token list that is not a chunk (valid until the next lookup)."""
        at = self._append(tokens, marks, 0, None)
        self._flush()
        return at

    def _flush(self) -> None:
        if self._new_start:
            self._start.extend(self._new_start)
            self._size.extend(self._new_size)
            self._hash.extend(self._new_hash)
            self._mark.extend(self._new_mark)
            self._chunk_mark.extend(self._new_chunk_mark)
            self._hits.extend([0] * len(self._new_start))
            self._new_start, self._new_size, self._new_hash, self._new_mark = [], [], [], []
            self._new_chunk_mark = []

    # -- the batch path --------------------------------------------------------

    def fit_cap(self) -> None:
        """Shed the least used half if the store is over its bounds (ids change)."""
        if len(self._chunk) > self.cap or len(self.tokens) > 4 * self.cap:
            self._flush()
            self._shrink()

    def lookup(self, chunks: list[str]) -> np.ndarray:
        """int32 ids of ``chunks``, adding the ones not held yet."""
        self.fit_cap()
        ids = np.fromiter(map(self.ids.__getitem__, chunks), dtype=np.int32, count=len(chunks))
        self._flush()
        hits = self._hits.view()
        if ids.size:
            hits += np.bincount(ids, minlength=hits.size).astype(np.uint32)
        return ids

    def expand(self, ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Flat token positions of ``ids`` in order, and the token count of each id."""
        size = self._size.view()[ids]
        if not ids.size:
            return np.empty(0, dtype=np.int64), size
        ends = np.cumsum(size)
        total = int(ends[-1])
        shift = self._start.view()[ids] - (ends - size)
        return np.arange(total, dtype=np.int64) + np.repeat(shift, size), size

    def _shrink(self) -> None:
        """Keep the most looked-up half of the held chunks (counts halved), in age order."""
        held = np.fromiter(self.ids.values(), dtype=np.int64, count=len(self.ids))
        keep = held
        if held.size > self.cap // 2:
            hits = self._hits.view()[held]
            top = np.argpartition(-hits.astype(np.int64), self.cap // 2)[: self.cap // 2]
            keep = np.sort(held[top])
        pos, sizes = self.expand(keep)
        self._rebuild(_take(self._chunk, keep), _take(self.tokens, pos), sizes, self._hash.view()[pos], self._mark.view()[pos],
                      self._chunk_mark.view()[keep], self._hits.view()[keep] // 2)
