"""Hold and reject thresholds chosen to target false-positive rates.

A moderator's cost is asymmetric: a rejected ham is a silenced reader, a held
ham is a delay.  So the thresholds are set on held-out *ham* scores: the
reject threshold lets at most ``reject_fpr`` of ham through to reject, the
hold threshold at most ``hold_fpr`` of ham into hold-or-reject.  Defaults:
reject <= 0.1 % of ham, hold <= 2 % of ham.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from model.errors import DataError

ACTIONS = ("publish", "hold", "reject")
DEFAULT_REJECT_FPR = 0.001
DEFAULT_HOLD_FPR = 0.02


def _check_threshold(name: str, value: float) -> float:
    value = float(value)
    if not (math.isfinite(value) and 0.0 <= value <= 1.0):
        raise ValueError(f"Thresholds: {name} must be a probability in [0, 1], got {value!r}")
    return value


@dataclass(frozen=True)
class Thresholds:
    """Scores at or above ``reject`` are rejected, at or above ``hold`` held.

    Examples
    --------
    >>> t = Thresholds(hold=0.6, reject=0.95)
    >>> [t.action(s) for s in (0.1, 0.7, 0.99)]
    ['publish', 'hold', 'reject']
    >>> t.with_overrides(reject=0.9).reject
    0.9
    """

    hold: float
    reject: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "hold", _check_threshold("hold", self.hold))
        object.__setattr__(self, "reject", _check_threshold("reject", self.reject))
        if self.hold > self.reject:
            raise ValueError(f"Thresholds: hold ({self.hold!r}) must not exceed reject ({self.reject!r})")

    def with_overrides(self, hold: float | None = None, reject: float | None = None) -> "Thresholds":
        """A copy with the given thresholds replaced (``None`` keeps the stored one)."""
        return replace(
            self,
            hold=self.hold if hold is None else hold,
            reject=self.reject if reject is None else reject,
        )

    def action(self, score: float) -> str:
        """``publish``, ``hold`` or ``reject`` for one score."""
        if score >= self.reject:
            return "reject"
        if score >= self.hold:
            return "hold"
        return "publish"

    def actions(self, scores: np.ndarray) -> list[str]:
        """:meth:`action` for many scores."""
        scores = np.asarray(scores, dtype=np.float64)
        codes = (scores >= self.hold).astype(np.int8) + (scores >= self.reject).astype(np.int8)
        return [ACTIONS[c] for c in codes]

    def to_dict(self) -> dict:
        return {"hold": self.hold, "reject": self.reject}

    @classmethod
    def from_dict(cls, data: dict) -> "Thresholds":
        return cls(hold=data["hold"], reject=data["reject"])


#: Used before any calibration, and where held-out data are too small to resolve a target rate.
DEFAULT_THRESHOLDS = Thresholds(hold=0.5, reject=0.9)


def threshold_for_fpr(ham_scores: np.ndarray, fpr: float) -> float:
    """The lowest threshold that flags at most ``fpr`` of ``ham_scores``.

    A ham is flagged when its score is ``>= threshold``.  With ``k =
    floor(fpr * n)`` hams allowed, the threshold sits just above the
    ``(k+1)``-th highest ham score, so ties never push the rate over.
    """
    if not 0.0 <= fpr < 1.0:
        raise ValueError(f"threshold_for_fpr: fpr must be in [0, 1), got {fpr!r}")
    ham = np.sort(np.asarray(ham_scores, dtype=np.float64))[::-1]
    if ham.size == 0:
        raise ValueError("threshold_for_fpr: needs at least one ham score")
    allowed = int(math.floor(fpr * ham.size + 1e-9))
    if allowed >= ham.size:
        return 0.0
    return float(min(1.0, np.nextafter(ham[allowed], np.inf)))


def calibrate(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    reject_fpr: float = DEFAULT_REJECT_FPR,
    hold_fpr: float = DEFAULT_HOLD_FPR,
    fallback: "Thresholds | None" = None,
) -> Thresholds:
    """Thresholds from held-out scores and labels (1 = spam, 0 = ham).

    Parameters
    ----------
    scores : np.ndarray (n,), spam probabilities on data the model did not train on.
    labels : np.ndarray (n,), 0/1.
    reject_fpr, hold_fpr : the largest share of ham allowed to be rejected,
        and held or rejected.  ``reject_fpr`` must not exceed ``hold_fpr``.
    fallback : thresholds to fall back on where the data hold fewer than
        ``1 / fpr`` hams (see :func:`resolvable`): the threshold is then the
        larger of "above every ham seen" and the fallback.  Default
        :data:`DEFAULT_THRESHOLDS` (hold 0.5, reject 0.9).

    Returns
    -------
    Thresholds
    """
    fallback = DEFAULT_THRESHOLDS if fallback is None else fallback
    scores = np.asarray(scores, dtype=np.float64)
    labels = np.asarray(labels)
    if scores.shape != labels.shape:
        raise ValueError(f"calibrate: scores {scores.shape} and labels {labels.shape} differ in shape")
    if reject_fpr > hold_fpr:
        raise ValueError(f"calibrate: reject_fpr ({reject_fpr!r}) must not exceed hold_fpr ({hold_fpr!r})")
    ham = scores[labels == 0]
    if ham.size == 0:
        raise DataError("calibrate: the held-out data has no ham; give it labelled ham, the thresholds target ham false-positive rates")
    reject = _resolved(ham, reject_fpr, fallback.reject)
    hold = min(_resolved(ham, hold_fpr, fallback.hold), reject)
    return Thresholds(hold=hold, reject=reject)


def resolvable(n_ham: int, fpr: float) -> bool:
    """Whether ``n_ham`` held-out hams can measure a false-positive rate of ``fpr``.

    Below ``1 / fpr`` hams not one ham may be flagged, so the threshold is
    merely "above the highest ham seen": an optimistic, high-variance estimate.
    """
    return fpr > 0 and n_ham * fpr >= 1.0 - 1e-9


def _resolved(ham: np.ndarray, fpr: float, fallback: float) -> float:
    threshold = threshold_for_fpr(ham, fpr)
    if resolvable(ham.size, fpr):
        return threshold
    # Too few hams to measure this rate: never go below the fallback threshold.
    return max(threshold, fallback)
