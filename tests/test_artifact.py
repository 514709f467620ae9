"""The model file: round trip, int8 quantization bounds, refusal of tampered files."""
from __future__ import annotations

import io
import json

import numpy as np
import pytest

from model import artifact
from model.classifier import EmbeddingClassifier
from model.errors import ArtifactError

from test_network import HAM, SPAM, small_corpus


@pytest.fixture(scope="module")
def trained() -> EmbeddingClassifier:
    texts, labels = small_corpus(8)
    return EmbeddingClassifier(dim=5, min_df=1, validation_share=0.25, seed=4).fit(texts, labels)


@pytest.fixture(scope="module")
def blob(trained) -> bytes:
    return trained.to_bytes()


def rewrite(blob: bytes, change) -> bytes:
    """Load the archive's arrays, let ``change`` edit the dict, write it back."""
    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    change(arrays)
    out = io.BytesIO()
    np.savez_compressed(out, **arrays)
    return out.getvalue()


def manifest_of(arrays) -> dict:
    return json.loads(arrays["manifest"].tobytes().decode())


def set_manifest(arrays, manifest, *, reseal: bool) -> None:
    if reseal:
        body = {k: v for k, v in arrays.items() if k != "manifest"}
        manifest["sha256"] = artifact.checksum(body, manifest)
    arrays["manifest"] = np.frombuffer(json.dumps(manifest).encode(), dtype=np.uint8)


def test_round_trip_keeps_scores_thresholds_and_version(trained, blob):
    loaded = EmbeddingClassifier.from_bytes(blob)
    texts = SPAM + HAM + ["an unseen comment about nothing"]
    np.testing.assert_allclose(loaded.predict_proba_many(texts), trained.predict_proba_many(texts), atol=5e-3)
    assert loaded.thresholds == trained.thresholds
    assert loaded.version == trained.version and len(loaded.version) == 12
    assert loaded.created_at == trained.created_at
    # A loaded model serialises to the very same arrays: the version is a content id.
    assert EmbeddingClassifier.from_bytes(loaded.to_bytes()).version == loaded.version


def test_manifest_holds_what_an_operator_needs(trained):
    m = trained.manifest
    assert m["format"] == "seawall-model" and m["format_version"] == artifact.FORMAT_VERSION
    assert m["tokenizer"]["bigrams"] is True and "version" in m["tokenizer"]
    assert m["hashing"]["n_buckets"] == trained.buckets and m["hashing"]["scheme"] == "murmurhash3_x86_32"
    assert m["dim"] == 5
    assert set(m["thresholds"]) == {"hold", "reject"}
    assert m["training"]["n_train"] > 0 and m["training"]["rows"] > 0
    assert "roc_auc" in m["metrics"]["validation"]
    assert isinstance(m["created_at"], float) and len(m["sha256"]) == 64


def test_file_loads_with_plain_numpy_and_no_pickle(tmp_path, trained):
    path = tmp_path / "model.npz"
    trained.save(path)
    with np.load(path, allow_pickle=False) as npz:
        assert {"manifest", "row_delta", "table_q", "table_scale", "table_zero", "head_w2", "head_b2"} <= set(npz.files)
        assert npz["table_q"].dtype == np.int8
        assert npz["head_w2"].dtype == np.float32
    assert EmbeddingClassifier.load(path).version == trained.version


def test_only_touched_rows_are_stored(trained, blob):
    arrays, _ = artifact.loads(blob)
    rows = artifact.decode_rows(arrays["row_delta"])
    texts, _ = small_corpus(1)
    buckets = set()
    for t in texts:
        buckets.update(trained._encoder.tokens([trained._tokenizer.features(t)]).bucket.tolist())
    assert set(rows.tolist()) == buckets
    assert arrays["table_q"].shape == (len(buckets), 5)


@pytest.mark.parametrize("block", [1, 3, 16], ids=["per-row", "block-3", "block-16"])
@pytest.mark.parametrize("spread", [1e-4, 1.0, 50.0], ids=["tiny", "unit", "wide"])
def test_quantization_error_is_at_most_half_a_step(block, spread):
    # Jacob et al. 2018: with affine quantization x ≈ scale * (q - zero), rounding
    # costs at most scale / 2 per value, and 0 is represented exactly.
    rng = np.random.default_rng(0)
    x = (rng.normal(size=(101, 7)) * spread).astype(np.float32)
    x[::5] = np.abs(x[::5])  # rows with no negative values: the range is widened to hold 0
    x[7] = 0.0
    x[9, 3] = 0.0
    q, scale, zero = artifact.quantize(x, block)
    back = artifact.dequantize(q, scale, zero, block)
    step = np.repeat(scale.astype(np.float64), block)[: x.shape[0], None]
    assert np.all(np.abs(back.astype(np.float64) - x) <= step / 2 * (1 + 1e-5))
    assert np.all(back[7] == 0.0) and back[9, 3] == 0.0
    assert q.dtype == np.int8 and scale.size == -(-x.shape[0] // block)


def test_row_ids_round_trip_in_a_narrow_dtype():
    rows = np.array([3, 4, 200, 70000, 70001])
    delta = artifact.encode_rows(rows)
    assert delta.dtype == np.uint32
    np.testing.assert_array_equal(artifact.decode_rows(delta), rows)
    assert artifact.encode_rows(np.arange(0, 5000, 7)).dtype == np.uint8


@pytest.mark.parametrize("block", [1, 4], ids=["per-row", "block-4"])
def test_model_arrays_round_trip_through_the_codec(trained, block):
    import doctest

    rows = np.array([2, 5, 9, 40000])
    values = np.random.default_rng(1).normal(size=(4, 3)).astype(np.float32)
    head = {"w2": np.array([0.5, -1.0, 2.0]), "b2": np.array([0.25])}
    stored = artifact.encode_model(rows, values, head, block)
    got_rows, got_values, got_head = artifact.decode_model(stored, block)
    np.testing.assert_array_equal(got_rows, rows)
    np.testing.assert_allclose(got_values, values, atol=float(np.abs(values).max()) / 127)
    assert set(got_head) == {"w2", "b2"} and got_head["w2"].dtype == np.float32
    # the classifier stores exactly what the codec writes
    arrays, _ = artifact.loads(trained.to_bytes())
    rows, values, head = artifact.decode_model(arrays, 1)
    again = artifact.encode_model(rows, values, head, 1)
    assert sorted(again) == sorted(arrays)
    assert doctest.testmod(artifact).attempted > 0 and doctest.testmod(artifact).failed == 0


def flip_first_value(arrays):
    q = arrays["table_q"].copy()
    q.flat[0] = np.int8(q.flat[0] ^ 1)
    arrays["table_q"] = q


def change_thresholds(arrays):
    m = manifest_of(arrays)
    m["thresholds"]["reject"] = 0.01
    set_manifest(arrays, m, reseal=False)


def future_version(arrays):
    m = manifest_of(arrays)
    m["format_version"] = 99
    set_manifest(arrays, m, reseal=True)


def other_format(arrays):
    m = manifest_of(arrays)
    m["format"] = "something-else"
    set_manifest(arrays, m, reseal=True)


def drop_manifest(arrays):
    del arrays["manifest"]


def drop_table(arrays):
    m = manifest_of(arrays)
    del arrays["table_q"]
    set_manifest(arrays, m, reseal=True)


@pytest.mark.parametrize(
    "change, match",
    [
        (flip_first_value, "checksum mismatch"),
        (change_thresholds, "checksum mismatch"),
        (future_version, "format version 99"),
        (other_format, "unknown format"),
        (drop_manifest, "no manifest"),
        (drop_table, "incomplete"),
    ],
    ids=["flipped-weight", "edited-thresholds", "future-version", "other-format", "no-manifest", "missing-array"],
)
def test_tampered_files_are_refused(blob, change, match):
    with pytest.raises(ArtifactError, match=match):
        EmbeddingClassifier.from_bytes(rewrite(blob, change))


@pytest.mark.parametrize(
    "damage",
    [
        lambda b: b[: len(b) // 2],
        lambda b: b[:-30],
        lambda b: b"",
        lambda b: b"not a model at all",
        lambda b: b[:200] + bytes([b[200] ^ 0xFF]) + b[201:],
    ],
    ids=["truncated-half", "truncated-tail", "empty", "garbage", "flipped-byte"],
)
def test_truncated_or_corrupt_bytes_are_refused(blob, damage):
    with pytest.raises(ArtifactError, match="load model"):
        EmbeddingClassifier.from_bytes(damage(blob))


def test_pickled_array_is_refused_not_unpickled(blob):
    def add_object_array(arrays):
        arrays["head_w2"] = np.array([{"evil": 1}], dtype=object)

    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    add_object_array(arrays)
    out = io.BytesIO()
    np.savez(out, **arrays)  # numpy pickles object arrays on save
    with pytest.raises(ArtifactError, match="pickle"):
        EmbeddingClassifier.from_bytes(out.getvalue())


def test_missing_file_is_an_artifact_error(tmp_path):
    with pytest.raises(ArtifactError, match="cannot read"):
        EmbeddingClassifier.load(tmp_path / "absent.npz")


def test_thresholds_are_stored_and_overridable(trained, blob):
    loaded = EmbeddingClassifier.from_bytes(blob)
    custom = loaded.thresholds.with_overrides(hold=0.3)
    assert custom.hold == 0.3 and custom.reject == loaded.thresholds.reject
    loaded.thresholds = custom
    again = EmbeddingClassifier.from_bytes(loaded.to_bytes())
    assert again.thresholds == custom
    assert loaded.version == again.version != trained.version


def test_small_model_file_is_small(blob):
    assert len(blob) < 20_000
