"""MinHash (Broder 1997): the estimate against the exact Jaccard, and LSH band keys."""
from __future__ import annotations

import numpy as np
import pytest

from model.minhash import MinHasher, band_hashes, band_keys, collision_probability, exact_jaccard, jaccard_estimate

VOCAB = np.array([f"w{i}" for i in range(5000)])  # invented words, so no two shingles collide by accident of language


def pair(rng, n_words, n_changed):
    base = list(rng.choice(VOCAB, size=n_words))
    other = list(base)
    for i in rng.choice(n_words, size=n_changed, replace=False):
        other[i] = str(rng.choice(VOCAB))
    return " ".join(base), " ".join(other)


@pytest.mark.parametrize("k", [64, 256])
def test_estimate_is_within_three_standard_errors(k):
    """Broder 1997: E[estimate] = J and its standard error is sqrt(J (1 - J) / k).

    120 text pairs with exact shingle Jaccard spread over (0.05, 0.95).  Within
    3 SE should hold for 99.7 % of pairs if the hash family were ideal; require
    at least 97 %, and the mean standardized error must be near 0 (no bias).
    """
    rng = np.random.default_rng(k)
    mh = MinHasher(num_perm=k, shingle=3, seed=1)
    inside, z = 0, []
    pairs = 0
    for n_changed in np.linspace(1, 30, 120).astype(int):
        a, b = pair(rng, 80, int(n_changed))
        j = exact_jaccard(mh.shingles(a), mh.shingles(b))
        if not 0.05 < j < 0.95:
            continue
        pairs += 1
        est = jaccard_estimate(mh.signature(a), mh.signature(b))
        se = np.sqrt(j * (1 - j) / k)
        inside += abs(est - j) <= 3 * se
        z.append((est - j) / se)
    assert pairs >= 100
    assert inside / pairs >= 0.97, (inside, pairs)
    assert abs(np.mean(z)) <= 3 / np.sqrt(pairs) + 0.1  # unbiased up to noise


def test_identical_and_disjoint_texts():
    mh = MinHasher(num_perm=128)
    a = "cheap watches at watches.example buy two get one"
    assert jaccard_estimate(mh.signature(a), mh.signature(a)) == 1.0
    assert jaccard_estimate(mh.signature(a), mh.signature("entirely other words in this short reply")) < 0.1


def test_signatures_are_the_same_in_a_batch_and_alone_and_across_instances():
    texts = ["one two three four five", "", "a b", "one two three four six"]
    batch = MinHasher(seed=5).signatures(texts)
    alone = np.stack([MinHasher(seed=5).signature(t) for t in texts])
    np.testing.assert_array_equal(batch, alone)
    assert batch.dtype == np.uint32 and batch.shape == (4, 128)


def test_empty_text_matches_nothing():
    mh = MinHasher()
    empty = mh.signature("  ...  ")
    assert jaccard_estimate(empty, empty) == 0.0


def test_case_and_unicode_forms_fold():
    mh = MinHasher()
    assert mh.shingles("FREE Prize NOW") == mh.shingles("free prize now") == {"free prize now"}
    assert mh.shingles("ｆｒｅｅ prize now") == {"free prize now"}  # full-width letters, NFKC


def test_band_keys_match_for_equal_bands_only():
    sig = np.arange(128, dtype=np.uint32)
    other = sig.copy()
    other[0] = 999
    a, b = band_keys(sig, 16), band_keys(other, 16)
    assert len(a) == 16 and a[0] != b[0] and a[1:] == b[1:]
    assert a[3].startswith("3:")
    with pytest.raises(ValueError, match="bands"):
        band_keys(sig, 5)


def test_lsh_collision_curve():
    assert collision_probability(0.8, bands=16, rows=8) > 0.9
    assert collision_probability(0.3, bands=16, rows=8) < 0.01


@pytest.mark.parametrize(("kwargs", "field"), [({"num_perm": 0}, "num_perm"), ({"shingle": 0}, "shingle"),
                                               ({"seed": -1}, "seed"), ({"num_perm": True}, "num_perm")],
                         ids=["no-perms", "no-shingle", "negative-seed", "bool"])
def test_params_are_validated(kwargs, field):
    with pytest.raises(ValueError, match=field):
        MinHasher(**kwargs)


def test_band_hashes_match_for_equal_bands_only_and_batch_equals_alone():
    sigs = np.stack([np.arange(64, dtype=np.uint32), np.arange(64, dtype=np.uint32)])
    sigs[1, 0] = 999  # band 0 differs
    h = band_hashes(sigs, 16)
    assert h.shape == (2, 16) and h.dtype == np.uint64
    assert h[0, 0] != h[1, 0] and (h[0, 1:] == h[1, 1:]).all()
    np.testing.assert_array_equal(band_hashes(sigs[1], 16)[0], h[1])
    same_rows = np.tile(np.array([7, 7, 7, 7], dtype=np.uint32), 16)  # every band has the same rows
    assert len(set(band_hashes(same_rows, 16)[0].tolist())) == 16  # the band index is part of the key
    with pytest.raises(ValueError, match="bands"):
        band_hashes(sigs, 5)


@pytest.mark.parametrize("max_words", [64, 3], ids=["whole-texts", "cut-to-three-words"])
def test_signatures_of_a_flat_word_list_equal_those_of_word_lists(max_words):
    """One flat list and per-text counts (what the tokenizer's batch path returns) give the same signatures,
    empty texts and texts longer than max_words included."""
    mh = MinHasher(num_perm=32, shingle=2, max_words=max_words)
    texts = [["win", "a", "free", "prize", "now"], [], ["hello"], ["the", "council", "met", "on", "monday", "night"]]
    flat = [w for t in texts for w in t]
    np.testing.assert_array_equal(mh.signatures_of_flat(flat, [len(t) for t in texts]), mh.signatures_of_words(texts))
    assert (mh.signatures_of_flat([], []).shape) == (0, 32)
    with pytest.raises(ValueError, match="counts"):
        mh.signatures_of_flat(flat, [1, 2])


def _plain_signature(mh: MinHasher, words: list[str]) -> list[int]:
    """One text's signature computed word by word in plain Python integers, as the module doc states it:
    each word's CRC-32 (zlib, the standard's reference polynomial), each shingle's CRCs folded in with a
    multiply-add and MurmurHash3's 64-bit finalizer (its published constants), then per permutation the
    minimum of ``((a x + b) mod 2**64) >> 32`` (Dietzfelbinger 1996)."""
    import zlib

    mask = (1 << 64) - 1

    def fmix(x):
        x ^= x >> 33
        x = (x * 0xFF51AFD7ED558CCD) & mask
        x ^= x >> 33
        x = (x * 0xC4CEB9FE1A85EC53) & mask
        return x ^ (x >> 33)

    words = words[: mh.max_words]
    if not words:
        return [0xFFFFFFFF] * mh.num_perm
    crc = [zlib.crc32(w.encode("utf-8")) for w in words]
    starts = range(max(len(words) - mh.shingle, 0) + 1)
    shingles = []
    for s in starts:
        combined = 0
        for j in range(mh.shingle):
            part = crc[s + j] + 1 if s + j < len(words) else 0
            combined = (combined * 0x9E3779B97F4A7C15 + part) & mask
        shingles.append(fmix(combined) >> 32)
    return [min((((a * x + b) & mask) >> 32) for x in shingles)
            for a, b in zip(mh._a.tolist(), mh._b.tolist())]


@pytest.mark.parametrize("shingle", [1, 3])
def test_signatures_equal_a_plain_integer_computation(shingle):
    rng = np.random.default_rng(4)
    mh = MinHasher(num_perm=32, shingle=shingle, max_words=20)
    texts = [list(rng.choice(VOCAB, size=n)) for n in (0, 1, 2, 3, 5, 19, 20, 21, 60)] + [["é", "🎰", "x"] * 3]
    got = mh.signatures_of_words([list(map(str, t)) for t in texts])
    for text, row in zip(texts, got.tolist()):
        assert row == _plain_signature(mh, list(map(str, text)))
