"""MurmurHash3 bucketing and the averaged document matrix."""
import numpy as np
import pytest
from sklearn.utils import murmurhash3_32

from model.hashing import TokenHasher, murmur_bucket

# Published MurmurHash3_x86_32 test vectors (from memory: the widely circulated
# table of Appleby's reference implementation outputs), each also checked
# against sklearn.utils.murmurhash3_32 below.
VECTORS = [
    ("", 0, 0x00000000), ("", 1, 0x514E28B7), ("", 0xFFFFFFFF, 0x81F16F39),
    ("hello", 0, 0x248BFA47), ("a", 0x9747B28C, 0x7FA09EA6), ("abc", 0x9747B28C, 0xC84A62DD),
    ("abcd", 0x9747B28C, 0xF0478627), ("Hello, world!", 0x9747B28C, 0x24884CBA),
    ("The quick brown fox jumps over the lazy dog", 0x9747B28C, 0x2FA826CD),
]


@pytest.mark.parametrize("text,seed,expected", VECTORS, ids=[f"{t[:8]!r}-{s:#x}" for t, s, _ in VECTORS])
def test_reference_vectors(text, seed, expected):
    assert murmurhash3_32(text, seed=seed, positive=True) == expected
    assert murmur_bucket(text, 2**30, seed) == expected & (2**30 - 1)
    assert TokenHasher(n_buckets=2**30, seed=seed).buckets([text]).tolist() == [expected & (2**30 - 1)]


def test_smhasher_verification_value():
    # SMHasher's VerificationTest for MurmurHash3_x86_32 is 0xB0F57EE3 (from memory).
    key = bytes(range(256))
    table = b"".join(murmurhash3_32(key[:i], seed=256 - i, positive=True).to_bytes(4, "little") for i in range(256))
    assert murmurhash3_32(table, seed=0, positive=True) == 0xB0F57EE3


def test_bulk_path_matches_per_token_hash():
    rng = np.random.default_rng(3)
    alphabet = list("abcxyz_é🎰 ")
    tokens = ["".join(rng.choice(alphabet, size=rng.integers(0, 30))) for _ in range(6000)]
    got = TokenHasher(n_buckets=2**18, seed=7).buckets(tokens).tolist()
    assert got == [murmur_bucket(t, 2**18, 7) for t in tokens]


@pytest.mark.parametrize("value", [0, 3, -4, 2.0, "8", True, 2**31], ids=["zero", "three", "negative", "float", "str", "bool", "too-big"])
def test_invalid_bucket_counts(value):
    with pytest.raises(ValueError, match=r"n_buckets.*" ):
        TokenHasher(n_buckets=value)


def test_one_bucket_forces_collisions():
    m = TokenHasher(n_buckets=1).matrix([["free", "casino", "now"]])
    assert m.shape == (1, 1) and m.toarray().tolist() == [[1.0]]


def test_rows_are_means_with_duplicates_summed_and_empty_rows_zero():
    h = TokenHasher(n_buckets=2**18)
    m = h.matrix(iter([["a", "a", "b", "c"], [], ["b"]]))
    assert m.dtype == np.float32 and m.shape == (3, 2**18)
    dense = m.toarray()
    assert dense[0, murmur_bucket("a", 2**18)] == pytest.approx(0.5)
    assert dense[1].sum() == 0 and dense[2].sum() == pytest.approx(1.0)
    assert m.has_canonical_format


def test_generator_documents_and_a_str_document_is_refused():
    h = TokenHasher(n_buckets=16)
    assert h.matrix((iter(t) for t in [["a"], ["b"]])).shape == (2, 16)
    with pytest.raises(TypeError, match="not a str"):
        h.matrix(["free casino"])


def test_cache_bound_is_honoured():
    h = TokenHasher(n_buckets=2**10, cache_size=50)
    for i in range(20):
        h.buckets([f"t{i}-{j}" for j in range(30)])
        assert h.cached <= 50
    assert TokenHasher(cache_size=0).buckets(["x"]).size == 1


def test_params_round_trip():
    h = TokenHasher(n_buckets=2**12, seed=5, cache_size=10)
    assert TokenHasher(**h.params()) == h
