"""Comment text to tokens: the tokenizer, its chunk cache, and features.

:class:`Tokenizer` runs the normalization rules of :mod:`model.normalization`
per whitespace chunk (remembered in a bounded cache), applies the passes that
span chunks, and adds word bigrams (``free_casino``) and optional character
n-grams (``#cas``).  The output depends only on the text and
:meth:`Tokenizer.params`, which the artifact manifest stores, so a model always
sees the tokens it was trained on.
"""
from __future__ import annotations

import re
from itertools import chain, islice
from numbers import Integral

from model.normalization import (CHUNKS, DOMAIN_PREFIX, LINK_SCHEMES, LINK_STARTS, NORMALIZATION_VERSION,
                                 NOT_IN_LINK_RE, TRAILING_PUNCT, chunk_marks, fold_text, mark_specials, rules_on,
                                 squash_repeats, token_rule_marks, undo_leet, whole_link, word_tokens)

__all__ = [
    "Tokenizer",
    "bigrams",
    "pair_positions",
    "char_ngrams",
    "MARK_URL",
    "MARK_DOMAIN",
    "token_marks",
    "CHUNK_SEPARATOR",
]

BIGRAM_JOINER = "_"  # words never contain "_" (it separates words), so a bigram never equals a word
CHAR_NGRAM_PREFIX = "#"  # keeps the n-gram "win" apart from the word "win"

#: Bit marks of a token in :meth:`Tokenizer.chunk_entry`, beside the bits of the
#: token rules across chunks (:func:`model.normalization.token_rule_marks`): it
#: is the ``<url>`` marker, it is a ``domain:`` token.
MARK_URL, MARK_DOMAIN = 2, 4
#: Stands between two comments in a joined batch (:meth:`Tokenizer.chunks_many`):
#: a chunk of its own, which turns into no token ("\\x00" is a control character).
CHUNK_SEPARATOR = " \x00 "

# t[:7] is "<url>" only for the marker itself, and "domain:" for every domain token.
_PREFIX_MARKS = {"<url>": MARK_URL, DOMAIN_PREFIX: MARK_DOMAIN}

_CHUNK_CACHE_SIZE = 1 << 16  # distinct whitespace chunks remembered per tokenizer; bounded

#: The usual link chunk, for which every check of :meth:`Tokenizer.chunk_alias`
#: passes: a scheme, a host of lowercase ASCII letters, digits, dots and dashes
#: that ends in a letter or digit (no "_", no trailing punctuation), then a path
#: of printable ASCII without the characters that end a link.  Group 1 is the
#: part before the path.  Any other chunk takes the checks one by one.
_PLAIN_LINK = re.compile(
    "((?:" + "|".join(map(re.escape, LINK_SCHEMES)) + ")[a-z0-9.-]*[a-z0-9])/["
    + "".join(re.escape(c) for c in map(chr, range(0x21, 0x7F)) if not NOT_IN_LINK_RE.search(c)) + "]*"
)


def bigrams(words: list[str]) -> list[str]:
    """Adjacent pairs joined by ``_`` (``free_casino``).

    Examples
    --------
    >>> bigrams(["free", "casino", "<url>"])
    ['free_casino', 'casino_<url>']
    """
    return list(map(BIGRAM_JOINER.join, zip(words, islice(words, 1, None))))


def pair_positions(words: list[str]) -> list[int]:
    """Positions of the words that bigrams run over: all but a link's domain
    token, the ``domain:`` token right after its ``<url>`` marker.

    Examples
    --------
    >>> pair_positions(["see", "<url>", "domain:prize.example", "now"])
    [0, 1, 3]
    """
    return [i for i, w in enumerate(words)
            if not (i and words[i - 1] == "<url>" and w.startswith(DOMAIN_PREFIX))]


def char_ngrams(words: list[str], low: int, high: int) -> list[str]:
    """Character n-grams of each word padded as ``<word>``, prefixed ``#``.

    Marker and domain tokens are skipped; they are whole features already.

    Examples
    --------
    >>> char_ngrams(["win", "<url>"], 3, 4)
    ['#<wi', '#win', '#in>', '#<win', '#win>']
    """
    out: list[str] = []
    for word in words:
        if word[0] == "<" or word.startswith(DOMAIN_PREFIX):
            continue
        padded = f"<{word}>"
        size = len(padded)
        for n in range(low, high + 1):
            out.extend([CHAR_NGRAM_PREFIX + padded[i:i + n] for i in range(size - n + 1)])
    return out


# --------------------------------------------------------------------------- #
# The tokenizer                                                                #
# --------------------------------------------------------------------------- #

def _check_bool(name, value):
    if type(value) is not bool:
        raise ValueError(f"Tokenizer: {name} must be True or False, got {value!r}")
    return value


def _check_version(name, value):
    if type(value) is not int or value != NORMALIZATION_VERSION:
        raise ValueError(
            f"Tokenizer: {name}={value!r} is not supported; this build implements "
            f"normalization version {NORMALIZATION_VERSION} (retrain the model with it)"
        )
    return value


def _check_char_ngrams(name, value):
    ok = (
        isinstance(value, (tuple, list))
        and len(value) == 2
        and all(isinstance(v, Integral) and not isinstance(v, bool) for v in value)
    )
    if ok:
        low, high = int(value[0]), int(value[1])
        if (low, high) == (0, 0) or 1 <= low <= high <= 8:
            return (low, high)
    raise ValueError(
        f"Tokenizer: {name} must be (0, 0) for off or (low, high) with 1 <= low <= high <= 8, got {value!r}"
    )


# One declarative table: parameter -> (default, check).  params() and the
# constructor both follow it, so the manifest always round-trips.
_PARAMS = {
    "version": (NORMALIZATION_VERSION, _check_version),
    "bigrams": (True, _check_bool),
    "char_ngrams": ((0, 0), _check_char_ngrams),
    "homoglyphs": (True, _check_bool),
    "accents": (True, _check_bool),
    "leet": (True, _check_bool),
    "join_spaced": (True, _check_bool),
    "squash_repeats": (True, _check_bool),
}


class _ChunkCache(dict):
    """Whitespace chunk -> its tokens; bounded, and only for chunks seen twice.

    Comments reuse the same few thousand chunks ("the", "great,", "free!"), so
    the regex work runs once per distinct chunk and a hit is a C dict lookup.
    A chunk seen for the first time waits in a smaller first-sighting table
    and moves into the cache on its second sighting: the one-off chunks of a
    stream (links with ids, phone numbers, typos) then never push the common
    vocabulary out.  Either table drops its oldest half when full.

    :attr:`short` holds the chunks that yield a one-character token or a token
    a token rule across chunks marks, the only ones the token-list pass
    (:meth:`Tokenizer._finish`) can change.  It may
    also hold forgotten chunks (which only costs that pass a run) and is
    pruned between comments, never while one is being cut.
    """

    __slots__ = ("_rewrite", "_cap", "_once", "short")

    def __init__(self, rewrite, cap):
        super().__init__()
        self._rewrite = rewrite
        self._cap = cap
        self._once: dict[str, tuple[str, ...]] = {}
        self.short: set[str] = set()

    def __missing__(self, chunk):
        once = self._once
        tokens = once.pop(chunk, None)
        if tokens is None:
            tokens = self._rewrite(chunk)
            _remember(once, chunk, tokens, max(1, self._cap // 4))
        else:
            _remember(self, chunk, tokens, self._cap)
        self._mark_short(chunk, tokens)
        return tokens

    def held(self, chunk: str) -> tuple[str, ...]:
        """The chunk's tokens, kept in the cache at once: for a caller that
        holds the chunk itself (a bounded chunk store), so that the chunk is
        no one-off and its second sighting should be a hit."""
        tokens = self.get(chunk)
        if tokens is None:
            tokens = self._once.pop(chunk, None)
            if tokens is None:
                tokens = self._rewrite(chunk)
            _remember(self, chunk, tokens, self._cap)
            self._mark_short(chunk, tokens)
        return tokens

    def _mark_short(self, chunk: str, tokens: tuple[str, ...]) -> None:
        if 1 in map(len, tokens) or any(token_rule_marks(tokens)):
            self.short.add(chunk)

    def prune_short(self) -> None:
        """Forget :attr:`short` entries of chunks neither table holds any more."""
        self.short.intersection_update([c for c in self.short if c in self or c in self._once])


def _remember(table: dict, key, value, cap: int) -> None:
    if len(table) >= cap:
        for old in list(islice(table, len(table) // 2 or 1)):
            del table[old]
    dict.__setitem__(table, key, value)


_SINGLE_DIGITS = frozenset("0123456789")


def token_marks(tokens) -> list[int]:
    """The bit marks of each token before the token-list pass (see :meth:`Tokenizer.chunk_entry`).

    Examples
    --------
    >>> token_marks(["a", "<url>", "domain:prize.example", "win"])
    [1, 2, 4, 0]
    """
    return [bits | _PREFIX_MARKS.get(t[:7], 0) for t, bits in zip(tokens, token_rule_marks(tokens))]


class Tokenizer:
    """Normalize comments and turn them into hashed-model features.

    Parameters
    ----------
    version : int
        Normalization rules version; only the current one (1) is accepted, so an
        artifact built with other rules is refused instead of mis-read.
    bigrams : bool
        Add word bigrams such as ``free_casino``.
    char_ngrams : tuple of (int, int)
        ``(low, high)`` character n-gram lengths, e.g. ``(3, 5)``, for unseen
        spellings; ``(0, 0)`` (the default) turns them off.
    homoglyphs, accents, leet, join_spaced, squash_repeats : bool
        Switch the individual evasion-undoing steps (all on by default).

    Notes
    -----
    Work is done per whitespace-separated chunk and remembered in a bounded
    per-instance cache, so the cost of the regular expressions is paid once
    per distinct chunk.  The rules that span chunks (spaced-out phone numbers
    and letters, :data:`model.normalization.CROSS_CHUNK_RULES`) are applied on
    the whole text and on the token list.

    Examples
    --------
    >>> tok = Tokenizer()
    >>> tok.normalize("FR33 c a s i n o spins!!! at https://www.Casino.example/x")
    'free casino spins at <url> domain:casino.example'
    >>> tok.features("Win $500 now")
    ['win', '<num>', 'now', 'win_<num>', '<num>_now']
    >>> Tokenizer(**tok.params()) == tok
    True
    """

    def __init__(self, *, version=NORMALIZATION_VERSION, bigrams=True, char_ngrams=(0, 0), homoglyphs=True,
                 accents=True, leet=True, join_spaced=True, squash_repeats=True):
        given = dict(version=version, bigrams=bigrams, char_ngrams=char_ngrams, homoglyphs=homoglyphs,
                     accents=accents, leet=leet, join_spaced=join_spaced, squash_repeats=squash_repeats)
        for name, (_, check) in _PARAMS.items():
            setattr(self, name, check(name, given[name]))
        #: The rules across chunks this tokenizer applies (see :data:`model.normalization.CROSS_CHUNK_RULES`).
        self.rules = rules_on(self)
        #: Those of :attr:`rules` that read token marks (applied in the token-list pass, after the chunks are cut).
        self.token_rules = tuple(r for r in self.rules if r.reads != CHUNKS)
        self._text_rules = [r.apply for r in self.rules if r.reads == CHUNKS]
        self._token_rules = [r.apply for r in self.token_rules]
        self._chunks = _ChunkCache(self._rewrite_chunk, _CHUNK_CACHE_SIZE)

    def params(self) -> dict:
        """JSON-safe parameters; ``Tokenizer(**tok.params())`` rebuilds this tokenizer."""
        out = {name: getattr(self, name) for name in _PARAMS}
        out["char_ngrams"] = list(out["char_ngrams"])
        return out

    def word_params(self) -> dict:
        """The parameters that decide :meth:`words` (all but the bigram and n-gram switches): two
        tokenizers with equal word parameters cut every text into the same words.

        Examples
        --------
        >>> Tokenizer(bigrams=False).word_params() == Tokenizer(char_ngrams=(3, 4)).word_params()
        True
        """
        out = self.params()
        del out["bigrams"], out["char_ngrams"]
        return out

    def __eq__(self, other):
        return isinstance(other, Tokenizer) and self.params() == other.params()

    def __hash__(self):
        return hash(tuple(sorted((k, str(v)) for k, v in self.params().items())))

    def __repr__(self):
        changed = [f"{k}={getattr(self, k)!r}" for k, (d, _) in _PARAMS.items() if getattr(self, k) != d]
        return f"Tokenizer({', '.join(changed)})"

    def __getstate__(self):
        return {name: getattr(self, name) for name in _PARAMS}

    def __setstate__(self, state):
        self.__init__(**state)

    # -- the pipeline ------------------------------------------------------- #

    def _rewrite_word(self, raw: str) -> str:
        if raw[0] == "<" or raw.startswith(DOMAIN_PREFIX):
            return raw
        word = undo_leet(raw) if self.leet else raw
        if word.isdigit():
            # A single digit waits for the token-list pass: it may belong to a
            # spaced-out word ("f r 3 3").
            return word if len(word) == 1 else "<num>"
        return squash_repeats(word) if self.squash_repeats else word

    def _rewrite_chunk(self, chunk: str) -> tuple[str, ...]:
        folded = fold_text(chunk, homoglyphs=self.homoglyphs, accents=self.accents)
        if folded.isalpha() and folded.isascii():
            return (squash_repeats(folded) if self.squash_repeats else folded,)
        if folded.startswith(LINK_STARTS):
            link = whole_link(folded)
            if link is not None:
                return link
        return tuple(map(self._rewrite_word, word_tokens(mark_specials(folded))))

    def _finish(self, tokens: list[str]) -> list[str]:
        """Token-list pass: the token rules across chunks (spaced-out runs
        joined), then single digits become ``<num>``."""
        for apply in self._token_rules:
            tokens = apply(tokens, self._rewrite_word)
        if _SINGLE_DIGITS.isdisjoint(tokens):
            return tokens
        return ["<num>" if t in _SINGLE_DIGITS else t for t in tokens]

    def chunk_entry(self, chunk: str) -> tuple[tuple[str, ...], list[int], int]:
        """One whitespace chunk's tokens as they stand when no pass across
        chunks changes them, a bit mark per token, and the chunk's own marks.

        The token marks are the bits of the token rules across chunks
        (:func:`model.normalization.token_rule_marks`; ``MARK_SINGLE``: one
        character before the token-list pass), :data:`MARK_URL` and
        :data:`MARK_DOMAIN`; the chunk marks are the bits of the chunk rules
        (:func:`model.normalization.chunk_marks`; ``CHUNK_NUMERIC_END`` and
        ``CHUNK_NUMERIC_START``: where a spaced-out phone number could run
        across it).  A comment's :meth:`words` are exactly the concatenation of
        its chunks' tokens (chunks as :meth:`chunks_many` cuts them) unless
        :func:`model.normalization.needs_whole_pipeline` finds the run of a rule
        in :data:`~model.normalization.CROSS_CHUNK_RULES` in its marks (two
        neighbouring chunks that may be one spaced-out phone number, three
        one-character tokens in a row); such a comment needs the whole
        pipeline (:meth:`words_many`).

        Examples
        --------
        >>> Tokenizer().chunk_entry("5x,7")
        (('5x', '<num>'), [0, 1], 3)
        """
        if " " in chunk:  # a key of chunk_alias: the link's host part and the chunk marks
            link, marks = chunk.rsplit(" ", 1)
            raw = whole_link(link)
            return raw, token_marks(raw), int(marks)
        # Through the chunk cache: a comment the batch path sends to the whole
        # pipeline (:meth:`words_many`) then finds its chunks already rewritten.
        cache = self._chunks
        raw = cache.held(chunk)
        if len(cache.short) > _CHUNK_CACHE_SIZE:  # bounded even when words_many never runs
            cache.prune_short()
        marks = token_marks(raw)
        if not _SINGLE_DIGITS.isdisjoint(raw):
            raw = tuple("<num>" if t in _SINGLE_DIGITS else t for t in raw)
        return raw, marks, chunk_marks(chunk)

    @staticmethod
    def chunk_alias(chunk: str) -> str | None:
        """A key whose :meth:`chunk_entry` equals this chunk's, shared by every
        link to the same host with the same chunk marks, or None.

        Links with a scheme that differ only after the host (``/claim?id=77``)
        have the same tokens, so a store can hold one entry for all of them
        instead of one per link.  The key holds a space, so it is never a
        chunk itself.

        Examples
        --------
        >>> Tokenizer.chunk_alias("https://prize.example/claim/77"), Tokenizer.chunk_alias("casino")
        ('https://prize.example 1', None)
        """
        plain = _PLAIN_LINK.fullmatch(chunk)  # one C-level match for most links (one-off ones in a stream)
        if plain is not None:
            return f"{plain[1]} {chunk_marks(chunk)}"
        return Tokenizer._alias_by_checks(chunk)

    @staticmethod
    def _alias_by_checks(chunk: str) -> str | None:
        """:meth:`chunk_alias` by its checks one by one, for any chunk."""
        if not chunk.startswith(LINK_SCHEMES):
            return None
        start = chunk.index("://") + 3
        end = chunk.find("/", start)
        # A host must be there, end in no character that rstrip would take, and
        # hold no "_" (which word_tokens would split it at).
        if end <= start or chunk[end - 1] in TRAILING_PUNCT or "_" in chunk[:end]:
            return None
        if not (chunk.isascii() and chunk.isprintable()) or NOT_IN_LINK_RE.search(chunk):
            return None
        return f"{chunk[:end]} {chunk_marks(chunk)}"

    def chunks_many(self, texts: list[str]) -> tuple[list[str], list[int] | None]:
        """The whitespace chunks of many comments, as :meth:`words_many` cuts
        them before any pass across chunks (ASCII comments lowercased).

        Returns the chunks of all comments in one flat list, and how many each
        comment has; or, when no comment holds :data:`CHUNK_SEPARATOR`, the
        chunks with one separator chunk between every two comments, and None
        (one split of the joined batch, the fast way).
        """
        if all(map(str.isascii, texts)):
            joined = CHUNK_SEPARATOR.join(texts).lower()
        else:
            joined = CHUNK_SEPARATOR.join([t.lower() if t.isascii() else t for t in texts])
        if joined.count(CHUNK_SEPARATOR[1]) == max(0, len(texts) - 1):
            return joined.split(), None
        lists = [(t.lower() if t.isascii() else t).split() for t in texts]
        return list(chain.from_iterable(lists)), list(map(len, lists))

    def prepare(self, text: str) -> str:
        """One comment as :meth:`words_many` splits it: lowercased if ASCII,
        the chunk rules across chunks applied (spaced-out phone numbers marked)."""
        text = text.lower() if text.isascii() else text
        for apply in self._text_rules:
            text = apply(text)
        return text

    def chunk_rules_change(self, text: str) -> bool:
        """Whether the chunk rules across chunks change this comment, so that
        :meth:`prepare` cuts it into other chunks than :meth:`chunks_many` does.

        A comment whose chunks' marks hold a chunk rule's run may still be left
        as it is (``"call 555 then"`` has no spaced-out number); when it is, its
        words are its chunks' tokens unless a token rule's run stands in them.

        Examples
        --------
        >>> tok = Tokenizer()
        >>> tok.chunk_rules_change("call 555 then"), tok.chunk_rules_change("call 555 123 4567")
        (False, True)
        """
        lowered = text.lower() if text.isascii() else text
        prepared = lowered
        for apply in self._text_rules:
            prepared = apply(prepared)
        return prepared != lowered

    def _unigrams(self, text: str, caller: str) -> list[str]:
        """One comment's words, for the method ``caller``; a TypeError names it when ``text`` is no str."""
        if not isinstance(text, str):
            raise TypeError(f"Tokenizer.{caller}: text must be str, got {type(text).__name__}")
        return self.words_many((text,))[0]

    def words_many(self, texts) -> tuple[list[str], list[int]]:
        """Words of many comments at once: all of them in one flat list, and
        how many each comment has.  Equal to :meth:`words` per comment; one
        pass, with no list per comment unless one needs the token-list pass.
        """
        flat: list[str] = []
        counts: list[int] = []
        extend, count = flat.extend, counts.append
        cache = self._chunks
        getitem, short = cache.__getitem__, cache.short
        prepare = self.prepare
        finish = self._finish
        before = 0
        for text in texts:
            chunks = prepare(text).split()
            extend(chain.from_iterable(map(getitem, chunks)))
            if not short.isdisjoint(chunks):  # checked after the lookups, which may add to it
                tokens = flat[before:]
                del flat[before:]
                extend(finish(tokens))
            size = len(flat)
            count(size - before)
            before = size
        if len(short) > _CHUNK_CACHE_SIZE:
            cache.prune_short()
        return flat, counts

    def normalize(self, text: str) -> str:
        """The normalized text: unigram and marker tokens joined by single spaces.

        Never raises on a ``str``.

        Examples
        --------
        >>> Tokenizer().normalize("Ｃａｌｌ +1 (555) 010-9999 or ma\\u200bil me@casino.example")
        'call <phone> or mail <email>'
        """
        return " ".join(self._unigrams(text, "normalize"))

    def words(self, text: str) -> list[str]:
        """Word and marker tokens of one comment, the unigrams of :meth:`features`.

        Never raises on a ``str``.

        Examples
        --------
        >>> Tokenizer().words("Visit casino.example NOW")
        ['visit', '<url>', 'domain:casino.example', 'now']
        """
        return self._unigrams(text, "words")

    def features(self, text: str) -> list[str]:
        """Feature tokens of one comment: unigrams, markers, bigrams, char n-grams.

        A link's domain token (the one right after its ``<url>`` marker) is a
        unigram only; bigrams run over words and markers.
        Never raises on a ``str``.

        Examples
        --------
        >>> Tokenizer().features("Visit casino.example")
        ['visit', '<url>', 'domain:casino.example', 'visit_<url>']
        """
        words = self._unigrams(text, "features")
        if not self.bigrams and self.char_ngrams[0] == 0:
            return words
        seq = words if "<url>" not in words else [words[i] for i in pair_positions(words)]
        out = list(words)
        if self.bigrams:
            out.extend(bigrams(seq))
        if self.char_ngrams[0]:
            out.extend(char_ngrams(seq, *self.char_ngrams))
        return out

    def features_many(self, texts):
        """``[features(t) for t in texts]``; accepts any iterable of str."""
        features = self.features
        return [features(t) for t in texts]
