"""Small real models for the worker's tests, trained once per test session.

Each is an EmbeddingClassifier fitted on invented comments (ops.bench.stream's
generator), saved in a temporary folder that is removed when the session ends.
"""
from __future__ import annotations

import atexit
import shutil
import tempfile
from functools import lru_cache
from pathlib import Path

from ops.bench.stream import invented_comments

_FOLDER = Path(tempfile.mkdtemp(prefix="seawall-test-models-"))
atexit.register(shutil.rmtree, _FOLDER, ignore_errors=True)


@lru_cache(maxsize=None)
def tiny_model(seed: int = 1) -> tuple[Path, str]:
    """(path, version) of a model trained on 400 invented comments with ``seed``."""
    from model.classifier import EmbeddingClassifier

    data = invented_comments(400, seed=seed)
    model = EmbeddingClassifier(seed=seed, epochs=3).fit([t for t, _ in data], [y for _, y in data])
    path = _FOLDER / f"model-{seed}.bin"
    model.save(path)
    return path, model.version
