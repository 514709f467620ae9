"""Normalization steps, features and the never-raises property."""
import json
import unicodedata

import pytest
from hypothesis import given, settings, strategies as st

from model.normalization import fold_text, join_spaced, mark_specials, squash_repeats, undo_leet
from model.tokens import Tokenizer

TOK = Tokenizer()


@pytest.mark.parametrize("raw,expected", [
    ("ＦＲＥＥ", "free"), ("𝐜𝐚𝐬𝐢𝐧𝐨", "casino"), ("ca\u200bsi\u2060no", "casino"), ("hi\x00there", "hithere"),
    ("саsinо", "casino"), ("ΗΕLLO", "hello"), ("ᴄᴀꜱɪɴᴏ", "casino"), ("cásínó", "casino"), ("привет", "привет"),
], ids=["fullwidth", "math-bold", "zero-width", "nul", "cyrillic-mix", "greek-caps", "small-caps", "accents", "real-cyrillic"])
def test_fold(raw, expected):
    assert TOK.normalize(raw) == expected


@pytest.mark.parametrize("word,expected", [("fr33", "free"), ("c4sino", "casino"), ("$ave", "save"), ("2024", "2024"), ("10k", "10k")],
                         ids=["fr33", "c4sino", "dollar", "bare-number", "unit"])
def test_undo_leet(word, expected):
    assert undo_leet(word) == expected


@pytest.mark.parametrize("word,expected", [("freeeee", "free"), ("good", "good"), ("sooooo", "soo")], ids=["long", "double", "o"])
def test_squash_repeats(word, expected):
    assert squash_repeats(word) == expected


@pytest.mark.parametrize("text,expected", [("c a s i n o now", "casino now"), ("c.a.s.h", "cash"), ("f r 3 3", "free"), ("1 2 3", "<num> <num> <num>")],
                         ids=["spaces", "dots", "leet-run", "numbers-stay"])
def test_join_spaced(text, expected):
    assert TOK.normalize(text) == expected


@pytest.mark.parametrize("text,expected", [
    ("see https://www.Casino.EXAMPLE/x?y=1.", "see <url> domain:casino.example"),
    ("visit prize.example now", "visit <url> domain:prize.example now"),
    ("mail win@prize.example", "mail <email>"),
    ("call +1 (555) 010-9999", "call <phone>"), ("call 555-0199", "call <phone>"),
    ("pay 1,299.99 or 30", "pay <num> or <num>"),
], ids=["url", "bare-domain", "email", "phone-spaced", "phone-dash", "numbers"])
def test_markers(text, expected):
    assert TOK.normalize(text) == expected


def test_features_bigrams_and_char_ngrams():
    assert TOK.features("free casino") == ["free", "casino", "free_casino"]
    grams = Tokenizer(char_ngrams=(3, 5)).features("win")
    assert "#<wi" in grams and "#<win>" in grams


def test_params_json_round_trip():
    tok = Tokenizer(char_ngrams=(3, 5), leet=False)
    again = Tokenizer(**json.loads(json.dumps(tok.params())))
    assert again == tok and again.features("fr33 casino") == tok.features("fr33 casino")


@pytest.mark.parametrize("field,value", [("bigrams", 1), ("char_ngrams", (5, 3)), ("version", 2)], ids=["bool", "ngrams", "version"])
def test_invalid_params_name_field(field, value):
    with pytest.raises(ValueError, match=field):
        Tokenizer(**{field: value})


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0x10FFFF), max_size=80)
       | st.text(alphabet="\ud800\udfff\x00\u202e\u200b 🎰a1.@:/+-()", max_size=40))
def test_never_raises(text):
    out = TOK.features(text)
    assert all(isinstance(t, str) and t for t in out)
    normalized = TOK.normalize(text)
    # One space between words, and no word holds white space or an invisible character.
    words = normalized.split(" ") if normalized else []
    assert all(w and not any(c.isspace() or unicodedata.category(c) in ("Cf", "Cc") for c in w) for w in words)


# Worked by hand from the pipeline in model/tokens.py's docstring: fold, mark, cut words, then
# join spaced letters, undo leetspeak, squash repeats and mark bare numbers; punctuation is no word.
@pytest.mark.parametrize("text,expected", [
    ("Ｃａｓｉｎｏ ＢＯＮＵＳ", "casino bonus"),                                    # NFKC + casefold
    ("FREEEEE c4sino spins", "free casino spins"),                                # squash, leet
    ("win 500 at https://Spin.EXAMPLE/now", "win <num> at <url> domain:spin.example"),  # number, URL, host folded
    ("w i n n e r, write to prize@lucky.example", "winner write to <email>"),     # spaced run, e-mail
    ("ca\u200bsh ＮＯＷ", "cash now"),                                             # zero-width space
    ("B\u043enus \u0441ode: fr33 spins!!!", "bonus code free spins"),             # Cyrillic look-alikes, leet
], ids=["fullwidth", "squash-leet", "number-url", "spaced-email", "zero-width", "homoglyph-leet"])
def test_normalize_worked_examples(text, expected):
    assert TOK.normalize(text) == expected


def test_spaced_words_are_joined_beside_a_token_of_256_characters_or_more():
    host = "ab" * 150 + ".example"
    assert TOK.normalize(f"c a s h at https://{host}/x") == f"cash at <url> domain:{host}"


@pytest.mark.parametrize("method", ["normalize", "words", "features"])
def test_a_text_that_is_no_str_is_refused_by_name(method):
    with pytest.raises(TypeError, match=rf"^Tokenizer\.{method}: text must be str, got bytes$"):
        getattr(TOK, method)(b"free casino")


def test_a_chunk_entry_leaves_the_chunk_rewritten_for_the_whole_pipeline(monkeypatch):
    text = "fr33 c a s i n o spins!"
    expected = Tokenizer().words_many([text])
    tok = Tokenizer()
    for chunk in tok.chunks_many([text])[0]:
        tok.chunk_entry(chunk)
    rewrites = []
    monkeypatch.setattr(tok._chunks, "_rewrite", lambda chunk: rewrites.append(chunk) or ("unexpected",))
    # The one-character chunks are held as short: the spaced-out run is still joined.
    assert tok.words_many([text]) == expected == (["free", "casino", "spins"], [3])
    assert rewrites == []


def test_chunk_entries_keep_the_short_chunk_set_bounded(monkeypatch):
    import model.tokens as tokens

    monkeypatch.setattr(tokens, "_CHUNK_CACHE_SIZE", 8)
    tok = Tokenizer()
    monkeypatch.setattr(tok._chunks, "_cap", 8)
    words = [a + b for a in "bdfgk" for b in "aeiou"]
    for word in words:
        tok.chunk_entry(f"k,{word}")  # "k" is a one-character token: a short chunk
    assert len(tok._chunks.short) > 0
    assert len(tok._chunks.short) <= 8 + 1
    assert len(tok._chunks) <= 8
