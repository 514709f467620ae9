"""A small deterministic stand-in for the model, with the methods the worker uses.

It scores a text by the share of its words found in a fixed list of spam
words, so a test can predict every action.  It implements the contract's
``score_many``, ``thresholds``, ``version`` and ``created_at``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SPAM_WORDS = frozenset({"casino", "prize", "winner", "crypto", "pills", "bonus", "click", "free"})


@dataclass(frozen=True)
class StandInThresholds:
    hold: float = 0.2
    reject: float = 0.5


class WordScorer:
    """score = spam words / words (0 for an empty text)."""

    def __init__(self, *, version: str = "standin0001", thresholds=StandInThresholds(), created_at: float = 1_700_000_000.0,
                 fail_on: str | None = None):
        self.version = version
        self.thresholds = thresholds
        self.created_at = created_at
        self.fail_on = fail_on
        self.calls = 0

    def score_many(self, texts, *, top_k: int = 5, spamward_from=None):
        self.calls += 1
        scores, reasons = [], []
        for text in texts:
            if self.fail_on is not None and self.fail_on in text:
                raise RuntimeError("stand-in scorer told to fail")
            words = text.lower().split()
            hits = [w for w in words if w in SPAM_WORDS]
            scores.append(len(hits) / len(words) if words else 0.0)
            reasons.append([(w, 1.0 / len(words)) for w in hits[:top_k]])
        return np.asarray(scores, dtype=float), reasons
