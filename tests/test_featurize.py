"""The batch path gives exactly the per-comment features and buckets."""
import doctest
from itertools import chain

import pytest
from hypothesis import given, settings, strategies as st

import model.featurize as featurize_module
from model.featurize import BatchFeaturizer
from model.hashing import TokenHasher
from model.tokens import DOC_SEPARATOR, Tokenizer

# Invented comments covering every rewriting step, including the ones that span
# chunks (spaced-out words, spaced phone numbers) and edge cases of the join.
EDGE = [
    "", "   ", "a", "7", "a b", "c d", "end a b", "c a s i n o 1 2 3", "f r 3 3 now", "1 2 3", "x_y_z",
    "call +1 555 010 9999 or 0800 555 0199, not 2 3", "see https://www.Casino.example/win?x=1 now",
    "domain:typed.example foo bar", "see http://a.example/x and domain:q.example now", "mail win@prize.example",
    "ＦＲＥＥ саsinо ᴄᴀꜱɪɴᴏ привет cásínó", "fr33 c4sh $ave FREEEEE", "pay 1,299.99 on 2024-01-02", "\U0001f3b0\U0001f3b0 win",
    "lone \ud800 surrogate", "zero\u200bwidth\x00", "tab\tand\nnewline", "a\ue000b inside a word", "ends with 5 5",
]


def per_comment(tok, hasher, texts):
    feats = [tok.features(t) for t in texts]
    flat = list(chain.from_iterable(feats))
    return feats, flat, hasher.buckets(flat).tolist()


def check_same(tok, hasher, featurizer, texts):
    feats, flat, buckets = per_comment(tok, hasher, texts)
    assert tok.features_many(texts) == feats
    got = featurizer.featurize(texts)
    assert got.lengths.tolist() == [len(f) for f in feats]
    assert got.tokens == flat
    assert got.buckets.tolist() == buckets
    want, have = hasher.matrix(feats), featurizer.matrix(texts)
    assert have.shape == want.shape and have.dtype == want.dtype and have.has_canonical_format
    assert have.indptr.tolist() == want.indptr.tolist() and have.indices.tolist() == want.indices.tolist()
    assert have.data.tobytes() == want.data.tobytes()


@pytest.mark.parametrize("params", [{}, {"bigrams": False}, {"join_spaced": False}, {"char_ngrams": (3, 4)}],
                         ids=["default", "no-bigrams", "no-join", "char-ngrams"])
def test_batch_equals_per_comment(params):
    tok, hasher = Tokenizer(**params), TokenHasher(n_buckets=2**18)
    featurizer = BatchFeaturizer(tokenizer=tok, hasher=hasher)
    for texts in (EDGE, EDGE[::-1], EDGE[:1], [], EDGE[3:6], ["a b", "c d"], EDGE * 3):
        check_same(tok, hasher, featurizer, texts)


def test_separator_in_a_comment_is_just_text():
    tok, hasher = Tokenizer(), TokenHasher()
    featurizer = BatchFeaturizer(tokenizer=tok, hasher=hasher)
    texts = ["win now", f" {DOC_SEPARATOR} ", f"free {DOC_SEPARATOR} cash"]
    assert tok.unigram_stream(texts) is None  # the batch is not joined
    check_same(tok, hasher, featurizer, texts)
    # The joined path's cache must not leak the separator into a lone comment.
    tok.unigram_stream(["a", "b"])
    assert tok.features(f" {DOC_SEPARATOR} ") == []


def test_seed_and_bucket_count_follow_the_hasher():
    tok = Tokenizer()
    for hasher in (TokenHasher(n_buckets=16, seed=7), TokenHasher(n_buckets=2**20, seed=2**32 - 1)):
        check_same(tok, hasher, BatchFeaturizer(tokenizer=tok, hasher=hasher), EDGE)


@pytest.mark.parametrize("kwargs,match", [
    ({"tokenizer": None, "hasher": TokenHasher()}, "tokenizer"),
    ({"tokenizer": Tokenizer(), "hasher": None}, "hasher"),
], ids=["tokenizer", "hasher"])
def test_bad_parameters(kwargs, match):
    with pytest.raises(ValueError, match=match):
        BatchFeaturizer(**kwargs)


_WORDS = st.sampled_from(["a", "b", "c", "1", "2", "55", "fr33", "win", "WIN", "$5", "+1", "555", "(555)", "010-9999",
                          "https://x.example/", "x.example", "me@x.example", "саsinо", "ǅ", "_", ".", ",", "!!!",
                          "\u200b", "\U0001f3b0", "domain:d.example", "<url>", "ﬁ", "ß"])
_COMMENT = st.one_of(
    st.lists(_WORDS, max_size=12).map(" ".join),
    st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0x10FFFF), max_size=40),
)


@settings(max_examples=150, deadline=None)
@given(st.lists(_COMMENT, max_size=8))
def test_batch_equals_per_comment_property(texts):
    tok, hasher = Tokenizer(), TokenHasher(n_buckets=2**12)
    check_same(tok, hasher, BatchFeaturizer(tokenizer=tok, hasher=hasher), texts)


def test_docstring_examples():
    assert doctest.testmod(featurize_module).failed == 0
