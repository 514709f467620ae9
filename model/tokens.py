"""Comment text to tokens: normalization that undoes common evasions, then features.

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

:class:`Tokenizer` ties the steps together and adds word bigrams
(``free_casino``) and optional character n-grams (``#cas``).  The output
depends only on the text and :meth:`Tokenizer.params`, which the artifact
manifest stores, so a model always sees the tokens it was trained on.
"""
from __future__ import annotations

import re
import unicodedata
from bisect import bisect_right
from itertools import accumulate, chain, islice, repeat
from numbers import Integral

__all__ = [
    "Tokenizer",
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
    "bigrams",
    "pair_positions",
    "char_ngrams",
    "MARKERS",
    "MARK_SINGLE",
    "MARK_URL",
    "MARK_DOMAIN",
    "token_marks",
    "CHUNK_NUMERIC_END",
    "CHUNK_NUMERIC_START",
    "CHUNK_SEPARATOR",
]

#: Marker tokens that stand in for a whole class of strings.
MARKERS = ("<url>", "<email>", "<phone>", "<num>")
DOMAIN_PREFIX = "domain:"
BIGRAM_JOINER = "_"  # words never contain "_" (it separates words), so a bigram never equals a word
CHAR_NGRAM_PREFIX = "#"  # keeps the n-gram "win" apart from the word "win"

# The version of the rules below.  A model's manifest records it; any change to
# what a text turns into must bump it, so an old artifact is refused rather than
# silently fed different tokens.
NORMALIZATION_VERSION = 1

#: Bit marks of a token in :meth:`Tokenizer.chunk_entry`: it was one character
#: before the token-list pass (which only looks at those), it is the ``<url>``
#: marker, it is a ``domain:`` token.
MARK_SINGLE, MARK_URL, MARK_DOMAIN = 1, 2, 4
#: Chunk marks of :meth:`Tokenizer.chunk_entry`: the chunk may end, or start,
#: a phone number written with spaces.
CHUNK_NUMERIC_END, CHUNK_NUMERIC_START = 1, 2
#: Stands between two comments in a joined batch (:meth:`Tokenizer.chunks_many`):
#: a chunk of its own, which turns into no token ("\\x00" is a control character).
CHUNK_SEPARATOR = " \x00 "

# t[:7] is "<url>" only for the marker itself, and "domain:" for every domain token.
_PREFIX_MARKS = {"<url>": MARK_URL, DOMAIN_PREFIX: MARK_DOMAIN}

_CHUNK_CACHE_SIZE = 1 << 16  # distinct whitespace chunks remembered per tokenizer; bounded


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
_TRAILING_PUNCT = ".,;:!?)]}'\""
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
_NOT_IN_LINK_RE = re.compile("[<>\"'`]")  # what ends a link in mark_specials' pattern, besides whitespace


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
    stripped = text.rstrip(_TRAILING_PUNCT)
    host = _link_host(stripped)
    return f" <url> {DOMAIN_PREFIX}{host} " if host else " <url> "


_SCHEMES = ("http://", "https://", "ftp://", "ftps://")
_LINK_STARTS = _SCHEMES + ("www.",)


def _whole_link(chunk: str) -> tuple[str, ...] | None:
    """The tokens of a folded chunk that is one link and nothing else, exactly
    as :func:`mark_specials` and :func:`word_tokens` would cut it; None when
    the chunk is not that simple (then the regular expressions decide).

    A stream's links mostly differ only in their paths, so most are chunks
    seen once; this skips the regular expressions for them.

    Examples
    --------
    >>> _whole_link("https://www.prize.example/claim?id=77"), _whole_link("www.a_b.example")
    (('<url>', 'domain:prize.example'), None)
    """
    if chunk in _LINK_STARTS or not (chunk.isascii() and chunk.isprintable()) or _NOT_IN_LINK_RE.search(chunk):
        return None  # a bare prefix is no link; the others are cut by the regexes
    host = _link_host(chunk.rstrip(_TRAILING_PUNCT))
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

    :attr:`short` holds the chunks that yield a one-character token, the only
    ones the token-list pass (:meth:`Tokenizer._finish`) can change.  It may
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
        if 1 in map(len, tokens):
            self.short.add(chunk)
        return tokens

    def prune_short(self) -> None:
        """Forget :attr:`short` entries of chunks neither table holds any more."""
        self.short.intersection_update([c for c in self.short if c in self or c in self._once])


def _remember(table: dict, key, value, cap: int) -> None:
    if len(table) >= cap:
        for old in list(islice(table, len(table) // 2 or 1)):
            del table[old]
    dict.__setitem__(table, key, value)


_DIGITS = "0123456789"
_DIGIT_BYTES = _DIGITS.encode()
_SINGLE_DIGITS = frozenset(_DIGITS)


def _mark_phones_if_hinted(text: str) -> str:
    """:func:`mark_spaced_phones` for a text that has an ASCII digit and a hint of one."""
    if text.isascii():
        digits = len(text.encode().translate(None, _DIGIT_BYTES)) != len(text)
    else:
        digits = any(map(text.__contains__, _DIGITS))
    return mark_spaced_phones(text) if digits and _SPACED_PHONE_HINT_RE.search(text) else text


def _chunk_marks(chunk: str) -> int:
    """Whether a chunk may end or start a phone number written with spaces:
    supersets of where the hint ``_SPACED_PHONE_HINT_RE`` can end and start
    (``str.isdigit`` covers the regular expressions' digits)."""
    if not chunk:
        return 0
    last = chunk[-1]
    end = CHUNK_NUMERIC_END if last.isdigit() or last in "().-" else 0
    return end | (CHUNK_NUMERIC_START if chunk[0].isdigit() or chunk[0] == "(" else 0)


def token_marks(tokens) -> list[int]:
    """The bit marks of each finished token (see :meth:`Tokenizer.chunk_entry`).

    Examples
    --------
    >>> token_marks(["a", "<url>", "domain:prize.example", "win"])
    [1, 2, 4, 0]
    """
    return [MARK_SINGLE if len(t) == 1 else _PREFIX_MARKS.get(t[:7], 0) for t in tokens]


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
    per distinct chunk.  Only spaced-out phone numbers and spaced-out letters
    span chunks; they are handled on the whole text and on the token list.

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
        self._chunks = _ChunkCache(self._rewrite_chunk, _CHUNK_CACHE_SIZE)

    def params(self) -> dict:
        """JSON-safe parameters; ``Tokenizer(**tok.params())`` rebuilds this tokenizer."""
        out = {name: getattr(self, name) for name in _PARAMS}
        out["char_ngrams"] = list(out["char_ngrams"])
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
        if folded.startswith(_LINK_STARTS):
            link = _whole_link(folded)
            if link is not None:
                return link
        return tuple(map(self._rewrite_word, word_tokens(mark_specials(folded))))

    def _finish(self, tokens: list[str]) -> list[str]:
        """Token-list pass: join spaced-out runs, then single digits become ``<num>``."""
        if self.join_spaced:
            try:
                lengths = bytes(map(len, tokens))  # one byte per token; a run of singles is a byte search
            except ValueError:  # a token of 256 characters or more
                lengths = bytes(map(min, map(len, tokens), repeat(2)))
            if b"\x01\x01\x01" in lengths:
                tokens = join_spaced(tokens, self._rewrite_word)
        if _SINGLE_DIGITS.isdisjoint(tokens):
            return tokens
        return ["<num>" if t in _SINGLE_DIGITS else t for t in tokens]

    def chunk_entry(self, chunk: str) -> tuple[tuple[str, ...], list[int], int]:
        """One whitespace chunk's tokens as they stand when no pass across
        chunks changes them, a bit mark per token, and the chunk's own marks.

        The token marks are :data:`MARK_SINGLE` (one character before the
        token-list pass), :data:`MARK_URL` and :data:`MARK_DOMAIN`; the chunk
        marks :data:`CHUNK_NUMERIC_END` and :data:`CHUNK_NUMERIC_START` tell
        where a spaced-out phone number could run across it.  A comment's
        :meth:`words` are exactly the concatenation of its chunks' tokens
        (chunks as :meth:`chunks_many` cuts them) unless

        - two neighbouring chunks, the first marked numeric at its end and the
          second at its start, may be one spaced-out phone number, or
        - three one-character tokens stand in a row (a spaced-out word);

        such a comment needs the whole pipeline (:meth:`words_many`).

        Examples
        --------
        >>> Tokenizer().chunk_entry("5x,7")
        (('5x', '<num>'), [0, 1], 3)
        """
        if " " in chunk:  # a key of chunk_alias: the link's host part and the chunk marks
            link, marks = chunk.rsplit(" ", 1)
            raw = _whole_link(link)
            return raw, token_marks(raw), int(marks)
        raw = self._rewrite_chunk(chunk)
        marks = token_marks(raw)
        if not _SINGLE_DIGITS.isdisjoint(raw):
            raw = tuple("<num>" if t in _SINGLE_DIGITS else t for t in raw)
        return raw, marks, _chunk_marks(chunk)

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
        if not chunk.startswith(_SCHEMES):
            return None
        start = chunk.index("://") + 3
        end = chunk.find("/", start)
        # A host must be there, end in no character that rstrip would take, and
        # hold no "_" (which word_tokens would split it at).
        if end <= start or chunk[end - 1] in _TRAILING_PUNCT or "_" in chunk[:end]:
            return None
        if not (chunk.isascii() and chunk.isprintable()) or _NOT_IN_LINK_RE.search(chunk):
            return None
        return f"{chunk[:end]} {_chunk_marks(chunk)}"

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

    @staticmethod
    def prepare(text: str) -> str:
        """One comment as :meth:`words_many` splits it: lowercased if ASCII,
        spaced-out phone numbers marked."""
        return _mark_phones_if_hinted(text.lower() if text.isascii() else text)

    def _unigrams(self, text: str) -> list[str]:
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
        if not isinstance(text, str):
            raise TypeError(f"Tokenizer.normalize: text must be str, got {type(text).__name__}")
        return " ".join(self._unigrams(text))

    def words(self, text: str) -> list[str]:
        """Word and marker tokens of one comment, the unigrams of :meth:`features`.

        Never raises on a ``str``.

        Examples
        --------
        >>> Tokenizer().words("Visit casino.example NOW")
        ['visit', '<url>', 'domain:casino.example', 'now']
        """
        if not isinstance(text, str):
            raise TypeError(f"Tokenizer.words: text must be str, got {type(text).__name__}")
        return self._unigrams(text)

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
        if not isinstance(text, str):
            raise TypeError(f"Tokenizer.features: text must be str, got {type(text).__name__}")
        words = self._unigrams(text)
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
