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
