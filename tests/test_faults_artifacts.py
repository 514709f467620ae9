"""Tampered model artifacts: every damaged byte refused, the CLI says so on one line,
and a running worker keeps serving the model it has (file hot reload and registry)."""
from __future__ import annotations

import hashlib
import io
import json
import os

import numpy as np
import pytest

from faults_kit import KEYS, comment_text
from kit import Worker, stop_all, wait_until
from model import artifact
from model.classifier import EmbeddingClassifier
from model.errors import ArtifactError
from ops.cli import main
from ops.registry import Registry
from retrain_kit import model_bytes


def _arrays(data: bytes) -> dict:
    with np.load(io.BytesIO(data), allow_pickle=False) as npz:
        return {k: npz[k] for k in npz.files}


def _archive(arrays: dict) -> bytes:
    out = io.BytesIO()
    np.savez_compressed(out, **arrays)
    return out.getvalue()


def flipped(data: bytes) -> bytes:
    """One byte of the first stored array's compressed data flipped."""
    at = data.index(b"row_delta.npy") + 200
    return data[:at] + bytes([data[at] ^ 0x5A]) + data[at + 1:]


def truncated(data: bytes) -> bytes:
    return data[: len(data) * 2 // 3]


def wrong_version(data: bytes) -> bytes:
    """Format version 2, otherwise intact and correctly sealed: only the version check can refuse it."""
    arrays = _arrays(data)
    manifest = json.loads(arrays["manifest"].tobytes())
    manifest["format_version"] = 2
    body = {k: v for k, v in arrays.items() if k != "manifest"}
    manifest["sha256"] = artifact.checksum(body, manifest)
    arrays["manifest"] = np.frombuffer(json.dumps(manifest, sort_keys=True).encode(), dtype=np.uint8)
    return _archive(arrays)


def needs_pickle(data: bytes) -> bytes:
    """The embedding table replaced by an object array, which only pickle could read."""
    arrays = _arrays(data)
    arrays["table_q"] = np.array([{"payload": "would run on unpickle"}], dtype=object)
    out = io.BytesIO()
    np.savez(out, **arrays)  # numpy pickles object arrays when saving
    return out.getvalue()


TAMPERS = {
    "flipped-byte": (flipped, "load model: (checksum mismatch|truncated or not a model file|not a readable)"),
    "truncated": (truncated, "load model: truncated or not a model file"),
    "wrong-version": (wrong_version, "load model: format version 2 is not supported"),
    "needs-pickle": (needs_pickle, "load model: the file holds a pickled"),
}


@pytest.fixture(scope="module")
def good() -> bytes:
    return model_bytes(0)


@pytest.mark.parametrize("kind", list(TAMPERS), ids=list(TAMPERS))
def test_each_tamper_is_refused_with_its_own_message(good, kind):
    damage, message = TAMPERS[kind]
    with pytest.raises(ArtifactError, match=message):
        EmbeddingClassifier.from_bytes(damage(good))


def test_every_flipped_byte_is_refused_or_harmless(good):
    """Flip each byte in turn (every 11th position, three patterns): no other exception escapes.

    A flip in the archive's bookkeeping (a timestamp, an attribute byte) leaves
    every stored array and the manifest intact; such a file may load, and
    must then be the very same model.  Anything else must be an ArtifactError.
    """
    reference = EmbeddingClassifier.from_bytes(good)
    probe = [comment_text(i) for i in range(20)]
    expected = reference.predict_proba_many(probe)
    refused = harmless = 0
    for at in range(0, len(good), 11):
        for pattern in (0x01, 0x80, 0xFF):
            damaged = good[:at] + bytes([good[at] ^ pattern]) + good[at + 1:]
            try:
                model = EmbeddingClassifier.from_bytes(damaged)
            except ArtifactError as exc:
                assert str(exc).startswith("load model: "), exc
                refused += 1
                continue
            assert model.version == reference.version, f"byte {at} ^ {pattern:#x} loaded a different model"
            np.testing.assert_array_equal(model.predict_proba_many(probe), expected)
            harmless += 1
    print("faults:", json.dumps({"test": "artifact_byte_flips", "flips": refused + harmless, "refused": refused,
                                 "harmless_metadata_flips": harmless}))
    assert refused > 0.8 * (refused + harmless)


def test_every_truncation_is_refused(good):
    for end in range(0, len(good), 13):
        with pytest.raises(ArtifactError, match="^load model: "):
            EmbeddingClassifier.from_bytes(good[:end])


@pytest.mark.parametrize("kind", list(TAMPERS), ids=list(TAMPERS))
@pytest.mark.parametrize("command", ["serve", "score", "models-push"])
def test_cli_refuses_a_tampered_file_with_one_line_and_exit_2(good, kind, command, tmp_path, capsys):
    damage, message = TAMPERS[kind]
    path = tmp_path / "tampered.model"
    path.write_bytes(damage(good))
    # Port 1 has no server: the artifact must be refused before Redis is needed.
    url = "redis://127.0.0.1:1/0"
    argv = {
        "serve": ["serve", "--model", str(path), "--redis", url],
        "score": ["score", "--model", str(path), "hello"],
        "models-push": ["models", "push", str(path), "--redis", url],
    }[command]
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("seawall ") and ": error: load model: " in lines[0]
    assert "Traceback" not in err


def _tampered_versions(good: bytes) -> dict:
    return {kind: damage(good) for kind, (damage, _message) in TAMPERS.items()}


@pytest.mark.redis_server
@pytest.mark.slow
def test_running_workers_keep_their_model_when_a_tampered_one_arrives(redis_server, good, tmp_path):
    """Two workers at once: one serves a file (hot reload), one the registry's active model."""
    client = redis_server.client()
    old = EmbeddingClassifier.from_bytes(good)
    new_bytes = model_bytes(1)
    new = EmbeddingClassifier.from_bytes(new_bytes)
    serving = tmp_path / "serving.model"
    serving.write_bytes(good)
    file_env = {"SEAWALL_KEYS_PREFIX": "file:"}
    reg_env = {"SEAWALL_KEYS_PREFIX": "reg:"}
    reg_keys = type(KEYS)(prefix="reg:")
    file_keys = type(KEYS)(prefix="file:")
    registry = Registry(client=client, keys=reg_keys)
    registry.promote(registry.push(good))
    workers = [Worker(url=redis_server.url, name="file-w", log_dir=tmp_path, model_path=serving, env=file_env),
               Worker(url=redis_server.url, name="reg-w", log_dir=tmp_path, env=reg_env)]
    for w in workers:
        w.start()
    sent = 0

    def send_and_wait(n: int = 5) -> list[tuple[str, str]]:
        """Send ``n`` comments to both deployments; return the (file, registry) model of their verdicts."""
        nonlocal sent
        for keys in (file_keys, reg_keys):
            for i in range(sent, sent + n):
                client.xadd(keys.comments, {"id": f"c{i}", "text": comment_text(i)})
        sent += n
        assert wait_until(lambda: client.xlen(file_keys.verdicts) >= sent and client.xlen(reg_keys.verdicts) >= sent,
                          timeout=60), [w.output()[-2000:] for w in workers]
        return [client.xrevrange(keys.verdicts, count=1)[0][1][b"model"].decode() for keys in (file_keys, reg_keys)]

    try:
        assert send_and_wait() == [old.version, old.version]
        for kind, data in _tampered_versions(good).items():
            # File: a tampered copy moved over the served path, as a deploy script would.
            tmp = tmp_path / f"{kind}.tmp"
            tmp.write_bytes(data)
            os.replace(tmp, serving)
            # Registry: tampered bytes planted under a new version and promoted (push would refuse them).
            version = f"tampered-{kind}"
            client.set(registry.keys.model_blob(version), data)
            client.hset(registry.keys.model_meta(version), mapping={"version": version,
                                                             "sha256": hashlib.sha256(data).hexdigest()})
            registry.promote(version)
            assert wait_until(lambda: all(w.output().count("refused") >= 1 + list(TAMPERS).index(kind)
                                          for w in workers), timeout=30), [w.output()[-2000:] for w in workers]
            assert send_and_wait() == [old.version, old.version], kind
            assert all(w.alive() for w in workers), kind
        # A good new model is then taken up by both: the refusals were not a stuck reload.
        tmp = tmp_path / "new.tmp"
        tmp.write_bytes(new_bytes)
        os.replace(tmp, serving)
        registry.promote(registry.push(new_bytes))
        assert wait_until(lambda: send_and_wait(1) == [new.version, new.version], timeout=30)
    finally:
        codes = stop_all(workers)
    assert codes == [0, 0]
    for w in workers:
        log = w.output()
        assert "Traceback" not in log
        assert log.count("refused") == len(TAMPERS), log[-3000:]
