"""Invented data and small models for the registry and retrain tests.

Comments come from the demo's invented forum (ops/lab/scenario.py); the models
are small EmbeddingClassifiers trained on its pre-stream training set.
"""
from __future__ import annotations

import itertools
import json
from functools import lru_cache

from model.classifier import EmbeddingClassifier
from ops.lab.scenario import Scenario
from worker.settings import Keys

KEYS = Keys()
MODERATORS = ("mod-ana", "mod-bo", "mod-cy")


@lru_cache(maxsize=1)
def training_set():
    return tuple(Scenario(seed=7).training_set(1500))


@lru_cache(maxsize=1)
def stream(n: int = 4000):
    # The campaign starts ten minutes in, so both the feedback window and the test window hold some.
    return tuple(itertools.islice(Scenario(seed=7, wave_start_s=600.0).stream(), n))


@lru_cache(maxsize=4)
def model_bytes(seed: int = 0, n: int = 1500) -> bytes:
    rows = training_set()[:n]
    return EmbeddingClassifier(seed=seed).fit([c.text for c in rows], [c.label for c in rows]).to_bytes()


def write_jsonl(path, rows) -> str:
    with open(path, "w", encoding="utf-8") as fh:
        for text, label in rows:
            fh.write(json.dumps({"text": text, "label": "spam" if label else "ham"}) + "\n")
    return str(path)


def send_feedback(client, comments, *, moderators=MODERATORS, flip=False, with_text=True):
    """XADD one feedback entry per comment, moderators taking turns."""
    pipe = client.pipeline(transaction=False)
    for i, c in enumerate(comments):
        label = c.label ^ 1 if flip else c.label
        fields = {"id": c.id, "label": "spam" if label else "ham", "moderator": moderators[i % len(moderators)]}
        if with_text:
            fields["text"] = c.text
        pipe.xadd(KEYS.feedback, fields)
    pipe.execute()


def bootstrap(client) -> tuple:
    """Push + promote the first model with its replay sample and canary set."""
    from ops.registry import Registry, split_replay

    registry = Registry(client=client, keys=KEYS)
    replay, canary = split_replay([(c.text, c.label) for c in training_set()], replay_max=2000, canary_size=300)
    version = registry.push(model_bytes(0))
    registry.set_examples(replay=replay, canary=canary)
    registry.promote(version)
    return registry, version
