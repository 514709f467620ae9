"""Rules across whitespace chunks: declared once, honoured by every featurization path.

Each path builds a comment's words from its chunks' cached tokens unless
``needs_whole_pipeline`` finds a rule's run in its marks; the whole pipeline
(``Tokenizer.words_many``) applies every rule of ``CROSS_CHUNK_RULES``.  These
tests check each rule of the table on texts it changes, and that a rule added
to the table alone (nothing else touched) is honoured by the batch path (cold,
warm, and the slow cut), the one-comment path and the whole pipeline.  The
hypothesis test in test_features.py covers agreement on any text.
"""
from __future__ import annotations

import re
from itertools import chain

import pytest

import model.normalization
from model.features import FeatureEncoder
from model.hashing import TokenHasher
from model.normalization import (CHUNKS, CROSS_CHUNK_RULES, TOKENS, CrossChunkRule, chunk_marks,
                                 needs_whole_pipeline, token_rule_marks)
from model.tokens import MARK_DOMAIN, MARK_URL, Tokenizer

from test_features import _check_same

#: Per rule of the table: texts it changes across chunks, and a token the whole
#: pipeline gives for the first of them that no chunk gives alone.
EXAMPLES = {
    "spaced phone number": (["call +1 555 010 9999 today", "or 0800 555 0199, ok"], "<phone>"),
    "spaced-out word": (["play c a s i n o now", "get f r 3 3 spins"], "casino"),
}


def _chunk_words(tok: Tokenizer, text: str) -> list[str]:
    """The words a path would give that ignored every rule across chunks."""
    return list(chain.from_iterable(tok.chunk_entry(c)[0] for c in tok.chunks_many([text])[0]))


def _marks(tok: Tokenizer, text: str) -> tuple[bytes, bytes]:
    entries = [tok.chunk_entry(c) for c in tok.chunks_many([text])[0]]
    return bytes(e[2] for e in entries), bytes(chain.from_iterable(e[1] for e in entries))


def test_every_rule_of_the_table_has_examples():
    assert {rule.name for rule in CROSS_CHUNK_RULES} == set(EXAMPLES)


@pytest.mark.parametrize("rule", CROSS_CHUNK_RULES, ids=lambda r: r.name)
def test_each_rule_of_the_table_is_honoured_by_every_path(rule):
    texts, token = EXAMPLES[rule.name]
    tok = Tokenizer()
    for text in texts:
        assert rule.found(_marks(tok, text)[0 if rule.reads == CHUNKS else 1]), text
        assert tok.words(text) != _chunk_words(tok, text), text  # the rule changes the words
    assert token in tok.words(texts[0]) and token not in _chunk_words(tok, texts[0])
    batch = texts + ["plain words only", "a b", "555"]
    _check_same(FeatureEncoder(tok, TokenHasher(n_buckets=2**16)), tok, batch)


def test_a_switched_off_rule_is_not_asked_for():
    tok = Tokenizer(join_spaced=False)
    assert [r.name for r in tok.rules] == [r.name for r in CROSS_CHUNK_RULES if r.switch != "join_spaced"]
    assert "casino" not in tok.words("play c a s i n o now")
    _check_same(FeatureEncoder(tok, TokenHasher(n_buckets=2**16)), tok, EXAMPLES["spaced-out word"][0])


# Two rules that exist only in these tests: a word broken with a hyphen across
# chunks ("pro- mo" -> "promo"), and "no deposit" as one token.
_BROKEN_END, _BROKEN_START = 4, 8
_NO, _DEPOSIT = 8, 16


def _broken_word_marks(chunk: str) -> int:
    end = _BROKEN_END if len(chunk) > 1 and chunk[-1] == "-" and chunk[-2].isalpha() else 0
    return end | (_BROKEN_START if chunk[:1].isalpha() else 0)


def _join_broken_words(text: str) -> str:
    return re.sub(r"([^\W\d_])- +([^\W\d_])", r"\1\2", text)


def _no_deposit_marks(token: str) -> int:
    return {"no": _NO, "deposit": _DEPOSIT}.get(token, 0)


def _join_no_deposit(tokens: list[str], rewrite) -> list[str]:
    out: list[str] = []
    for token in tokens:
        if token == "deposit" and out and out[-1] == "no":
            out[-1] = "nodeposit"
        else:
            out.append(token)
    return out


NEW_RULES = [
    CrossChunkRule("broken word", CHUNKS, _broken_word_marks, bytes([_BROKEN_END, _BROKEN_START]), _join_broken_words),
    CrossChunkRule("no deposit", TOKENS, _no_deposit_marks, bytes([_NO, _DEPOSIT]), _join_no_deposit),
]
NEW_TEXTS = {"broken word": (["get pro- mo codes", "a bonus- code. and pro- mo"], "promo"),
             "no deposit": (["no deposit bonus", "win big, no deposit needed no"], "nodeposit")}


@pytest.mark.parametrize("rule", NEW_RULES, ids=lambda r: r.name)
def test_a_rule_added_to_the_table_alone_is_honoured_by_every_path(monkeypatch, rule):
    monkeypatch.setattr(model.normalization, "CROSS_CHUNK_RULES", CROSS_CHUNK_RULES + (rule,))
    texts, token = NEW_TEXTS[rule.name]
    tok = Tokenizer()
    assert rule in tok.rules
    assert token in tok.words(texts[0]) and token not in _chunk_words(tok, texts[0])
    others = ["plain words only", "no way", "pro- 5", "deposit no"]
    warm = FeatureEncoder(tok, TokenHasher(n_buckets=2**16))
    _check_same(warm, tok, texts + others)                     # cold store: every chunk new
    _check_same(warm, tok, others[::-1] + texts)               # warm store: every chunk held
    _check_same(warm, tok, [texts[0] + " \x00 x", texts[1]])   # a comment holding the separator: the slow cut
    cold = FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**16))
    for text in texts:
        buckets, names = cold.one(text)                        # the one-comment path on a cold store
        assert [names[j] for j in range(len(buckets))] == tok.features(text)


def test_without_the_new_rule_the_paths_keep_the_chunks_tokens():
    tok = Tokenizer()
    for texts, token in NEW_TEXTS.values():
        assert token not in tok.words(texts[0])
        assert tok.words(texts[0]) == _chunk_words(tok, texts[0])


def test_marks_and_the_check():
    assert chunk_marks("555") == chunk_marks("(555)") == 3 and chunk_marks("call") == 0 and chunk_marks("") == 0
    assert token_rule_marks(["c", "<url>", "sino"]) == [1, 0, 0]
    assert needs_whole_pipeline(bytes([1, 2]), b"") and not needs_whole_pipeline(bytes([2, 1]), b"")
    assert needs_whole_pipeline(b"", bytes([1, 1, 1])) and not needs_whole_pipeline(b"", bytes([1, 1, 0, 1]))
    assert needs_whole_pipeline(b"", bytes([1, 3, 5]))  # other bits beside the rule's do not hide it
    spaced = [r for r in CROSS_CHUNK_RULES if r.switch == "join_spaced"]
    assert not needs_whole_pipeline(b"", bytes([1, 1, 1]), [r for r in CROSS_CHUNK_RULES if r not in spaced])


def test_rules_of_one_kind_use_their_own_bits():
    # Bits of two rules reading the same marks must not overlap, and token rules
    # must leave the link bits of model.tokens alone.
    for reads, taken in ((CHUNKS, 0), (TOKENS, MARK_URL | MARK_DOMAIN)):
        for rule in (r for r in CROSS_CHUNK_RULES if r.reads == reads):
            bits = 0
            for b in rule.run:
                bits |= b
            assert bits & taken == 0, rule.name
            taken |= bits


@pytest.mark.parametrize("reads,run", [("words", b"\x01"), (CHUNKS, b""), (TOKENS, b"\x01\x00")],
                         ids=["unknown-reads", "empty-run", "zero-bits"])
def test_a_rule_is_checked_when_declared(reads, run):
    with pytest.raises(ValueError, match="CrossChunkRule 'bad'"):
        CrossChunkRule("bad", reads, len, run, str)
