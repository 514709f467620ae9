"""Where the worker's model comes from, and how a new one replaces it.

A :class:`ModelSource` hands out the model to serve (``current()``) and, when
asked (``poll()``), a new model if one has appeared.  A corrupt new artifact is
refused: ``poll()`` logs why and returns ``None``, so the old model keeps
serving.  The worker calls ``poll()`` every ``worker.reload_poll_s`` between
batches.  :class:`FileModelSource` watches a model file; the registry (in ops/)
provides another source with the same two methods.
"""
from __future__ import annotations

import logging
import os
from collections.abc import Callable
from typing import Protocol, runtime_checkable

from model.errors import ArtifactError

log = logging.getLogger("seawall.worker.loader")


@runtime_checkable
class ModelSource(Protocol):
    def current(self):
        """The model to serve now (loads it on first use; raises ArtifactError if it cannot)."""

    def poll(self):
        """A new model if the source changed and the new artifact loads, else ``None``."""


def load_model_file(path: str):
    """Load an EmbeddingClassifier artifact (imported late: model/ may be built after worker/)."""
    from model.classifier import EmbeddingClassifier

    return EmbeddingClassifier.load(path)


class StaticModelSource:
    """Serves one model object that never changes (tests, benchmarks, embedding apps)."""

    def __init__(self, *, model):
        self.model = model

    def current(self):
        return self.model

    def poll(self):
        return None


class FileModelSource:
    """Serves the model saved at ``path`` and reloads it when the file changes.

    A change is a new (inode, size, mtime) signature.  Write a new model to a
    temporary name and ``os.replace`` it over ``path``; a half-written file is
    refused like any corrupt one and retried when the file changes again.

    Parameters
    ----------
    path : the model file.
    loader : ``path -> model``; by default ``EmbeddingClassifier.load``.
    """

    def __init__(self, *, path: str | os.PathLike, loader: Callable[[str], object] | None = None):
        self.path = os.fspath(path)
        self.loader = loader
        self._model = None
        self._signature = None
        self._refused = None

    def _stat(self):
        st = os.stat(self.path)
        return (st.st_ino, st.st_size, st.st_mtime_ns)

    def _load(self):
        return (self.loader or load_model_file)(self.path)

    def current(self):
        if self._model is None:
            try:
                signature = self._stat()
            except OSError as exc:
                raise ArtifactError(f"load model: cannot read {self.path}: {exc.strerror}; check --model") from None
            self._model = self._load()
            self._signature = signature
        return self._model

    def poll(self):
        if self._model is None:
            return self.current()
        try:
            signature = self._stat()
        except OSError as exc:
            if self._refused != "missing":
                log.warning("model reload: %s is unreadable (%s); still serving %s", self.path, exc.strerror,
                            getattr(self._model, "version", "?"))
                self._refused = "missing"
            return None
        if signature == self._signature or signature == self._refused:
            return None
        try:
            model = self._load()
            model.thresholds.hold, model.thresholds.reject, model.version  # what the worker needs of it
        except Exception as exc:  # any failure to load a NEW model must leave the old one serving
            self._refused = signature
            log.error("model reload: refused %s (%s: %s); still serving %s", self.path, type(exc).__name__, exc,
                      getattr(self._model, "version", "?"))
            return None
        self._model, self._signature, self._refused = model, signature, None
        log.info("model reload: now serving %s from %s", getattr(model, "version", "?"), self.path)
        return model
