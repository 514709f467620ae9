"""Feature buckets: word pairs hashed from their words' hashes, both entry points
agree, the few-comments path equals the vectorised one, and explanations pick
exactly the largest contributions."""
from __future__ import annotations

import struct

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from sklearn.utils import murmurhash3_32

import model.normalization
import model.tokens
from model import artifact
from model.classifier import FEW, EmbeddingClassifier
from model.errors import ArtifactError
from model.explain import top_contributions
from model.features import FeatureEncoder, FeatureNames
from model.hashing import TokenHasher, _hash, _hash_many, murmur_u32, pair_hash, pair_hashes
from model.tokens import Tokenizer

from test_network import HAM, SPAM, small_corpus

EDGE = [0, 1, 0x7FFFFFFF, 0x80000000, 0xFFFFFFFF, 0x12345678]


def test_pair_hash_is_murmurhash3_of_the_rotated_xor_key():
    # Reference: scikit-learn's MurmurHash3 (x86, 32-bit) of the 4-byte little-endian key.
    rng = np.random.default_rng(0)
    left = np.concatenate([rng.integers(0, 2**32, 500, dtype=np.uint64), EDGE]).astype(np.uint32)
    right = np.concatenate([rng.integers(0, 2**32, 500, dtype=np.uint64), EDGE[::-1]]).astype(np.uint32)
    for seed in (0, 7, 2**32 - 1):
        got = pair_hashes(left, right, seed).tolist()
        for a, b, h in zip(left.tolist(), right.tolist(), got):
            key = (((a << 16) | (a >> 16)) & 0xFFFFFFFF) ^ b
            assert h == murmurhash3_32(struct.pack("<I", key), seed=seed, positive=True)
            assert h == pair_hash(a, b, seed)


def test_pair_hash_depends_on_order():
    a, b = _hash("free", 0), _hash("casino", 0)
    assert pair_hash(a, b) != pair_hash(b, a)
    assert pair_hashes([], []).size == 0


def test_bulk_hashes_equal_one_at_a_time():
    tokens = [f"w{i}" for i in range(3000)] + ["", "é", "🎰", "domain:prize.example"]
    for seed in (0, 123):
        assert _hash_many(tokens, seed).tolist() == [_hash(t, seed) for t in tokens]
    hasher = TokenHasher(seed=5)
    assert hasher.hash_list(tokens[:50]) == hasher.hashes(tokens[:50]).tolist() == [_hash(t, 5) for t in tokens[:50]]


def test_integer_key_murmur_matches_sklearn_on_random_and_edge_keys():
    # Reference: scikit-learn's MurmurHash3 (x86, 32-bit) of the 4-byte little-endian key.
    rng = np.random.default_rng(1)
    keys = np.concatenate([rng.integers(0, 2**32, 2000, dtype=np.uint64), EDGE]).astype(np.uint32)
    for seed in (0, 1, 0x9747B28C, 2**32 - 1):
        expected = [murmurhash3_32(struct.pack("<I", k), seed=seed, positive=True) for k in keys.tolist()]
        assert murmur_u32(keys, seed).tolist() == expected


def test_lone_surrogates_and_non_strings():
    hasher = TokenHasher()
    assert hasher.hash_list(["\ud800x"]) == hasher.hashes(["\ud800x"]).tolist()
    with pytest.raises(TypeError, match="must be str"):
        hasher.hash_list([3])
    with pytest.raises(TypeError, match="must be str"):
        hasher.hashes([3])


TEXTS = [
    "Free casino spins at https://www.Prize.example/x and casino.example now",
    "c a s i n o 4 u, call +1 555 010 9999 or mail win@prize.example",
    "literal domain:fake.example then <url> domain:prize.example done",
    "a b c i am a big fan of the council notes",
    "<url>",
    "",
    "!!! ???",
    "ᴄᴀꜱɪɴᴏ саsinо fr33 freeeee $ave 1,299.99 2 3",
    "ends with a link prize.example",
    "domain:literal.example starts the next comment",
    "<url> domain:a.example domain:b.example then words",
    # Cases for the chunk store: passes across chunks, the separator, links cut without the regexes.
    "call 555 010 9999 now, or (555) 010-9999; dates 2024-05-01 3 4",
    "tabs\t5\t6 7 and  double  8  9 spaces",
    "f r 3 3 s p i n s and 1 2 3",
    "a nul\x00inside, and a lone \x00 chunk",
    "HTTPS://Prize.Example/a). www.a_b.example/x http:// www. https://x.example/<b> ftp://files.example:21/",
    "ПРИВЕТ HTTPS://WWW.Prize.Example/Ok 5 5 5",
    "https://user@host.example:8080/p?q=1#f https://[::1]/x www.prize.example.",
]


def _check_same(enc: FeatureEncoder, tok: Tokenizer, texts: list[str]) -> None:
    batch = enc.texts(texts)
    strings = enc.tokens([tok.features(t) for t in texts])
    for i, text in enumerate(texts):
        mine = np.flatnonzero(batch.doc == i)
        theirs = np.flatnonzero(strings.doc == i)
        assert batch.bucket[mine].tolist() == strings.bucket[theirs].tolist(), text
        assert [batch.names[j] for j in mine] == tok.features(text), text
        assert batch.names.take(mine) == tok.features(text)
        one_buckets, one_names = enc.one(text)
        assert one_buckets == batch.bucket[mine].tolist(), text
        assert [one_names[j] for j in range(len(one_buckets))] == tok.features(text)
    assert batch.lengths.tolist() == [len(tok.features(t)) for t in texts]


@pytest.mark.parametrize("params", [{}, {"bigrams": False}, {"char_ngrams": (3, 5)}, {"join_spaced": False}],
                         ids=["default", "no-bigrams", "char-ngrams", "no-join-spaced"])
def test_text_path_equals_feature_string_path(params):
    tok = Tokenizer(**params)
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**18, seed=3))
    _check_same(enc, tok, TEXTS)
    _check_same(enc, tok, TEXTS[:1])


@settings(max_examples=150, deadline=None)
@given(st.lists(st.text(alphabet="ab c1.:/<>@$_ \u200bé\n", max_size=40)
                | st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0x10FFFF), max_size=30), max_size=6))
def test_text_path_equals_feature_string_path_on_any_text(texts):
    tok = Tokenizer()
    _check_same(FeatureEncoder(tok, TokenHasher(n_buckets=2**12)), tok, texts)


def test_text_path_stays_equal_while_the_chunk_store_sheds_entries():
    # A tiny store sheds its least used half again and again between batches;
    # features of earlier batches keep naming their tokens.
    tok = Tokenizer()
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**14))
    enc._store.cap = 16
    rng = np.random.default_rng(0)
    words = ["win", "free", "casino", "the", "notes", "https://p.example/1", "555", "a", "5", "c a s h"]
    kept = []
    for _ in range(30):
        texts = [" ".join(rng.choice(words, size=rng.integers(0, 12))) for _ in range(rng.integers(1, 6))]
        _check_same(enc, tok, texts)
        kept.append((enc.texts(texts), texts))
        assert len(enc._store) <= 16 + sum(len(t.split()) for t in texts) + len(texts)
    for batch, texts in kept:
        for i, text in enumerate(texts):
            assert batch.names.take(np.flatnonzero(batch.doc == i)) == tok.features(text)


def _held_singles_agree(store) -> None:
    """Every one-token chunk the store holds has the entry of its id in ``singles``, and only those."""
    for chunk, at in store.ids.items():
        tokens, hashes, marks, rotated = store.entries[at]
        if len(tokens) == 1 and " " not in chunk:
            assert store.singles[chunk] == (tokens[0], hashes[0], rotated[0], marks[0]), chunk
    assert all(len(store.entries[store.ids[c]][0]) == 1 for c in store.singles)


def test_one_comment_path_of_one_token_chunks_equals_the_batch_path():
    # The second time around every chunk is held, so one() takes its
    # one-token-chunk route; one-letter words carry a mark that only a run of
    # three may act on, spaced-out letters and links leave that route.
    tok = Tokenizer()
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**14))
    enc._store.cap = 32
    rng = np.random.default_rng(1)
    words = ["win", "free", "casino", "the", "notes", "a", "i", "5", "555", "x y z", "www.p.example", "fr33"]
    for _ in range(40):
        texts = [" ".join(rng.choice(words, size=rng.integers(0, 10))) for _ in range(rng.integers(1, 4))]
        _check_same(enc, tok, texts)
        _check_same(enc, tok, texts)
        _held_singles_agree(enc._store)
    assert enc.one("the free notes a casino")[0] == enc.texts(["the free notes a casino"]).bucket.tolist()


@pytest.mark.parametrize("text", [
    "free https://prize.example/claim?id=77 now",
    "https://prize.example/1 www.prize.example https://other.example/2",
    "ends with a link www.prize.example",
    "<url> https://prize.example/3 domain:typed.example after",
    "www.prize.example domain:typed.example <url> then words",
    "a b https://prize.example/4 c",
    "free 5x,7 https://prize.example/5",
    "https://prize.example/6",
    "https://prize.example/7 now",
    "free www.prize.example",
], ids=["middle", "three-links", "last", "typed-marker-before", "typed-domain-after", "single-letters",
        "two-token-chunk", "link-alone", "link-then-one-word", "one-word-then-link"])
def test_one_comment_path_splices_links_as_the_batch_path_pairs_them(text, monkeypatch):
    # Once the chunks are held, a comment of one-token chunks and links takes
    # the spliced route; each link's domain sits out of the pairs exactly as
    # the batch path and the whole pipeline leave it out.  Other chunks of
    # more than one token take the route of chained entries.
    tok = Tokenizer()
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**14))
    enc.texts([text])
    routes = []
    plain, entries = enc._one_plain, enc._one_entries
    monkeypatch.setattr(enc, "_one_plain", lambda *a: routes.append("plain") or plain(*a))
    monkeypatch.setattr(enc, "_one_entries", lambda *a: routes.append("entries") or entries(*a))
    _check_same(enc, tok, [text])
    assert routes == ["entries" if "5x,7" in text else "plain"]
    _check_same(enc, tok, [text, text.upper()])


@pytest.mark.parametrize("texts, whole", [
    (["see https://prize.example/123 456 now", "call 555 then 12 more", "plain words only"], []),
    (["call 555 010 9999 now", "555 then 7 8", "(555) 010-9999 or 555 010 9999"], [0, 2]),
    (["a b c 555 7", "x 1 2 3 y", "spaced 5 5 5 and 12 34"], [0, 1, 2]),
    (["", "555", "555 666", "ünï 555 010 9999 cödé", "999 " * 200, "12 34 56 78 90"], [3, 5]),
], ids=["hints-only", "phones", "spaced-letters", "edges"])
def test_a_chunk_rule_hint_that_changes_nothing_keeps_the_chunks_tokens(texts, whole, monkeypatch):
    # Two neighbouring chunks that may be one spaced-out phone number only hint
    # at one: the batch path sends a comment to the whole pipeline when the
    # chunk rule does change it, or when a token rule's run stands in its
    # tokens; either way the words are the whole pipeline's.
    tok = Tokenizer()
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**14))
    sent = []
    words_many = tok.words_many
    monkeypatch.setattr(tok, "words_many", lambda ts: sent.extend(ts) or words_many(ts))
    enc.texts(texts)
    assert sent == [texts[i] for i in whole]
    _check_same(enc, tok, texts)
    _check_same(FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**14)), tok, texts[::-1])


def test_whole_link_chunks_equal_the_regex_route():
    # Links with a scheme or www. skip the regular expressions; the result must not differ.
    tok = Tokenizer()
    chunks = ["https://www.prize.example/claim?id=77", "http://a.example).", "www.x", "www.", "https://",
              "https://a.example/<b>", "https://a_b.example", "ftps://h.example:990/f", "https://u:p@h.example/",
              "https://[2001:db8::1]:443/x", "www.prize.example.", "https://h.example/\x01", "https://é.example"]
    for chunk in chunks:
        folded = model.normalization.fold_text(chunk)
        slow = tuple(map(tok._rewrite_word, model.normalization.word_tokens(model.normalization.mark_specials(folded))))
        assert tok._rewrite_chunk(chunk) == slow, chunk


def test_links_to_one_host_share_an_entry_with_the_same_tokens():
    tok = Tokenizer()
    chunks = ["https://prize.example/claim?id=77", "https://prize.example/1234", "http://a.example).x/",
              "https://prize.example./x", "https://Prize.Example/Up", "ftp://h.example:21/f", "https:///x",
              "https://a_b.example/x", "https://u@h.example/x", "https://h.example?q=/x", "https://h.example/<b>"]
    shared = 0
    for chunk in chunks:
        alias = tok.chunk_alias(chunk)
        if alias is not None:
            shared += 1
            assert tok.chunk_entry(alias) == tok.chunk_entry(chunk), chunk
    assert shared >= 6
    enc = FeatureEncoder(tok, TokenHasher())
    before = len(enc._store)
    _check_same(enc, tok, [" ".join(chunks), "see https://prize.example/9 555 010 9999 now"])
    assert len(enc._store) - before < len(chunks) + 8


_LINK_PART = st.text(alphabet="abcz09.-_/:?=&%#@!~()[]<>\"'`A\\ é\x7f", max_size=12)


@settings(max_examples=400, deadline=None)
@given(st.sampled_from(["https://", "http://", "ftp://", "ftps://", "HTTPS://", "www.", "https:/", ""]),
       _LINK_PART, st.sampled_from(["", "/", "//", ".", "-", "_"]), _LINK_PART)
def test_the_plain_link_match_gives_the_alias_of_the_checks(scheme, host, cut, path):
    # The usual link takes one regular expression instead of the checks one by
    # one; both must give the same key (or None) for any chunk.
    chunk = scheme + host + cut + path
    assert Tokenizer.chunk_alias(chunk) == Tokenizer._alias_by_checks(chunk), chunk


def test_the_plain_link_match_takes_the_usual_links():
    links = ["https://prize.example/4863", "http://a-b.example/x?id=7&p=%20", "ftp://h.example/f.txt",
             "https://prize.example/claim(1).", "https://9.example/", "https://h.example/a_b/[x]~"]
    for chunk in links:
        assert model.tokens._PLAIN_LINK.fullmatch(chunk) is not None, chunk
        assert Tokenizer.chunk_alias(chunk) == Tokenizer._alias_by_checks(chunk) is not None
    for chunk in ["https://Prize.example/1", "https://a_b.example/1", "https://h.example./1", "https://h.example",
                  "https://h.example/<b>", "https://h.example/é", "www.h.example/1"]:
        assert model.tokens._PLAIN_LINK.fullmatch(chunk) is None, chunk
        assert Tokenizer.chunk_alias(chunk) == Tokenizer._alias_by_checks(chunk)


def test_names_take_matches_indexing():
    names = FeatureNames(["free", "casino", "now"], np.array([0, 1]), np.array([1, 2]), ["#fre"])
    every = list(range(len(names)))
    assert names.take(every) == [names[i] for i in every] == ["free", "casino", "now", "free_casino", "casino_now", "#fre"]
    assert names.take([4]) == ["casino_now"] and names.take([]) == []


def _brute_force(doc, contribution, first, tokens, n_docs, top_k, spamward=None):
    out = []
    for d in range(n_docs):
        rows = [i for i in range(doc.size) if doc[i] == d and contribution[i] != 0]
        lifted = spamward is not None and spamward[d]
        rows.sort(key=lambda i: (not (lifted and contribution[i] > 0), -abs(contribution[i]), first[i]))
        out.append([(tokens[first[i]], float(contribution[i])) for i in rows[:top_k]])
    return out


@pytest.mark.parametrize("grouped", [False, True], ids=["any-order", "grouped-by-comment"])
@pytest.mark.parametrize("seed", range(6))
def test_top_contributions_equal_a_brute_force_ranking(seed, grouped):
    rng = np.random.default_rng(seed)
    n_docs = int(rng.integers(1, 40))
    sizes = rng.integers(0, 30, n_docs)
    sizes[rng.integers(n_docs)] = 300  # one comment wider than the comment-by-pair matrix
    doc = np.repeat(np.arange(n_docs), sizes)
    indptr = None
    if grouped:  # as a scoring bag holds them: the matrix path
        indptr = np.concatenate([[0], np.cumsum(sizes)])
    elif seed % 2:
        doc = rng.permutation(doc)  # the function must not rely on the order
    m = doc.size
    # seeds 0-2: few distinct values, so ties abound (inside the top k and at its edge)
    contribution = rng.choice([-2.0, -0.5, 0.0, 0.5, 1.0, 2.0], m) if seed < 3 else rng.normal(size=m)
    first = rng.permutation(m)
    tokens = [f"t{i}" for i in range(m)]
    spamward = rng.random(n_docs) < 0.5
    for k in (1, 5, 16, 17, 50):
        got = top_contributions(doc, contribution, first, tokens, n_docs, k, indptr=indptr)
        assert got == _brute_force(doc, contribution, first, tokens, n_docs, k)
        got = top_contributions(doc, contribution, first, tokens, n_docs, k, spamward=spamward, indptr=indptr)
        assert got == _brute_force(doc, contribution, first, tokens, n_docs, k, spamward)


def test_top_contributions_in_rows_ranks_ties_by_position_not_by_pair_order():
    # One comment, its pairs in bucket order; the equal magnitudes must come in the order of first.
    contribution = np.array([1.0, -3.0, 1.0, 3.0, 0.0, 1.0])
    first = np.array([5, 4, 3, 2, 1, 0])
    tokens = [f"t{i}" for i in range(6)]
    got = top_contributions(np.zeros(6, dtype=np.int64), contribution, first, tokens, 1, 3,
                            indptr=np.array([0, 6]))
    assert got == [[("t2", 3.0), ("t4", -3.0), ("t0", 1.0)]]


@pytest.fixture(scope="module")
def trained() -> EmbeddingClassifier:
    texts, labels = small_corpus(4)
    return EmbeddingClassifier(dim=4, min_df=1, validation_share=0.0, seed=1).fit(texts, labels)


def test_few_comments_path_equals_the_vectorised_path(trained):
    texts = SPAM + HAM + TEXTS
    scores, reasons = trained.score_many(texts, top_k=5)
    assert len(texts) > FEW
    for i in range(0, len(texts), FEW):
        few_scores, few_reasons = trained.score_many(texts[i:i + FEW], top_k=5)
        np.testing.assert_allclose(few_scores, scores[i:i + FEW], rtol=0, atol=1e-12)
        for got, want in zip(few_reasons, reasons[i:i + FEW]):
            assert [t for t, _ in got] == [t for t, _ in want]
            np.testing.assert_allclose([c for _, c in got], [c for _, c in want], rtol=0, atol=1e-12)
    # and through the feature-string entry point
    feats = [trained._tokenizer.features(t) for t in texts[:2]]
    again, _ = trained.score_features(feats, top_k=5)
    np.testing.assert_allclose(again, scores[:2], rtol=0, atol=1e-12)


def test_one_comment_and_batch_paths_share_the_last_step(trained, monkeypatch):
    # Whatever turns logits into probabilities (a calibration, say) must be
    # applied by the one-comment path exactly as by the batch path: both go
    # through _probabilities.  A stand-in that is not a plain sigmoid shows it.
    from model import network

    texts = SPAM + HAM + TEXTS
    monkeypatch.setattr(trained, "_probabilities", lambda z: network.sigmoid(0.5 * np.asarray(z) - 1.0))
    batch, batch_reasons = trained.score_many(texts, top_k=3)
    expected = network.sigmoid(0.5 * trained.logits_many(texts) - 1.0)
    np.testing.assert_allclose(batch, expected, rtol=0, atol=1e-12)
    for text, want, want_reasons in zip(texts, batch, batch_reasons):
        (got,), (got_reasons,) = trained.score_many([text], top_k=3)
        assert got == pytest.approx(want, abs=1e-12)
        assert [t for t, _ in got_reasons] == [t for t, _ in want_reasons]
        assert trained.predict_proba_one(text) == pytest.approx(want, abs=1e-12)


def test_a_model_with_other_pair_hashing_is_refused(trained):
    arrays, manifest = artifact.loads(trained.to_bytes())
    manifest = {k: v for k, v in manifest.items() if k not in ("sha256", "format", "format_version")}
    manifest["hashing"] = {k: v for k, v in manifest["hashing"].items() if k != "pairs"}
    data, _ = artifact.dumps(arrays, manifest)
    with pytest.raises(ArtifactError, match="retrain"):
        EmbeddingClassifier.from_bytes(data)


def test_distinct_tokens_counted_by_hash_equal_distinct_feature_strings():
    texts, labels = small_corpus(3)
    texts = texts + TEXTS
    labels = labels + [0] * len(TEXTS)
    clf = EmbeddingClassifier(dim=2, min_df=1, validation_share=0.0, epochs=1).fit(texts, labels)
    strings = {t for text in texts for t in clf._tokenizer.features(text)}
    assert clf.summary_["distinct_tokens"] == len(strings)


# Pieces of the evasions the tokenizer undoes, mixed with plain words: look-alike
# letters (Cyrillic, Greek, small capitals), zero-width and format characters,
# leetspeak, spaced-out letters and digits, links with and without a scheme,
# phone numbers written with spaces, and markers typed by hand.
_EVASION_PIECES = [
    "free", "casino", "win", "notes", "саsinо", "ᴄᴀꜱɪɴᴏ", "ΡΡΙΖΕ", "fr33", "c@sh", "$ave", "freeeee",
    "ca\u200bsino", "\u2060", "\ufe0f", "\u200d", "\x00", "c a s i n o", "f r 3 3", "1 2 3", "a b",
    "https://prize.example/claim?id=77", "www.prize.example", "prize.example", "http://a.example).",
    "HTTPS://Prize.Example/Up", "win@prize.example", "+1 555 010 9999", "(555) 010-9999", "555", "010",
    "9999", "1,299.99", "<url>", "domain:fake.example", "🎰", "é", "Ｆｒｅｅ",
]
_evasive_text = st.lists(st.sampled_from(_EVASION_PIECES), max_size=12).flatmap(
    lambda pieces: st.lists(st.sampled_from([" ", "  ", "\t", "\n", "", ".", ","]),
                            min_size=len(pieces), max_size=len(pieces)).map(
        lambda gaps: "".join(p + g for p, g in zip(pieces, gaps))))


@settings(max_examples=200, deadline=None)
@given(st.lists(_evasive_text, min_size=1, max_size=5))
def test_every_featurization_path_gives_the_same_tokens_and_buckets(texts):
    # The batch path (with a store warmed by earlier batches and a cold one),
    # the one-comment path, and the whole pipeline (Tokenizer.features, hashed
    # as feature strings) must agree token for token and bucket for bucket.
    tok = Tokenizer()
    warm = FeatureEncoder(tok, TokenHasher(n_buckets=2**12))
    warm.texts(texts[::-1])
    warm.texts([" ".join(texts)])
    cold = FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**12))
    for enc in (warm, cold):
        _check_same(enc, tok, texts)
    together = warm.texts(texts)
    for i, text in enumerate(texts):
        alone = cold.texts([text])
        mine = np.flatnonzero(together.doc == i)
        assert alone.bucket.tolist() == together.bucket[mine].tolist(), text
        assert alone.names.take(np.arange(alone.bucket.size)) == together.names.take(mine) == tok.features(text)


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_grouping_by_a_packed_sort_equals_the_stable_argsort(data):
    # _bag groups (comment, bucket) keys by sorting values with each
    # occurrence's position packed in; it must give the stable argsort's order
    # exactly, so that the first occurrence of a repeated bucket still names it.
    from model.classifier import _grouping_order

    n_docs = data.draw(st.integers(1, 40))
    shift = data.draw(st.integers(1, 18))
    size = data.draw(st.integers(0, 400))
    doc = np.sort(np.array(data.draw(st.lists(st.integers(0, n_docs - 1), min_size=size, max_size=size)),
                          dtype=np.int32))
    # few distinct buckets, so repeats and collisions abound
    bucket = np.array(data.draw(st.lists(st.integers(0, min(2**shift - 1, 7)), min_size=size, max_size=size)),
                      dtype=np.int32)
    key_bits = (n_docs << shift).bit_length()
    order, keys = _grouping_order(doc, bucket, shift, key_bits, np.int32)
    want_order, want_keys = _grouping_order(doc, bucket, shift, key_bits, np.int32, packed=False)
    expected = (doc.astype(np.int64) << shift) | bucket
    assert order.tolist() == want_order.tolist() == np.argsort(expected, kind="stable").tolist()
    assert keys.tolist() == want_keys.tolist() == expected[want_order].tolist()
    assert keys.dtype == want_keys.dtype == np.int32


@pytest.mark.parametrize("spamward_from", [None, 0.0, 1.0], ids=["plain", "spamward", "spamward-never"])
def test_one_comment_ranking_breaks_ties_by_position_as_the_batch_path(trained, monkeypatch, spamward_from):
    # With every term +-0.25 most contributions tie; both paths must keep the
    # tied tokens in the order they appear (spam-ward first when asked).
    tables = trained._scoring_tables()
    tied = np.where(tables.bucket_logit > 0, 0.25, np.where(tables.bucket_logit < 0, -0.25, 0.0)).astype(np.float32)
    monkeypatch.setattr(tables, "bucket_logit", tied)
    texts = SPAM + HAM + ["free free prize prize notes notes meeting free"]
    assert len(texts) > FEW
    batch_scores, batch_reasons = trained.score_many(texts, top_k=6, spamward_from=spamward_from)
    for text, score, want in zip(texts, batch_scores, batch_reasons):
        (got_score,), (got,) = trained.score_many([text], top_k=6, spamward_from=spamward_from)
        assert got_score == pytest.approx(score, abs=1e-12)
        assert [t for t, _ in got] == [t for t, _ in want]
        np.testing.assert_allclose([c for _, c in got], [c for _, c in want], rtol=0, atol=1e-12)


def _check_words(enc: FeatureEncoder, tok: Tokenizer, texts: list[str], rows) -> None:
    # The reference is the whole pipeline, one comment at a time (Tokenizer.words).
    flat, counts = enc.texts(texts).words(rows)
    picked = range(len(texts)) if rows is None else rows
    want = [tok.words(texts[i]) for i in picked]
    assert counts.tolist() == [len(w) for w in want]
    assert flat == [w for words in want for w in words]


@pytest.mark.parametrize("params", [{}, {"bigrams": False}, {"char_ngrams": (3, 5)}, {"join_spaced": False}],
                         ids=["default", "no-bigrams", "char-ngrams", "no-join-spaced"])
def test_words_of_a_batch_equal_the_whole_pipeline(params):
    tok = Tokenizer(**params)
    enc = FeatureEncoder(tok, TokenHasher(n_buckets=2**18, seed=3))
    texts = TEXTS + ["", "one", "   ", " ".join(["very", "long", "Ｗｏｒｄｓ", "x"] * 500)]
    n = len(texts)
    for rows in (None, list(range(n)), list(range(n))[::-1], [0, 0, n - 1, 3, 3, n - 3], [], [n - 4]):
        _check_words(enc, tok, texts, rows)
    _check_words(enc, tok, [], [])
    _check_words(enc, tok, ["a b c d", ""], [1, 1])


@settings(max_examples=100, deadline=None)
@given(st.data())
def test_words_of_a_batch_equal_the_whole_pipeline_on_any_text(data):
    texts = data.draw(st.lists(_evasive_text | st.text(alphabet="ab c1.:/<>@$_ \u200bé\n", max_size=40),
                               min_size=1, max_size=6))
    rows = data.draw(st.lists(st.integers(0, len(texts) - 1), max_size=10))
    tok = Tokenizer()
    _check_words(FeatureEncoder(tok, TokenHasher(n_buckets=2**12)), tok, texts, rows)


def test_features_of_feature_strings_carry_no_words():
    enc = FeatureEncoder(Tokenizer(), TokenHasher(n_buckets=2**12))
    with pytest.raises(ValueError, match="Features.words"):
        enc.tokens([["free", "casino", "free_casino"]]).words()


def test_word_params_leave_out_only_what_adds_features_beside_the_words():
    assert Tokenizer().word_params() == Tokenizer(bigrams=False, char_ngrams=(2, 4)).word_params()
    assert Tokenizer().word_params() != Tokenizer(leet=False).word_params()
    assert set(Tokenizer().params()) - set(Tokenizer().word_params()) == {"bigrams", "char_ngrams"}


@pytest.mark.parametrize("size", [1, FEW, FEW + 1, 40], ids=["one", "few", "few+1", "batch"])
def test_an_encoded_batch_scores_as_score_many_and_gives_its_words(trained, size):
    texts = (SPAM + HAM + TEXTS)[:size]
    spamward_from = [0.5] * len(texts)
    encoded = trained.encode(texts)
    got_scores, got_reasons = trained.score_encoded(encoded, top_k=5, spamward_from=spamward_from)
    want_scores, want_reasons = trained.score_many(texts, top_k=5, spamward_from=spamward_from)
    assert got_scores.tolist() == want_scores.tolist() and got_reasons == want_reasons  # bit for bit
    rows = list(range(len(texts)))[::-1] + [0]
    words = encoded.words(rows)
    assert words.params == trained._tokenizer.word_params()
    assert words.counts.tolist() == [len(trained._tokenizer.words(texts[i])) for i in rows]
    assert words.flat == [w for i in rows for w in trained._tokenizer.words(texts[i])]


def _edge_comments() -> list[str]:
    """Invented comments for the one-comment path: empty, one token, links, e-mail, numbers, repeats
    (one bucket many times), very long, unicode and look-alike letters."""
    rng = np.random.default_rng(7)
    words = ["free", "casino", "prize", "notes", "garden", "meeting", "the", "a", "win", "bonus", "library"]
    pieces = words + ["https://prize.example/claim?id=9", "www.casino.example", "win@prize.example", "555 010 9999",
                      "1,299.99", "42", "саsinо", "ᴄᴀꜱɪɴᴏ", "Ｆｒｅｅ", "fr33", "ca\u200bsino", "é", "🎰", "c a s h"]
    made = ["", "free", "casino", "zzqx", "https://prize.example/1", "win@prize.example", "12345",
            "free free free free", "casino " * 300, " ".join(words * 40), "Ｆｒｅｅ ｃａｓｉｎｏ", "саsinо prize"]
    made += [" ".join(rng.choice(pieces, size=rng.integers(1, 40))) for _ in range(150)]
    return made


def _one_comment_in_numpy(clf, text: str, top_k: int, spamward_from):
    """The one-comment path's arithmetic written with numpy arrays, as it was before it moved to
    Python floats: the pooling weights, the logit and the stable ranking it must give bit for bit."""
    from collections import Counter

    buckets, names = clf._encoder.one(text)
    tables = clf._scoring_tables()
    if not buckets:
        return float(clf._probabilities(np.array([tables.bias]))[0]), []
    counts = Counter(buckets)
    unique = list(counts)
    times = np.fromiter(counts.values(), dtype=np.float64, count=len(unique))
    norm = float(np.sqrt(np.dot(times, times)))
    terms = times / norm * tables.bucket_logit[unique]
    score = float(clf._probabilities(np.array([tables.bias + sum(terms.tolist())]))[0])
    magnitude = np.abs(terms)
    if spamward_from is not None and score >= spamward_from:
        magnitude += (terms > 0) * (magnitude.max() + 1.0)
    ranked = np.argsort(-magnitude, kind="stable")[:top_k].tolist()
    scale = clf.calibration_.contribution_scale
    return score, [(names[buckets.index(unique[j])], float(terms[j]) * scale) for j in ranked if terms[j]]


@pytest.mark.parametrize("spamward_from", [None, 0.5], ids=["plain", "spamward"])
@pytest.mark.parametrize("top_k", [1, 5, 500])
def test_one_comment_path_equals_its_numpy_arithmetic_and_the_batch_path(trained, spamward_from, top_k):
    # The one-comment path counts, weighs, sums and ranks in Python floats:
    # the same operations in the same order as the numpy arrays, so the same
    # bits and the same tokens in the same order (ties by position).  Against
    # the batch path (more than FEW comments at once, summed by np.bincount)
    # the scores agree to rounding and the tokens exactly.
    assert trained.pooling == "l2"
    texts = _edge_comments()
    assert len(texts) > FEW
    scores, reasons = trained.score_many(texts, top_k=top_k, spamward_from=spamward_from)
    for text, score, want in zip(texts, scores.tolist(), reasons):
        (got_score,), (got,) = trained.score_many([text], top_k=top_k, spamward_from=spamward_from)
        assert (float(got_score), got) == _one_comment_in_numpy(trained, text, top_k, spamward_from), text
        assert got_score == pytest.approx(score, abs=1e-12)
        assert [t for t, _ in got] == [t for t, _ in want], text
        np.testing.assert_allclose([c for _, c in got], [c for _, c in want], rtol=0, atol=1e-12)
