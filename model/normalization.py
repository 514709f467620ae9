"""Normalization rules: the Unicode tables and the named steps that undo common evasions.

A comment goes through a fixed pipeline, each step a named function below:

1. :func:`fold_text` - NFKC and casefold; zero-width, format and control
   characters removed; accents and stacked combining marks stripped
   (:func:`strip_invisibles`, :func:`strip_accents`); Cyrillic and Greek
   look-alike letters mapped to Latin inside words that otherwise read as Latin
   (:func:`map_homoglyphs`).  Plain ASCII takes a fast path with the same result.
2. :func:`mark_specials` - URLs become ``<url>`` plus ``domain:<host>``,
   e-mail addresses ``<email>``, phone numbers ``<phone>``, grouped numbers
   (``1,299.99``) ``<num>``.
3. :func:`word_tokens` - words are cut out; :func:`join_spaced` glues runs of
   three or more single characters (``c a s i n o``); each word then goes through
   :func:`undo_leet` (``fr33`` -> ``free``), :func:`squash_repeats`
   (``freeeee`` -> ``free``) and bare integers become ``<num>``.

:class:`model.tokens.Tokenizer` ties the steps together, per whitespace chunk
with a cache.  What a text turns into depends only on these rules and the
tokenizer's parameters; :data:`NORMALIZATION_VERSION` names the rules.
"""
from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass, field
from itertools import repeat
from typing import Callable

__all__ = [
    "NORMALIZATION_VERSION",
    "MARKERS",
    "DOMAIN_PREFIX",
    "fold_text",
    "strip_invisibles",
    "strip_accents",
    "map_homoglyphs",
    "mark_specials",
    "mark_spaced_phones",
    "word_tokens",
    "join_spaced",
    "undo_leet",
    "squash_repeats",
    "mark_number",
    "whole_link",
    "LINK_SCHEMES",
    "LINK_STARTS",
    "TRAILING_PUNCT",
    "NOT_IN_LINK_RE",
    "CrossChunkRule",
    "CROSS_CHUNK_RULES",
    "CHUNKS",
    "TOKENS",
    "MARK_SINGLE",
    "CHUNK_NUMERIC_END",
    "CHUNK_NUMERIC_START",
    "rules_on",
    "chunk_marks",
    "token_rule_marks",
    "needs_whole_pipeline",
]

#: Marker tokens that stand in for a whole class of strings.
MARKERS = ("<url>", "<email>", "<phone>", "<num>")
DOMAIN_PREFIX = "domain:"

# The version of the rules below.  A model's manifest records it; any change to
# what a text turns into must bump it, so an old artifact is refused rather than
# silently fed different tokens.
NORMALIZATION_VERSION = 1


# --------------------------------------------------------------------------- #
# Character tables (built once at import from this Python's Unicode database)  #
# --------------------------------------------------------------------------- #

def _bmp_ranges(categories: frozenset[str]) -> list[tuple[int, int]]:
    out: list[tuple[int, int]] = []
    start = None
    for cp in range(0x10000):
        if unicodedata.category(chr(cp)) in categories:
            if start is None:
                start = cp
        elif start is not None:
            out.append((start, cp - 1))
            start = None
    if start is not None:
        out.append((start, 0xFFFF))
    return out


def _class(ranges: list[tuple[int, int]]) -> str:
    return "".join(
        re.escape(chr(a)) if a == b else f"{re.escape(chr(a))}-{re.escape(chr(b))}" for a, b in ranges
    )


# Generic combining blocks used for accents and "zalgo" stacking; script-specific
# marks (Devanagari vowel signs, Arabic harakat, ...) are kept as parts of words.
_GENERIC_MARKS = [(0x0300, 0x036F), (0x1AB0, 0x1AFF), (0x1DC0, 0x1DFF), (0x20D0, 0x20FF), (0xFE20, 0xFE2F)]
_VARIATION_SELECTORS = [(0xFE00, 0xFE0F), (0xE0100, 0xE01EF)]
# Letters that render as nothing and are used to split words invisibly
# (Hangul fillers, Khmer inherent vowels, Mongolian vowel separator).
_BLANK_LETTERS = [(0x115F, 0x1160), (0x17B4, 0x17B5), (0x180E, 0x180E), (0x3164, 0x3164), (0xFFA0, 0xFFA0)]
_ASTRAL_FORMAT = [(0x110BD, 0x110BD), (0x110CD, 0x110CD), (0x13430, 0x13438), (0x1BCA0, 0x1BCA3),
                  (0x1D173, 0x1D17A), (0xE0001, 0xE0001), (0xE0020, 0xE007F)]
_KEEP_WHITESPACE = {ord(c) for c in "\t\n\v\f\r\x1c\x1d\x1e\x1f\x85"}

_INVISIBLE_RANGES = sorted(
    [r for r in _bmp_ranges(frozenset({"Cc", "Cf", "Cs"}))]
    + _VARIATION_SELECTORS + _BLANK_LETTERS + _ASTRAL_FORMAT
)


def _minus_whitespace(ranges):
    out = []
    for a, b in ranges:
        cp = a
        while cp <= b:
            if cp in _KEEP_WHITESPACE:
                cp += 1
                continue
            end = cp
            while end + 1 <= b and end + 1 not in _KEEP_WHITESPACE:
                end += 1
            out.append((cp, end))
            cp = end + 1
    return out


_INVISIBLE_RE = re.compile(f"[{_class(_minus_whitespace(_INVISIBLE_RANGES))}]+")
_ACCENT_RE = re.compile(f"[{_class(_GENERIC_MARKS)}]+")
_ASCII_CONTROL_RE = re.compile(r"[\x00-\x08\x0e-\x1b\x7f]+")
_generic = set()
for _a, _b in _GENERIC_MARKS:
    _generic.update(range(_a, _b + 1))
_SCRIPT_MARKS = _class([r for r in _bmp_ranges(frozenset({"Mn", "Mc", "Me"}))
                        if not (r[0] in _generic and r[1] in _generic)])
del _generic, _a, _b

# Look-alike letters, mapped before casefolding so that uppercase forms map to
# the Latin letter they imitate (Cyrillic "Н" looks like "H", lowercase "н"
# less so).  Small, explicit and common practice rather than the full Unicode
# confusables table: these are the letters "fancy text" generators and
# spoofed comments use.  NFKC already folds full-width and mathematical forms.
_HOMOGLYPHS = {
    # Cyrillic capitals
    "А": "a", "В": "b", "Е": "e", "К": "k", "М": "m", "Н": "h", "О": "o", "Р": "p", "С": "c",
    "Т": "t", "Х": "x", "У": "y", "Ѕ": "s", "І": "i", "Ј": "j", "Ԛ": "q", "Ԝ": "w", "Ү": "y",
    # Cyrillic small letters
    "а": "a", "в": "b", "е": "e", "к": "k", "м": "m", "н": "h", "о": "o", "р": "p", "с": "c",
    "т": "t", "х": "x", "у": "y", "ѕ": "s", "і": "i", "ј": "j", "ԛ": "q", "ԝ": "w", "ү": "y",
    "ԁ": "d", "һ": "h", "ӏ": "l", "ь": "b", "п": "n", "г": "r",
    # Greek capitals
    "Α": "a", "Β": "b", "Ε": "e", "Ζ": "z", "Η": "h", "Ι": "i", "Κ": "k", "Μ": "m", "Ν": "n",
    "Ο": "o", "Ρ": "p", "Τ": "t", "Υ": "y", "Χ": "x",
    # Greek small letters
    "α": "a", "β": "b", "γ": "y", "ε": "e", "η": "n", "ι": "i", "κ": "k", "ν": "v", "ο": "o",
    "ρ": "p", "τ": "t", "υ": "u", "χ": "x", "ω": "w",
    # Latin small capitals and other look-alikes NFKC leaves alone
    "ᴀ": "a", "ʙ": "b", "ᴄ": "c", "ᴅ": "d", "ᴇ": "e", "ꜰ": "f", "ɢ": "g", "ʜ": "h", "ɪ": "i",
    "ᴊ": "j", "ᴋ": "k", "ʟ": "l", "ᴍ": "m", "ɴ": "n", "ᴏ": "o", "ᴘ": "p", "ǫ": "q", "ʀ": "r",
    "ꜱ": "s", "ᴛ": "t", "ᴜ": "u", "ᴠ": "v", "ᴡ": "w", "ʏ": "y", "ᴢ": "z",
    "ı": "i", "ɑ": "a", "ɡ": "g", "օ": "o",
}
_HOMOGLYPH_TABLE = str.maketrans(_HOMOGLYPHS)
_HOMOGLYPH_RE = re.compile(f"[{''.join(_HOMOGLYPHS)}]")
# A word is rewritten only when every character in it is ASCII or a look-alike:
# "саsinо" (mixed scripts) becomes "casino", "привет" (real Cyrillic with
# letters that look like nothing Latin) stays as written.
_LOOKALIKE_OK = frozenset(_HOMOGLYPHS) | frozenset(chr(c) for c in range(128))

_WORD_CLASS = rf"\w{_SCRIPT_MARKS}"
_ANY_WORD_RE = re.compile(f"[{_WORD_CLASS}]+")

# Leetspeak digits and symbols inside words (common practice).
_LEET_TABLE = str.maketrans({"0": "o", "1": "i", "3": "e", "4": "a", "5": "s", "7": "t", "8": "b",
                             "9": "g", "@": "a", "$": "s"})
_HAS_LEET_RE = re.compile(r"[0134578@$9]")
_HAS_LETTER_RE = re.compile(r"[^\W\d]")
# "1st", "10k", "5pm", "90s": a number with a short unit or ordinal stays as it is.
_NUMBER_WITH_UNIT_RE = re.compile(r"\d+[a-z]{1,2}")
# Squash to two: English has doubled letters ("free", "good") but no tripled
# ones, so two keeps real words intact while "freeeee" and "freee" meet "free".
_REPEAT_RE = re.compile(r"([^\W\d_])\1\1+")

# Pictographs are strong spam signals ("\U0001f3b0", "\U0001f4b0"); each one is a token of its own.
_EMOJI_CLASS = "\u2600-\u27bf\u2b00-\u2bff\U0001f000-\U0001faff"

# Word tokens: runs of word characters, "@"/"$" allowed inside ("c@sino"),
# a leading "$" before a letter ("$ave"), plus already-formed marker tokens so
# that normalizing a normalized text changes nothing.
_TOKEN_RE = re.compile(
    rf"<(?:url|email|phone|num)>|domain:\S+|(?:\$(?=[^\W\d]))?[{_WORD_CLASS}]+(?:[@$][{_WORD_CLASS}]+)*"
    rf"|[{_EMOJI_CLASS}]"
)

# Top-level domains accepted for links written without a scheme ("casino.example").
# A short list of common and test domains, so that "file.txt" or "end.Then"
# are not taken for links; links with a scheme or "www." need no list.
_BARE_TLDS = (
    "com net org info biz io co me tv cc ws xyz top site online club shop store app dev ly gl to gg "
    "ru cn uk de fr es it nl pl br in au ca eu us jp kr ch se no fi dk be at cz pt gr tr ua vn id my "
    "ph sg hk tw mx ar cl za ng ke pk bd ir sa ae il nz su pw tk ml ga cf gq icu cyou buzz live vip "
    "win bid loan click link work life today world news email money cash casino bet poker fun space "
    "website tech pro mobi name asia example invalid test onion"
).split()

_SPECIAL_RE = re.compile(
    r"(?P<keep>domain:\S+|<(?:url|email|phone|num)>)"
    r"|(?P<url>(?<![\w@.])(?:(?:https?|ftps?)://|www\.)[^\s<>\"'`]+)"
    r"|(?P<email>(?<![\w.+-])[\w.+-]+@[\w-]+(?:\.[\w-]+)+)"
    r"|(?P<bare>(?<![\w@.:/-])(?:[a-z0-9](?:[a-z0-9-]*[a-z0-9])?\.)+(?:" + "|".join(_BARE_TLDS) + r")"
    r"(?![\w-])(?:[:/][^\s<>\"'`]*)?)"
    r"|(?P<digits>(?<![\w+.,])\+?\(?\d(?:[\d().,-]|\s(?=[\d(]))*\d\)?(?!\w))"
)
TRAILING_PUNCT = ".,;:!?)]}'\""
_GROUPED_NUMBER_RE = re.compile(r"\d+(?:[.,]\d+)+")
_DATE_RE = re.compile(r"\d{4}-\d{1,2}-\d{1,2}|\d{1,2}[./-]\d{1,2}[./-]\d{2,4}")
_PHONE_SEPARATORS_RE = re.compile(r"[\s().-]+")
_SPACED_PHONE_HINT_RE = re.compile(r"\d[\d().-]* \(?\d")  # starts with a digit: a fast scan
_SPACED_PHONE_RE = re.compile(r"\+?\(?\d[\d().-]*(?: \(?\d[\d().-]*)+")


# --------------------------------------------------------------------------- #
# The named transformations                                                    #
# --------------------------------------------------------------------------- #

def strip_invisibles(text: str) -> str:
    """Remove zero-width, format, control and surrogate characters.

    Tabs, newlines and the other whitespace controls are kept, since they
    separate words; everything else in Unicode categories Cc, Cf and Cs, the
    variation selectors and the blank "filler" letters is removed, so that
    ``"ca\\u200bsino"`` reads ``"casino"``.

    Examples
    --------
    >>> strip_invisibles("fr\\u200bee\\x00 ca\\u2060sino\\ufe0f")
    'free casino'
    """
    return _INVISIBLE_RE.sub("", text)


def strip_accents(text: str) -> str:
    """Remove generic combining marks (accents, stacked "zalgo" marks).

    Expects decomposed text (NFKD), where an accent is a separate mark.
    Script-specific marks such as Devanagari vowel signs are kept.

    Examples
    --------
    >>> import unicodedata
    >>> strip_accents(unicodedata.normalize("NFKD", "cásínó"))
    'casino'
    """
    return _ACCENT_RE.sub("", text)


def _map_word(match: re.Match) -> str:
    word = match.group()
    if _LOOKALIKE_OK.issuperset(word):
        return word.translate(_HOMOGLYPH_TABLE)
    return word


def map_homoglyphs(text: str) -> str:
    """Map Cyrillic, Greek and small-capital look-alikes to Latin letters.

    Only words made entirely of ASCII and look-alike characters are rewritten,
    so a Latin word salted with Cyrillic letters is caught while real Russian or
    Greek text keeps its spelling.

    Examples
    --------
    >>> map_homoglyphs("саsinо ᴄᴀꜱɪɴᴏ привет")
    'casino casino привет'
    """
    if not _HOMOGLYPH_RE.search(text):
        return text
    return _ANY_WORD_RE.sub(_map_word, text)


def fold_text(text: str, *, homoglyphs: bool = True, accents: bool = True) -> str:
    """NFKC, casefold, and strip invisible characters, accents and look-alikes.

    Parameters
    ----------
    text : str
        Any string, including lone surrogates and control characters.
    homoglyphs : bool
        Map look-alike letters (see :func:`map_homoglyphs`).
    accents : bool
        Strip accents and combining marks (see :func:`strip_accents`).

    Returns
    -------
    str
        The folded text, in NFC; equal to NFKC + casefold for text without
        accents, invisibles or look-alikes.

    Examples
    --------
    >>> fold_text("ＦＲＥＥ Ｃasino\\u200b!")
    'free casino!'
    """
    if text.isascii():
        # NFKC leaves ASCII unchanged and casefold equals lower() on it.
        if _ASCII_CONTROL_RE.search(text):
            text = _ASCII_CONTROL_RE.sub("", text)
        return text.lower()
    text = strip_invisibles(unicodedata.normalize("NFKD", text))
    if accents:
        text = strip_accents(text)
    if homoglyphs:
        text = map_homoglyphs(text)
    return unicodedata.normalize("NFC", text.casefold())


_HOST_END_RE = re.compile(r"[/?#\\]")
NOT_IN_LINK_RE = re.compile("[<>\"'`]")  # what ends a link in mark_specials' pattern, besides whitespace


def _link_host(url: str) -> str:
    rest = url.partition("://")[2] if "://" in url else url
    host = rest.split("/", 1)[0]
    if "?" in host or "#" in host or "\\" in host:
        host = _HOST_END_RE.split(host, 1)[0]
    host = host.rpartition("@")[2]
    if host.startswith("["):  # IPv6 literal
        host = host.partition("]")[0] + "]"
    else:
        host = host.partition(":")[0]
    host = host.strip(".").lower()
    if host.startswith("www."):
        host = host[4:]
    return host


def _is_phone(run: str) -> bool:
    """Whether a run of digits and separators reads as a phone number (7-15 digits)."""
    digits = sum(c.isdigit() for c in run)
    if not 7 <= digits <= 15 or _DATE_RE.fullmatch(run) or "," in run:
        return False
    groups = [g for g in _PHONE_SEPARATORS_RE.split(run.strip("+")) if g]
    if run.count(".") == 1 and len(groups) == 2:  # a decimal number
        return False
    return (
        run.startswith("+")
        or "(" in run
        or len(groups) >= 3
        or (len(groups) == 2 and "-" in run)
        or (len(groups) == 1 and digits >= 10 and "." not in run)
    )


def _classify_digits(run: str) -> str:
    if _is_phone(run):
        return "<phone>"
    # Not a phone number: grouped numbers become one marker, plain integers are
    # left for the word pass (so spaced-out "f r 3 3" can still be joined).
    return " ".join("<num>" if _GROUPED_NUMBER_RE.fullmatch(part) else part for part in run.split())


def _spaced_phone(match: re.Match) -> str:
    text, start, end = match.string, match.start(), match.end()
    if start and (text[start - 1].isalnum() or text[start - 1] in "+.,_"):
        return match.group()
    if end < len(text) and (text[end].isalnum() or text[end] == "_"):
        return match.group()
    return " <phone> " if _is_phone(match.group()) else match.group()


def mark_spaced_phones(text: str) -> str:
    """Replace phone numbers written with spaces (``+1 555 010 9999``) by ``<phone>``.

    Phone numbers without spaces are found per chunk by :func:`mark_specials`;
    this is the one pattern that spans whitespace.

    Examples
    --------
    >>> mark_spaced_phones("call +1 555 010 9999 or 0800 555 0199, not 2 3")
    'call  <phone>  or  <phone> , not 2 3'
    """
    return _SPACED_PHONE_RE.sub(_spaced_phone, text)


def _special(match: re.Match) -> str:
    kind = match.lastgroup
    text = match.group()
    if kind == "keep":
        return f" {text} "
    if kind == "digits":
        return f" {_classify_digits(text)} "
    if kind == "email":
        return " <email> "
    stripped = text.rstrip(TRAILING_PUNCT)
    host = _link_host(stripped)
    return f" <url> {DOMAIN_PREFIX}{host} " if host else " <url> "


LINK_SCHEMES = ("http://", "https://", "ftp://", "ftps://")
LINK_STARTS = LINK_SCHEMES + ("www.",)


def whole_link(chunk: str) -> tuple[str, ...] | None:
    """The tokens of a folded chunk that is one link and nothing else, exactly
    as :func:`mark_specials` and :func:`word_tokens` would cut it; None when
    the chunk is not that simple (then the regular expressions decide).

    A stream's links mostly differ only in their paths, so most are chunks
    seen once; this skips the regular expressions for them.

    Examples
    --------
    >>> whole_link("https://www.prize.example/claim?id=77"), whole_link("www.a_b.example")
    (('<url>', 'domain:prize.example'), None)
    """
    if chunk in LINK_STARTS or not (chunk.isascii() and chunk.isprintable()) or NOT_IN_LINK_RE.search(chunk):
        return None  # a bare prefix is no link; the others are cut by the regexes
    host = _link_host(chunk.rstrip(TRAILING_PUNCT))
    if "_" in host:  # word_tokens would split the domain token at it
        return None
    return ("<url>", DOMAIN_PREFIX + host) if host else ("<url>",)


def mark_specials(text: str) -> str:
    """Replace URLs, e-mail addresses, phone numbers and grouped numbers by markers.

    Expects folded text (:func:`fold_text`).  A link becomes ``<url>`` followed by
    ``domain:<host>`` (host lowercased, a leading ``www.`` dropped); links count
    with a scheme, with ``www.``, or bare with a common top-level domain.

    Examples
    --------
    >>> mark_specials("see https://www.casino.example/win?x=1 or mail win@prize.example")
    'see  <url> domain:casino.example  or mail  <email> '
    >>> mark_specials("call +1 (555) 010-9999, pay 1,299.99")
    'call  <phone> , pay  <num> '
    """
    return _SPECIAL_RE.sub(_special, text)


def join_spaced(tokens: list[str], rewrite=None) -> list[str]:
    """Join runs of three or more single characters into one word.

    ``c a s i n o`` (or ``c.a.s.i.n.o``) arrives as six one-letter tokens and
    leaves as ``casino``.  A run needs at least one letter, so ``1 2 3`` stays.

    Parameters
    ----------
    tokens : list of str
    rewrite : callable, optional
        Applied to each joined word (the tokenizer undoes leetspeak there).

    Examples
    --------
    >>> join_spaced(["win", "c", "a", "s", "h", "now", "1", "2", "3"])
    ['win', 'cash', 'now', '1', '2', '3']
    """
    out: list[str] = []
    run: list[str] = []
    for token in tokens:
        if len(token) == 1 and token.isalnum():
            run.append(token)
            continue
        if run:
            _flush_run(run, out, rewrite)
            run = []
        out.append(token)
    if run:
        _flush_run(run, out, rewrite)
    return out


def _flush_run(run: list[str], out: list[str], rewrite) -> None:
    if len(run) >= 3 and not all(c.isdigit() for c in run):
        word = "".join(run)
        out.append(rewrite(word) if rewrite else word)
    else:
        out.extend(run)


def undo_leet(word: str) -> str:
    """Undo leetspeak inside a word that mixes letters with digits or ``@``/``$``.

    Bare numbers stay numbers, and a number with a short unit or ordinal
    (``1st``, ``10k``, ``5pm``) is left alone.

    Examples
    --------
    >>> [undo_leet(w) for w in ["fr33", "c4sino", "$ave", "c@sh", "2024", "10k", "mp3"]]
    ['free', 'casino', 'save', 'cash', '2024', '10k', 'mpe']
    """
    if not _HAS_LETTER_RE.search(word) or not _HAS_LEET_RE.search(word):
        return word
    if _NUMBER_WITH_UNIT_RE.fullmatch(word):
        return word
    return word.translate(_LEET_TABLE)


def squash_repeats(word: str) -> str:
    """Squash runs of three or more repeated letters to two.

    Two, not one: English doubles letters ("free", "good") but never triples
    them, so real words survive while ``freeeee`` and ``freee`` both become ``free``.

    Examples
    --------
    >>> squash_repeats("freeeeee"), squash_repeats("good"), squash_repeats("1000")
    ('free', 'good', '1000')
    """
    return _REPEAT_RE.sub(r"\1\1", word)


def mark_number(word: str) -> str:
    """``<num>`` for a bare integer, the word itself otherwise.

    Examples
    --------
    >>> mark_number("2024"), mark_number("fr33")
    ('<num>', 'fr33')
    """
    return "<num>" if word.isdigit() else word


def word_tokens(text: str) -> list[str]:
    """Cut marked, folded text into raw word and marker tokens (no rewriting).

    Examples
    --------
    >>> word_tokens("win  <url> domain:casino.example  c@sino $ave fr33_cash!")
    ['win', '<url>', 'domain:casino.example', 'c@sino', '$ave', 'fr33', 'cash']
    """
    if "_" in text:
        text = text.replace("_", " ")
    return _TOKEN_RE.findall(text)


# --------------------------------------------------------------------------- #
# Rules that span whitespace chunks                                            #
# --------------------------------------------------------------------------- #
#
# The tokenizer caches each whitespace chunk's tokens, and the fast paths build
# a comment's words by concatenating them.  A rule that may join or rewrite
# across chunks breaks that, so each such rule is declared once, below: what it
# marks on a chunk or a token, the run of marks where it may apply, and what it
# does to the whole comment.  Every path asks :func:`needs_whole_pipeline`, and
# the whole pipeline (:meth:`model.tokens.Tokenizer.words_many`) applies every
# rule of the table.

#: What a rule reads: each whitespace chunk's own marks, or each token's marks.
CHUNKS, TOKENS = "chunks", "tokens"

#: Token bit of the spaced-out word rule: the token has one character before the
#: token-list pass.  Bits 2 and 4 of a token are :data:`model.tokens.MARK_URL`
#: and ``MARK_DOMAIN``; a new token rule takes 8 or above.
MARK_SINGLE = 1
#: Chunk bits of the spaced phone number rule: the chunk may end, or start, a
#: phone number written with spaces.  A new chunk rule takes 4 or above.
CHUNK_NUMERIC_END, CHUNK_NUMERIC_START = 1, 2


def _bits_pattern(run: bytes) -> re.Pattern:
    """A bytes pattern for ``len(run)`` consecutive marks, the i-th holding a bit of ``run[i]``."""
    classes = [b"[" + b"".join(re.escape(bytes([v])) for v in range(256) if v & bits) + b"]" for bits in run]
    return re.compile(b"".join(classes))


@dataclass(frozen=True)
class CrossChunkRule:
    """A normalization rule whose match may span whitespace chunks.

    Attributes
    ----------
    name : str
        What the rule undoes, for people.
    reads : str
        :data:`CHUNKS` (each whitespace chunk's own marks) or :data:`TOKENS`
        (the marks of each token, before the token-list pass).
    mark : callable
        A chunk (or a token) -> its bits for this rule, 0 for none.  It must
        mark a superset of where the rule can apply.
    run : bytes
        The bits that consecutive chunks (or tokens) of one comment carry, in
        order, where the rule may apply; the comment then needs the whole pipeline.
    apply : callable
        The rule on a whole comment: ``text -> text`` before it is cut (chunk
        rules), or ``(tokens, rewrite) -> tokens`` in the token-list pass
        (token rules; ``rewrite`` undoes leetspeak and repeats in a new word).
    switch : str or None
        The :class:`~model.tokens.Tokenizer` parameter that turns the rule off.
    """

    name: str
    reads: str
    mark: Callable
    run: bytes
    apply: Callable
    switch: str | None = None
    pattern: re.Pattern = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        if self.reads not in (CHUNKS, TOKENS) or not self.run or not all(self.run):
            raise ValueError(f"CrossChunkRule {self.name!r}: reads must be {CHUNKS!r} or {TOKENS!r} "
                             f"and run a non-empty run of non-zero bits, got {self.reads!r}, {self.run!r}")
        object.__setattr__(self, "pattern", _bits_pattern(self.run))

    def found(self, marks: bytes) -> bool:
        """Whether the rule's run stands in one comment's marks (one byte per chunk or token)."""
        return self.pattern.search(marks) is not None


_DIGITS = "0123456789"
_DIGIT_BYTES = _DIGITS.encode()


def _numeric_ends(chunk: str) -> int:
    """Whether a chunk may end or start a phone number written with spaces:
    supersets of where the hint ``_SPACED_PHONE_HINT_RE`` can end and start
    (``str.isdigit`` covers the regular expressions' digits)."""
    if not chunk:
        return 0
    last = chunk[-1]
    end = CHUNK_NUMERIC_END if last.isdigit() or last in "().-" else 0
    return end | (CHUNK_NUMERIC_START if chunk[0].isdigit() or chunk[0] == "(" else 0)


def _mark_phones_if_hinted(text: str) -> str:
    """:func:`mark_spaced_phones` for a text that has an ASCII digit and a hint of one."""
    if text.isascii():
        digits = len(text.encode().translate(None, _DIGIT_BYTES)) != len(text)
    else:
        digits = any(map(text.__contains__, _DIGITS))
    return mark_spaced_phones(text) if digits and _SPACED_PHONE_HINT_RE.search(text) else text


def _single(token: str) -> int:
    return MARK_SINGLE if len(token) == 1 else 0


def _join_spaced_runs(tokens: list[str], rewrite) -> list[str]:
    """:func:`join_spaced` for a token list with three one-character tokens in a row."""
    try:
        lengths = bytes(map(len, tokens))  # one byte per token; a run of singles is a byte search
    except ValueError:  # a token of 256 characters or more
        lengths = bytes(map(min, map(len, tokens), repeat(2)))
    return join_spaced(tokens, rewrite) if b"\x01\x01\x01" in lengths else tokens


#: Every rule whose match may span whitespace chunks; a new one is added here only.
CROSS_CHUNK_RULES: tuple[CrossChunkRule, ...] = (
    CrossChunkRule("spaced phone number", CHUNKS, _numeric_ends, bytes([CHUNK_NUMERIC_END, CHUNK_NUMERIC_START]),
                   _mark_phones_if_hinted),
    CrossChunkRule("spaced-out word", TOKENS, _single, bytes([MARK_SINGLE] * 3), _join_spaced_runs,
                   switch="join_spaced"),
)


def rules_on(params) -> tuple[CrossChunkRule, ...]:
    """The rules of :data:`CROSS_CHUNK_RULES` a tokenizer with these parameters
    (an object with the switches as attributes) applies."""
    return tuple(r for r in CROSS_CHUNK_RULES if r.switch is None or getattr(params, r.switch))


def chunk_marks(chunk: str) -> int:
    """A whitespace chunk's own marks: the bits every chunk rule gives it.

    Examples
    --------
    >>> chunk_marks("555"), chunk_marks("call"), chunk_marks("(555)")
    (3, 0, 3)
    """
    out = 0
    for rule in CROSS_CHUNK_RULES:
        if rule.reads == CHUNKS:
            out |= rule.mark(chunk)
    return out


def token_rule_marks(tokens) -> list[int]:
    """Each token's bits from every token rule.

    Examples
    --------
    >>> token_rule_marks(["c", "a", "sino"])
    [1, 1, 0]
    """
    rules = [r.mark for r in CROSS_CHUNK_RULES if r.reads == TOKENS]
    out = []
    for token in tokens:
        bits = 0
        for mark in rules:
            bits |= mark(token)
        out.append(bits)
    return out


def needs_whole_pipeline(chunk_bits: bytes, token_bits: bytes, rules=None) -> bool:
    """Whether a rule across chunks may change one comment, so that its words
    are not just its chunks' cached tokens.

    Parameters
    ----------
    chunk_bits : bytes
        The comment's chunks' own marks (:func:`chunk_marks`), one byte per chunk, in order.
    token_bits : bytes
        Its tokens' marks before the token-list pass, one byte per token, in order.
    rules : sequence of CrossChunkRule, optional
        The rules that apply (:func:`rules_on`); all of them by default.

    Examples
    --------
    >>> needs_whole_pipeline(bytes([1, 3, 0]), b""), needs_whole_pipeline(b"", bytes([1, 1, 0, 1]))
    (True, False)
    """
    for rule in CROSS_CHUNK_RULES if rules is None else rules:
        if rule.found(chunk_bits if rule.reads == CHUNKS else token_bits):
            return True
    return False
