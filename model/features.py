"""Comments to feature buckets: words hashed once, word pairs from the words' hashes.

A comment's features are its words (unigrams and marker tokens), each pair of
adjacent words (bigrams; a link's ``domain:`` token sits out, as in
:meth:`model.tokens.Tokenizer.features`) and, when switched on, character
n-grams.  Words and n-grams are hashed as strings with MurmurHash3; a pair
``(a, b)`` is hashed from the two words' hashes (:func:`model.hashing.pair_hashes`),
so no pair string is built on the scoring path and a batch's bigrams cost one
vectorised call.  The bucket of a feature is the low bits of its hash.

:class:`FeatureEncoder` has two entry points that give the same buckets for
the same comment: :meth:`~FeatureEncoder.texts` (the hot path) and
:meth:`~FeatureEncoder.tokens`, for comments already cut into feature strings
(``"free_casino"`` is the pair ``free``, ``casino``), which lets a caller score
a comment with some tokens removed.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import chain
from operator import itemgetter

import numpy as np

from model.chunks import ChunkStore
from model.hashing import TokenHasher
from model.normalization import CHUNKS, needs_whole_pipeline
from model.tokens import (BIGRAM_JOINER, CHUNK_SEPARATOR, MARK_DOMAIN, MARK_URL, Tokenizer, char_ngrams,
                          pair_positions, token_marks)

__all__ = ["BatchWords", "Features", "FeatureEncoder", "FeatureNames"]


class FeatureNames:
    """The token string of each feature occurrence, built only when asked for.

    Occurrences are laid out as all words, then all pairs, then all extra
    (character n-gram) tokens; a pair is named ``left_right``.
    """

    __slots__ = ("words", "left", "right", "extra")

    def __init__(self, words: list[str], left=(), right=(), extra: list[str] | tuple = ()):
        self.words = words
        self.left = left
        self.right = right
        self.extra = extra

    def __len__(self) -> int:
        return len(self.words) + len(self.left) + len(self.extra)

    def __getitem__(self, i: int) -> str:
        n_words = len(self.words)
        if i < n_words:
            return self.words[i]
        i -= n_words
        n_pairs = len(self.left)
        if i < n_pairs:
            return self.words[int(self.left[i])] + BIGRAM_JOINER + self.words[int(self.right[i])]
        return self.extra[i - n_pairs]

    def take(self, positions: np.ndarray) -> list[str]:
        """``[self[i] for i in positions]``, without a Python call per position."""
        positions = np.asarray(positions, dtype=np.int64)
        n_words, n_pairs = len(self.words), len(self.left)
        kind = (positions >= n_words).astype(np.int8) + (positions >= n_words + n_pairs)
        parts: list[str] = []
        where = np.empty(positions.size, dtype=np.int64)  # position of each answer in ``parts``
        for k in range(3):
            at = np.flatnonzero(kind == k)
            if not at.size:
                continue
            where[at] = np.arange(len(parts), len(parts) + at.size)
            if k == 0:
                parts.extend(_pick(self.words, positions[at]))
            elif k == 1:
                offset = positions[at] - n_words
                lefts = _pick(self.words, np.asarray(self.left)[offset])
                rights = _pick(self.words, np.asarray(self.right)[offset])
                parts.extend(map(BIGRAM_JOINER.join, zip(lefts, rights)))
            else:
                parts.extend(_pick(self.extra, positions[at] - n_words - n_pairs))
        return _pick(parts, where)


def _pick(items, positions: np.ndarray) -> list:
    """``[items[i] for i in positions]`` in C (operator.itemgetter)."""
    if isinstance(items, _Picked):
        items, positions = items.items, items.pos[np.asarray(positions, dtype=np.int64)]
    index = positions.tolist()
    if not index:
        return []
    if len(index) == 1:
        return [items[index[0]]]
    return list(itemgetter(*index)(items))


class _Picked:
    """``items[pos[i]]`` as a read-only sequence: a batch's words, read from a
    :class:`~model.chunks.ChunkStore` only when one is named."""

    __slots__ = ("items", "pos")

    def __init__(self, items: list, pos: np.ndarray):
        self.items = items
        self.pos = pos

    def __len__(self) -> int:
        return len(self.pos)

    def __getitem__(self, i: int):
        return self.items[self.pos[i]]


def _pairs(doc: np.ndarray, skip: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Flat positions (left, right) of each word pair, in order.

    Neighbours in the same comment pair up, except the positions in ``skip``
    (a ``domain:`` token right after its ``<url>`` marker, never two in a
    row): the marker pairs with the word after the domain instead.
    """
    size = doc.size
    if size < 2:
        return _EMPTY, _EMPTY
    valid = doc[:-1] == doc[1:]
    right = np.arange(1, size, dtype=np.int64)
    if skip.size:
        skipped = skip.astype(np.int64)
        marker = skipped - 1
        valid[marker] = False
        valid[skipped[skipped < size - 1]] = False
        bridge = skipped + 1 < size
        marker, after = marker[bridge], skipped[bridge] + 1
        right[marker] = after
        valid[marker] = doc[marker] == doc[after]
    left = np.flatnonzero(valid)
    return left, right[left]


@dataclass
class Features:
    """A batch of comments as flat feature occurrences.

    Attributes
    ----------
    n : number of comments.
    doc : int32 (m,), the comment of each occurrence.
    bucket : int32 (m,), its bucket.
    lengths : int64 (n,), occurrences per comment.
    names : indexable, ``names[i]`` is occurrence ``i``'s token string.
    hashes : uint32 (m,), the full 32-bit hash of each occurrence.
    """

    n: int
    doc: np.ndarray
    bucket: np.ndarray
    lengths: np.ndarray
    names: FeatureNames | list[str]
    hashes: np.ndarray


    def words(self, rows=None) -> tuple[list[str], np.ndarray]:
        """Each comment's words (unigrams and markers, as :meth:`model.tokens.Tokenizer.words` gives them),
        read off this batch: all of them in one flat list, and how many each comment has.

        Parameters
        ----------
        rows : the comments to give, in this order (a comment may come more than once); all by default.

        Raises
        ------
        ValueError : for features built from feature strings (:meth:`FeatureEncoder.tokens`), which carry no words.
        """
        if not isinstance(self.names, FeatureNames):
            raise ValueError("Features.words: only features of texts (FeatureEncoder.texts) carry their words")
        n_words = len(self.names.words)
        counts = np.bincount(self.doc[:n_words], minlength=self.n).astype(np.int64)
        if rows is None:
            return _pick(self.names.words, np.arange(n_words)), counts
        rows = np.asarray(rows, dtype=np.int64)
        starts = np.cumsum(counts) - counts
        wanted = counts[rows]
        total = int(wanted.sum())
        # each wanted comment's positions: its start, then one step per word
        positions = np.repeat(starts[rows] - (np.cumsum(wanted) - wanted), wanted) + np.arange(total)
        return _pick(self.names.words, positions), wanted


@dataclass(frozen=True)
class BatchWords:
    """The words of a batch's comments as one scoring pass cut them, for a caller that needs them too.

    Attributes
    ----------
    flat : every comment's words, one comment after the other.
    counts : int64 (n,), words per comment.
    params : :meth:`model.tokens.Tokenizer.word_params` of the tokenizer that cut them; a caller
        whose own tokenizer has other word parameters must cut the texts itself.
    """

    flat: list[str]
    counts: np.ndarray
    params: dict


_EMPTY = np.empty(0, dtype=np.int64)
#: In a comment's token marks: a ``<url>`` marker followed by its ``domain:`` token.
_URL_DOMAIN = bytes([MARK_URL, MARK_DOMAIN])


def _runs(marks: np.ndarray, group: np.ndarray, run: bytes) -> np.ndarray:
    """The group (comment) of each place where ``len(run)`` consecutive items
    of one group carry a bit of ``run[0]``, ``run[1]``, ... in order; ``group``
    is sorted."""
    span = len(run)
    n = marks.size - span + 1
    if n < 1:
        return _EMPTY
    hit = (marks[:n] & run[0]).astype(bool)
    for j in range(1, span):
        if not hit.any():
            return _EMPTY
        hit &= (marks[j:j + n] & run[j]).astype(bool)
    hit &= group[:n] == group[span - 1:]
    return group[:n][hit]


def _pair_sequence(marks: bytes) -> list[int]:
    """:func:`model.tokens.pair_positions` read off the token marks: every
    position but a ``domain:`` token right after its ``<url>`` marker."""
    seq: list[int] = []
    start = 0
    at = marks.find(_URL_DOMAIN)
    while at >= 0:
        seq.extend(range(start, at + 1))
        start = at + 2
        at = marks.find(_URL_DOMAIN, start)
    seq.extend(range(start, len(marks)))
    return seq


class FeatureEncoder:
    """Turn comments into :class:`Features` with one tokenizer and one hasher.

    Examples
    --------
    >>> enc = FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**18))
    >>> a = enc.texts(["Free casino!"])
    >>> b = enc.tokens([["free", "casino", "free_casino"]])
    >>> a.bucket.tolist() == b.bucket.tolist(), [a.names[i] for i in range(3)]
    (True, ['free', 'casino', 'free_casino'])
    """

    def __init__(self, tokenizer: Tokenizer, hasher: TokenHasher):
        self.tokenizer = tokenizer
        self.hasher = hasher
        self._mask = np.uint32(hasher.n_buckets - 1)
        self._store = ChunkStore(tokenizer.chunk_entry, hasher.hash_list, alias=tokenizer.chunk_alias)

    def texts(self, texts: list[str]) -> Features:
        """Features of raw comment texts (each a str)."""
        tok = self.tokenizer
        n = len(texts)
        ids, chunk_doc = self._chunk_ids(texts)
        pos, doc, marks = self._tokens_of(ids, chunk_doc)
        redo = self._needs_whole_pipeline(texts, ids, chunk_doc, marks, doc)
        if redo is not None:
            pos, doc, marks = self._tokens_of(*self._replace(texts, redo, ids, chunk_doc))
        hashes = self._store.hashes[pos]
        hash_parts, doc_parts = [hashes], [doc]
        left = right = _EMPTY
        if tok.bigrams:
            after_url = np.flatnonzero(marks[:-1] & MARK_URL) + 1
            skip = after_url[(marks[after_url] & MARK_DOMAIN).astype(bool) & (doc[after_url] == doc[after_url - 1])]
            left, right = _pairs(doc, skip)
        if left.size:
            hash_parts.append(self.hasher.pairs(hashes[left], hashes[right]))
            doc_parts.append(doc[left])
        words = _Picked(self._store.tokens, pos)
        extra: list[str] = []
        if tok.char_ngrams[0]:
            low, high = tok.char_ngrams
            flat = _pick(words, np.arange(len(pos)))
            ends = np.cumsum(np.bincount(doc, minlength=n)).tolist()
            per_doc = [char_ngrams(flat[a:b], low, high)  # they skip markers and domains
                       for a, b in zip([0] + ends[:-1], ends)]
            extra = list(chain.from_iterable(per_doc))
            hash_parts.append(self.hasher.hashes(extra))
            doc_parts.append(np.repeat(np.arange(n, dtype=np.int32), list(map(len, per_doc))))
        return self._finish(n, hash_parts, doc_parts, FeatureNames(words, left, right, extra))

    def _chunk_ids(self, texts: list[str]) -> tuple[np.ndarray, np.ndarray]:
        """Store ids of the comments' chunks in order, and the comment of each."""
        chunks, per_text = self.tokenizer.chunks_many(texts)
        ids = self._store.lookup(chunks)
        if per_text is not None:
            return ids, np.repeat(np.arange(len(texts), dtype=np.int32), per_text)
        # One separator chunk stands between two comments (it has no tokens).
        separator = self._store.ids[CHUNK_SEPARATOR.strip(" ")]
        return ids, np.cumsum(ids == separator, dtype=np.int32)

    def _tokens_of(self, ids: np.ndarray, chunk_doc: np.ndarray):
        """Store positions of the chunks' tokens, each token's comment, and its marks."""
        pos, size = self._store.expand(ids)
        return pos, np.repeat(chunk_doc, size), self._store.marks[pos]

    def _needs_whole_pipeline(self, texts, ids, chunk_doc, marks, doc) -> np.ndarray | None:
        """Comments whose words are not just their chunks' tokens (see
        :meth:`Tokenizer.chunk_entry`): the run of a token rule across chunks
        (:func:`model.normalization.needs_whole_pipeline`, for a whole batch)
        in their tokens' marks, or the run of a chunk rule in their chunks'
        marks when that rule does change the comment (as on the one-comment
        path, which cuts the comment after the chunk rules)."""
        found = []
        chunk_bits = None
        for rule in self.tokenizer.rules:
            if rule.reads == CHUNKS:
                if chunk_bits is None:
                    chunk_bits = self._store.chunk_marks[ids]
                at = _runs(chunk_bits, chunk_doc, rule.run)
                if at.size:  # a run of the marks is only a hint ("555 then" is no spaced-out number)
                    changes = self.tokenizer.chunk_rules_change
                    at = np.array([d for d in np.unique(at).tolist() if changes(texts[d])], dtype=at.dtype)
            else:
                at = _runs(marks, doc, rule.run)
            if at.size:
                found.append(at)
        return np.unique(np.concatenate(found)) if found else None

    def _replace(self, texts, redo: np.ndarray, ids: np.ndarray, chunk_doc: np.ndarray):
        """The chunks of each comment in ``redo`` replaced by one store entry
        that holds the tokenizer's whole-pipeline words of the comment."""
        flat, counts = self.tokenizer.words_many([texts[d] for d in redo.tolist()])
        ends = np.cumsum(counts).tolist()
        entries = [self._store.add_unheld(flat[b - c:b], token_marks(flat[b - c:b])) for b, c in zip(ends, counts)]
        ids = ids.copy()
        first = np.searchsorted(chunk_doc, redo)  # chunk_doc is sorted; each comment has a chunk
        ids[first] = entries
        keep = ~np.isin(chunk_doc, redo)
        keep[first] = True
        return ids[keep], chunk_doc[keep]

    def one(self, text: str) -> tuple[list[int], FeatureNames]:
        """Buckets of one comment's features as a list, and their names; no numpy.

        The same buckets, in the same order, as :meth:`texts` gives for the
        comment; for a handful of comments plain Python is faster than a
        dozen numpy calls on tiny arrays.
        """
        tok = self.tokenizer
        store = self._store
        store.fit_cap()
        # The chunk rules across chunks run on the text (prepare) before it is
        # cut; after that only a token rule can still change the words.
        chunks = tok.prepare(text).split()
        singles = list(map(store.singles.get, chunks))
        if None in singles:
            singles = self._with_links(chunks, singles)
        if singles:
            # The common case: every chunk is one held token, or a link (its
            # marker and domain).  When no token rule's run stands in the
            # marks, the words are the chunks' tokens.
            words, hashes, rotated, marks = zip(*singles)
            if not any(marks):
                return self._one_plain(words, hashes, rotated, None)
            marks = bytes(marks)
            rules = tok.token_rules
            if not (rules and needs_whole_pipeline(b"", marks, rules)):
                return self._one_plain(words, hashes, rotated, marks if _URL_DOMAIN in marks else None)
        return self._one_entries(text, list(map(store.entries.__getitem__, map(store.ids.__getitem__, chunks))))

    def _with_links(self, chunks: list[str], singles: list) -> list | None:
        """``singles`` with each chunk that is not one held token replaced by
        its two tokens when it is a link (``<url>``, ``domain:``); ``None``
        when another kind of chunk is there."""
        store = self._store
        out = []
        start = 0
        find = singles.index
        for _ in range(singles.count(None)):
            i = find(None, start)
            tokens, hashes, marks, rotated = store.entries[store.ids[chunks[i]]]
            if marks != _URL_DOMAIN:
                return None
            out += singles[start:i]
            out.append((tokens[0], hashes[0], rotated[0], marks[0]))
            out.append((tokens[1], hashes[1], rotated[1], marks[1]))
            start = i + 1
        out += singles[start:]
        return out

    def _one_plain(self, words: tuple, hashes: tuple, rotated: tuple,
                   marks: bytes | None = None) -> tuple[list[int], FeatureNames]:
        """:meth:`one` for words that need no rule across chunks; ``marks``
        (when a ``<url>`` marker is followed by a ``domain:`` token) say which
        domains sit out of the pairs (:func:`_pair_sequence`, as on every path)."""
        tok = self.tokenizer
        hasher = self.hasher
        mask = hasher.n_buckets - 1
        buckets = [h & mask for h in hashes]
        n = len(words)
        left = right = ()
        if tok.bigrams and n > 1:
            if marks is None:
                buckets += hasher.rotated_pair_buckets(rotated, hashes[1:], mask)
                left, right = range(n - 1), range(1, n)
            else:
                seq = _pair_sequence(marks)
                left, right = seq[:-1], seq[1:]
                if len(seq) > 2:  # itemgetter of several indices: a tuple, gathered in C
                    buckets += hasher.rotated_pair_buckets(itemgetter(*left)(rotated), itemgetter(*right)(hashes), mask)
                elif len(seq) == 2:
                    buckets += hasher.rotated_pair_buckets((rotated[seq[0]],), (hashes[seq[1]],), mask)
        extra: list[str] = []
        if tok.char_ngrams[0]:
            extra = char_ngrams(list(words), *tok.char_ngrams)
            buckets += [h & mask for h in hasher.hash_list(extra)]
        return buckets, FeatureNames(words, left, right, extra)

    def _one_entries(self, text: str, entries: list[tuple]) -> tuple[list[int], FeatureNames]:
        """:meth:`one` from the store entries of the comment's chunks."""
        tok = self.tokenizer
        hasher = self.hasher
        words = list(chain.from_iterable(map(itemgetter(0), entries)))
        marks = b"".join(map(itemgetter(2), entries))
        if tok.token_rules and needs_whole_pipeline(b"", marks, tok.token_rules):
            words, _ = tok.words_many((text,))  # a token rule may apply: the whole pipeline decides
            hashes = hasher.hash_list(words)
            seq = pair_positions(words) if "<url>" in words else None
            from_store = False
        else:
            hashes = list(chain.from_iterable(map(itemgetter(1), entries)))
            seq = _pair_sequence(marks) if _URL_DOMAIN in marks else None
            from_store = True
        left = right = ()
        extra: list[str] = []
        if tok.bigrams and len(words) > 1:
            if seq is None:
                in_seq = hashes
                left, right = range(len(words) - 1), range(1, len(words))
            else:
                in_seq = list(map(hashes.__getitem__, seq))
                left, right = seq[:-1], seq[1:]
            if not from_store:
                pairs = hasher.pair_list(in_seq, in_seq[1:])
            else:  # the store holds each word's rotated hash, the left half of a pair key
                rotated = list(chain.from_iterable(map(itemgetter(3), entries)))
                if seq is not None:
                    rotated = list(map(rotated.__getitem__, seq))
                pairs = hasher.rotated_pair_list(rotated, in_seq[1:])
            hashes.extend(pairs)
        if tok.char_ngrams[0]:
            extra = char_ngrams(words, *tok.char_ngrams)
            hashes.extend(hasher.hash_list(extra))
        mask = hasher.n_buckets - 1
        return [h & mask for h in hashes], FeatureNames(words, left, right, extra)

    def tokens(self, feature_lists: list[list[str]]) -> Features:
        """Features of comments given as feature strings; ``a_b`` is the pair (a, b)."""
        n = len(feature_lists)
        counts = np.fromiter(map(len, feature_lists), dtype=np.int64, count=n)
        flat = list(chain.from_iterable(feature_lists))
        doc = np.repeat(np.arange(n, dtype=np.int32), counts)
        pair_at = [i for i, t in enumerate(flat) if BIGRAM_JOINER in t]
        if not pair_at:
            hashes = self.hasher.hashes(flat)
        else:
            hashes = np.empty(len(flat), dtype=np.uint32)
            is_pair = np.zeros(len(flat), dtype=bool)
            is_pair[pair_at] = True
            single_at = np.flatnonzero(~is_pair)
            hashes[single_at] = self.hasher.hashes([flat[i] for i in single_at.tolist()])
            halves = [flat[i].partition(BIGRAM_JOINER) for i in pair_at]
            left = self.hasher.hashes([h[0] for h in halves])
            right = self.hasher.hashes([h[2] for h in halves])
            hashes[pair_at] = self.hasher.pairs(left, right)
        return self._finish(n, [hashes], [doc], flat)

    def _finish(self, n, hash_parts, doc_parts, names) -> Features:
        hashes = hash_parts[0] if len(hash_parts) == 1 else np.concatenate(hash_parts)
        doc = doc_parts[0] if len(doc_parts) == 1 else np.concatenate(doc_parts)
        bucket = (hashes & self._mask).astype(np.int32)  # buckets are below 2**30
        lengths = np.bincount(doc, minlength=n).astype(np.int64) if doc.size else np.zeros(n, dtype=np.int64)
        return Features(n, doc, bucket, lengths, names, hashes)
