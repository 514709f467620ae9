"""The model registry: artifacts as bytes in Redis, an active pointer, history.

Keys (under the deployment prefix):

* ``models:blob:{version}``  the artifact bytes (``EmbeddingClassifier.to_bytes``)
* ``models:meta:{version}``  hash: version, sha256, size, created_at, pushed_at,
  source (push|retrain), parent, labels_cursor, hold, reject, promoted_at
* ``models:versions``        sorted set of every pushed version by push time
* ``models:active``          the version workers serve
* ``models:history``         list of promoted versions, newest first; its head
  is always the active version, so rollback pops the head
* ``models:changed``         pub/sub channel; the message is the new version
* ``models:replay``          replay sample of the original training data
* ``models:canary``          the fixed canary set the retrain gate evaluates on

Workers on any host load the artifact from Redis; no shared disk.  Promote
and rollback are WATCH/MULTI transactions over the active pointer and the
history, so two concurrent ones leave one consistent active model, and the
one that lost the race gets :class:`PromoteConflict` with what to do.
The replay and canary sets are zlib-compressed JSON lines of
``{"text", "label"}`` (label 1 = spam); nothing here unpickles anything.

On a partitioned deployment (``keys.partitions`` > 1, a Redis Cluster) every
key above carries the shared hash tag (``seawall:{shared}:models:active``,
``Keys.shared``), together with the events stream, so a promote's
transaction (pointer, history, meta, event) stays in one hash slot; the
change message is published after EXEC.  A single-partition deployment keeps
the names above.  Moving an existing deployment to partitions means pushing
and promoting its model again under the new names (``seawall models push
--promote`` with the new configuration).
"""
from __future__ import annotations

import hashlib
import json
import logging
import random
import time
import zlib
from collections.abc import Iterable, Sequence
from pathlib import Path

import redis

from model.actions import THRESHOLD_ACTIONS
from model.errors import ArtifactError, DataError, SeawallError
from worker.events import add_event
from worker.settings import Keys

log = logging.getLogger(__name__)

HISTORY_MAX = 1000
SETS_MAX_BYTES = 64 * 2**20


class RegistryError(SeawallError):
    """A registry operation cannot be done as asked; the message says why and what to do."""


class PromoteConflict(RegistryError):
    """Another promote or rollback changed the active model while this one ran."""


def _s(value) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def load_model(data: bytes):
    """An ``EmbeddingClassifier`` from artifact bytes (ArtifactError when corrupt)."""
    from model.classifier import EmbeddingClassifier

    return EmbeddingClassifier.from_bytes(data)


def encode_examples(examples: Iterable[tuple[str, int]]) -> bytes:
    """``[(text, label)]`` -> zlib-compressed JSON lines (pure)."""
    lines = "\n".join(json.dumps({"text": t, "label": int(y)}, ensure_ascii=False) for t, y in examples)
    return zlib.compress(lines.encode("utf-8"), 6)


def decode_examples(blob: bytes | None) -> list[tuple[str, int]]:
    """The inverse of :func:`encode_examples`; an absent set is empty."""
    if not blob:
        return []
    try:
        text = zlib.decompress(blob).decode("utf-8")
    except (zlib.error, UnicodeDecodeError) as exc:
        raise DataError(f"registry: a stored example set is corrupt ({exc}); push it again with --replay") from None
    out = []
    for line in text.split("\n"):  # not splitlines(): texts may hold U+2028 and other separators
        if not line:
            continue
        obj = json.loads(line)
        out.append((obj["text"], int(obj["label"])))
    return out


def read_examples(path: str | Path, *, operation: str) -> list[tuple[str, int]]:
    """``[(text, label)]`` of a JSON-lines file of ``{"text", "label"}`` objects (:mod:`ops.datafiles`)."""
    from ops.datafiles import read_examples as read_data

    return [(e.text, e.label) for e in read_data([path], op=operation)]


def split_replay(examples: Sequence[tuple[str, int]], *, replay_max: int, canary_size: int,
                 seed: int = 0) -> tuple[list, list]:
    """A bounded replay sample and a disjoint canary set from the original data (pure).

    The canary set is stratified so that it holds both classes whenever the
    data does; what is left is sampled down to ``replay_max``.
    """
    rng = random.Random(seed)
    by_class = {0: [e for e in examples if e[1] == 0], 1: [e for e in examples if e[1] == 1]}
    canary = []
    if canary_size:
        for label, rows in by_class.items():
            share = len(rows) / max(1, len(examples))
            take = min(len(rows) // 2, max(1, round(canary_size * share))) if rows else 0
            rng.shuffle(rows)
            canary += rows[:take]
            by_class[label] = rows[take:]
    rest = by_class[0] + by_class[1]
    rng.shuffle(rest)
    return rest[:replay_max], canary


class Registry:
    """Model registry on one Redis.

    Parameters
    ----------
    client : redis.Redis (bytes replies).
    keys : the deployment's :class:`Keys`.
    clock : epoch seconds.
    """

    def __init__(self, *, client, keys: Keys, clock=time.time):
        if not isinstance(keys, Keys):
            raise ValueError(f"Registry: bad keys={keys!r}")
        self.client = client
        self.keys = keys
        self.clock = clock

    # -- reads -------------------------------------------------------------------
    def active(self) -> str | None:
        v = self.client.get(self.keys.models_active)
        return _s(v) if v is not None else None

    def history(self) -> list[str]:
        return [_s(v) for v in self.client.lrange(self.keys.models_history, 0, -1)]

    def meta(self, version: str) -> dict[str, str]:
        raw = self.client.hgetall(self.keys.model_meta(version))
        if not raw:
            raise RegistryError(f"models: no version {version!r} in the registry; see `seawall models list`")
        return {_s(k): _s(v) for k, v in raw.items()}

    def versions(self) -> list[dict[str, str]]:
        """Every pushed version's metadata, newest push first, with ``active`` marked."""
        active = self.active()
        out = []
        for v in self.client.zrevrange(self.keys.models_versions, 0, -1):
            version = _s(v)
            raw = self.client.hgetall(self.keys.model_meta(version))
            if raw:
                meta = {_s(k): _s(x) for k, x in raw.items()}
                meta["active"] = "1" if version == active else "0"
                out.append(meta)
        return out

    def blob(self, version: str) -> bytes:
        data = self.client.get(self.keys.model_blob(version))
        if data is None:
            raise RegistryError(f"models: no artifact for version {version!r}; see `seawall models list`")
        return data

    def checked_blob(self, version: str) -> bytes:
        """The artifact bytes, refused when they do not match the sha256 recorded at push."""
        data = self.blob(version)
        expected = self.client.hget(self.keys.model_meta(version), "sha256")
        if expected is not None and hashlib.sha256(data).hexdigest() != _s(expected):
            raise ArtifactError(f"models: artifact {version} does not match its recorded sha256; "
                                "push the model file again")
        return data

    def load(self, version: str | None = None):
        """The model of ``version`` (default: the active one)."""
        version = version or self.active()
        if version is None:
            raise RegistryError("models: no active model; bootstrap with `seawall models push MODEL_FILE` "
                                "then `seawall models promote VERSION`")
        return load_model(self.checked_blob(version))

    def replay(self) -> list[tuple[str, int]]:
        return decode_examples(self.client.get(self.keys.models_replay))

    def canary(self) -> list[tuple[str, int]]:
        return decode_examples(self.client.get(self.keys.models_canary))

    # -- writes ------------------------------------------------------------------
    def push(self, data: bytes, *, source: str = "push", parent: str = "", labels_cursor: str = "0-0",
             pipeline=None) -> str:
        """Store an artifact (validated by loading it) and return its version.

        Pushing the same bytes again is harmless: the version is the content id.
        """
        if not isinstance(data, (bytes, bytearray)) or not data:
            raise RegistryError("models push: the model file is empty")
        model = load_model(bytes(data))
        version = model.version
        thresholds = model.thresholds
        meta = {
            "version": version,
            "sha256": hashlib.sha256(data).hexdigest(),
            "size": str(len(data)),
            "created_at": f"{float(model.created_at):.3f}",
            "pushed_at": f"{self.clock():.3f}",
            "source": source,
            "parent": parent,
            "labels_cursor": labels_cursor,
            **{a.value: f"{float(getattr(thresholds, a)):.6f}" if thresholds is not None else ""
               for a in THRESHOLD_ACTIONS},
        }
        pipe = pipeline if pipeline is not None else self.client.pipeline(transaction=True)
        pipe.set(self.keys.model_blob(version), bytes(data))
        pipe.hset(self.keys.model_meta(version), mapping=meta)
        pipe.zadd(self.keys.models_versions, {version: float(meta["pushed_at"])})
        if pipeline is None:
            pipe.execute()
        return version

    def set_examples(self, *, replay: Sequence[tuple[str, int]] | None = None,
                     canary: Sequence[tuple[str, int]] | None = None, pipeline=None) -> None:
        """Replace the stored replay sample and/or canary set."""
        pipe = pipeline if pipeline is not None else self.client.pipeline(transaction=True)
        for key, rows in ((self.keys.models_replay, replay), (self.keys.models_canary, canary)):
            if rows is None:
                continue
            blob = encode_examples(rows)
            if len(blob) > SETS_MAX_BYTES:
                raise RegistryError(f"models push: the compressed set is {len(blob)} bytes; "
                                    "lower retrain.replay_original or retrain.canary_size")
            pipe.set(key, blob)
        if pipeline is None:
            pipe.execute()

    def _event(self, pipe, kind: str, data: dict) -> None:
        add_event(None, self.keys.events, kind, data, ts=self.clock(), pipeline=pipe)

    def _switch(self, kind: str, choose, *, actor: str, reason: str) -> dict:
        """Run one WATCH/MULTI switch of the active pointer.

        ``choose(active, history)`` returns the new version and whether the
        history head is popped (rollback) or pushed (promote), or raises.
        """
        with self.client.pipeline(transaction=True) as pipe:
            try:
                pipe.watch(self.keys.models_active, self.keys.models_history)
                active = pipe.get(self.keys.models_active)
                active = _s(active) if active is not None else None
                history = [_s(v) for v in pipe.lrange(self.keys.models_history, 0, 1)]
                target, pop = choose(active, history)
                self._verify(pipe, target)
                now = self.clock()
                pipe.multi()
                pipe.set(self.keys.models_active, target)
                if pop:
                    pipe.lpop(self.keys.models_history)  # the head was the active version; the target is next
                else:
                    pipe.lpush(self.keys.models_history, target)
                    pipe.ltrim(self.keys.models_history, 0, HISTORY_MAX - 1)
                pipe.hset(self.keys.model_meta(target), mapping={"promoted_at": f"{now:.3f}"})
                data = {"version": target, "previous": active, "actor": actor, "reason": reason}
                self._event(pipe, kind, data)
                pipe.execute()
            except redis.exceptions.WatchError:
                now_active = self.active()
                raise PromoteConflict(
                    f"models {kind}: another promote or rollback changed the active model at the same time "
                    f"(active is now {now_active}); check `seawall models list` and run {kind} again if still wanted"
                ) from None
        # Told after EXEC, outside the transaction: PUBLISH names no key, so a cluster transaction cannot
        # carry it.  A missed message is covered by the workers' polling of the active pointer.
        self.client.publish(self.keys.models_changed, target)
        return data

    def _verify(self, client, version: str) -> None:
        # Runs between WATCH and MULTI: reads only, so a concurrent switch still aborts us.
        if not client.exists(self.keys.model_blob(version)):
            raise RegistryError(f"models: no artifact for version {version!r}; push it first "
                                "(`seawall models push MODEL_FILE`)")

    def promote(self, version: str, *, expect_active: str | None = None, actor: str = "", reason: str = "") -> dict:
        """Make ``version`` the active model; returns ``{version, previous, ...}``.

        ``expect_active`` (used by retrain) refuses to switch when the active
        model is no longer the one the candidate was trained from.
        """
        if not isinstance(version, str) or not version:
            raise RegistryError("models promote: give a version (see `seawall models list`)")

        def choose(active, history):
            if expect_active is not None and active != expect_active:
                raise PromoteConflict(f"models promote: the active model changed from {expect_active} to {active} "
                                      "while the candidate was built; run the retrain again")
            if active == version:
                raise RegistryError(f"models promote: {version} is already the active model")
            return version, False

        return self._switch("promote", choose, actor=actor, reason=reason)

    def rollback(self, *, actor: str = "", reason: str = "") -> dict:
        """Make the previously promoted version active again (pops the history head)."""

        def choose(active, history):
            if len(history) < 2:
                raise RegistryError("models rollback: there is no earlier promoted version to roll back to")
            if history[0] != active:
                raise RegistryError(f"models rollback: history head {history[0]} is not the active model "
                                    f"{active}; promote the version you want explicitly")
            return history[1], True

        return self._switch("rollback", choose, actor=actor, reason=reason)


class RegistryModelSource:
    """A worker's :class:`worker.loader.ModelSource` backed by the registry.

    ``poll()`` is cheap enough for every loop turn: it drains the
    ``models:changed`` subscription without blocking, and reads the active
    pointer at most every ``poll_interval_s`` as a fallback (a missed message,
    a dropped subscription).  A corrupt or tampered artifact is refused and
    logged once, and the model already serving keeps serving.
    """

    def __init__(self, *, client, keys: Keys, poll_interval_s: float = 2.0, clock=time.monotonic):
        if isinstance(poll_interval_s, bool) or not isinstance(poll_interval_s, (int, float)) or poll_interval_s <= 0:
            raise ValueError(f"RegistryModelSource: bad poll_interval_s={poll_interval_s!r}")
        self.registry = Registry(client=client, keys=keys)
        self.client = client
        self.poll_interval_s = float(poll_interval_s)
        self.clock = clock
        self._model = None
        self._version: str | None = None
        self._refused: set[str] = set()
        self._pubsub = None
        self._next_check = 0.0

    @property
    def version(self) -> str | None:
        return self._version

    @property
    def refused(self) -> frozenset[str]:
        """Versions that became active but failed to load here; each is tried once, the model in hand stays."""
        return frozenset(self._refused)

    def current(self):
        if self._model is None:
            version = self.registry.active()
            if version is None:
                raise RegistryError("serve: no active model in the registry; run `seawall models push MODEL_FILE` "
                                    "and `seawall models promote VERSION`")
            self._model = self.registry.load(version)
            self._version = version
            self._subscribe()
            self._next_check = self.clock() + self.poll_interval_s
        return self._model

    def _subscribe(self) -> None:
        try:
            pubsub = self.client.pubsub(ignore_subscribe_messages=True)
            pubsub.subscribe(self.registry.keys.models_changed)
            self._pubsub = pubsub
        except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError):
            self._pubsub = None  # the polling fallback covers it; retried on the next check

    def _notified(self) -> bool:
        if self._pubsub is None:
            return False
        seen = False
        try:
            for _ in range(100):
                message = self._pubsub.get_message(timeout=0)
                if message is None:
                    break
                if message.get("type") == "message":
                    seen = True
        except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError):
            self._drop_pubsub()
            return True  # we may have missed a message: check the pointer now
        return seen

    def _drop_pubsub(self) -> None:
        pubsub, self._pubsub = self._pubsub, None
        if pubsub is not None:
            try:
                pubsub.close()
            except (redis.exceptions.ConnectionError, OSError):
                pass

    def poll(self):
        if self._model is None:
            self.current()
            return self._model
        now = self.clock()
        notified = self._notified()
        if not notified and now < self._next_check:
            return None
        self._next_check = now + self.poll_interval_s
        if self._pubsub is None:
            self._subscribe()
        version = self.registry.active()
        if version is None or version == self._version or version in self._refused:
            return None
        try:
            model = self.registry.load(version)
        except (ArtifactError, RegistryError) as exc:
            self._refused.add(version)
            log.error("model reload: refused version %s (%s); still serving %s", version, exc, self._version)
            return None
        self._model, self._version = model, version
        log.info("model reload: now serving %s", version)
        return model

    def close(self) -> None:
        self._drop_pubsub()
