"""Scores that mean probabilities, and hold / reject thresholds with floors.

Two steps, both fitted on held-out labelled data the model did not train on:

1. **Probability calibration** (:class:`ProbabilityMap`).  The network's raw
   log-odds are trained with balanced class weights and stop early, so its
   sigmoid is a ranking, not a probability.  A map from raw log-odds to a
   spam probability is fitted on held-out data: temperature scaling (the
   default; Guo et al. 2017: ``p = sigmoid(z / T)``, fitted to Platt's
   smoothed targets), Platt scaling (Platt 1999: a logistic fit ``p =
   sigmoid(a·z + b)`` to the same targets, as scikit-learn's
   ``CalibratedClassifierCV(method="sigmoid")`` does) or isotonic regression
   (pool adjacent violators, clipped to the smoothed targets).  Temperature is
   the default because it held up best off the model's home ground: Platt's
   intercept learns the held-out spam share, and the share of spam in
   moderators' labels is not the share in the stream (``seawall bench
   calibration`` and README, "The model", give the figures).
2. **Thresholds** (:func:`choose_thresholds`).  A moderator's cost is
   asymmetric: a rejected ham is a silenced reader, a held ham a delay.  So
   each threshold is set on held-out *ham*: reject lets at most
   ``reject_fpr`` of ham through to reject, hold at most ``hold_fpr`` of ham
   into hold-or-reject (defaults 0.1 % and 2 %).  On held-out data the model
   separates well, that target alone drives a threshold towards 0 (every ham
   scores low), and ham unlike the training data then lands above it.  So
   each threshold is the **stricter (higher)** of its target and a
   probability floor (defaults: hold >= 0.5, reject >= 0.9).

The held-out ham scores are kept with the model (:class:`HeldOutHam`, the
upper tail only), so a deployment may set other targets and floors, globally
or per site, and get thresholds measured on the same data.
"""
from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field, replace

import numpy as np

from model.actions import THRESHOLD_ACTIONS, Action
from model.errors import DataError
from model.network import sigmoid, sigmoid_one  # the scoring paths' own logistic: numpy only, fast on a few values

DEFAULT_REJECT_FPR = 0.001
DEFAULT_HOLD_FPR = 0.02
DEFAULT_HOLD_FLOOR = 0.5
DEFAULT_REJECT_FLOOR = 0.9
#: The highest false-positive-rate target a threshold may aim at.
MAX_TARGET_FPR = 0.5
METHODS = ("identity", "platt", "temperature", "isotonic")
DEFAULT_METHOD = "temperature"


def _expit(z):
    """The logistic sigmoid, scipy's (imported here: readers of thresholds, such as ``seawall watch``, need no scipy)."""
    from scipy.special import expit

    return expit(z)


def _check_threshold(name: str, value: float) -> float:
    try:
        number = float(value) if not isinstance(value, (bool, str, bytes)) else math.nan
    except (TypeError, ValueError):
        number = math.nan
    if not (math.isfinite(number) and 0.0 <= number <= 1.0):
        raise ValueError(f"thresholds: {name} must be a probability in [0, 1], got {value!r}")
    return number


@dataclass(frozen=True)
class Thresholds:
    """Scores at or above ``reject`` are rejected, at or above ``hold`` held.

    The one thresholds type: a model's stored thresholds, a router's effective
    cutoffs for a site.  Which action a score gets is the router's to say
    (:class:`worker.routing.Router`).

    Examples
    --------
    >>> t = Thresholds(hold=0.6, reject=0.95)
    >>> t.with_overrides(reject=0.9).reject
    0.9
    """

    hold: float
    reject: float

    def __post_init__(self) -> None:
        for name in (a.value for a in THRESHOLD_ACTIONS):
            object.__setattr__(self, name, _check_threshold(name, getattr(self, name)))
        if self.hold > self.reject:
            raise ValueError(f"thresholds: hold ({self.hold!r}) must not exceed reject ({self.reject!r})")

    def with_overrides(self, hold: float | None = None, reject: float | None = None) -> "Thresholds":
        """A copy with the given thresholds replaced (``None`` keeps the stored one)."""
        return replace(
            self,
            hold=self.hold if hold is None else hold,
            reject=self.reject if reject is None else reject,
        )

    def to_dict(self) -> dict[str, float]:
        """Each threshold under the name of the action it leads to (``THRESHOLD_ACTIONS``: hold, reject)."""
        return {a.value: getattr(self, a) for a in THRESHOLD_ACTIONS}

    @classmethod
    def from_dict(cls, data: dict) -> "Thresholds":
        return cls(**{a.value: data[a] for a in THRESHOLD_ACTIONS})


#: The probability floors; also the thresholds of a model with no held-out data.
DEFAULT_THRESHOLDS = Thresholds(hold=DEFAULT_HOLD_FLOOR, reject=DEFAULT_REJECT_FLOOR)


# --- probability calibration ---------------------------------------------------

@dataclass(frozen=True)
class ProbabilityMap:
    """Raw model log-odds ``z`` -> calibrated spam probability.

    ``identity`` is ``sigmoid(z)``; ``platt`` and ``temperature`` are
    ``sigmoid(slope·z + intercept)`` (temperature: intercept 0, slope 1/T);
    ``isotonic`` interpolates the fitted steps ``(knots_z, knots_p)``.

    Examples
    --------
    >>> m = ProbabilityMap(method="platt", slope=0.5, intercept=-1.0)
    >>> float(m.probability(np.array([2.0]))[0])
    0.5
    >>> ProbabilityMap.from_dict(m.to_dict()) == m
    True
    """

    method: str = "identity"
    slope: float = 1.0
    intercept: float = 0.0
    knots_z: tuple[float, ...] = ()
    knots_p: tuple[float, ...] = ()
    n_ham: int = 0
    n_spam: int = 0

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"ProbabilityMap: method must be one of {METHODS}, got {self.method!r}")
        if not (math.isfinite(self.slope) and self.slope > 0 and math.isfinite(self.intercept)):
            raise ValueError(f"ProbabilityMap: slope must be > 0 and finite, intercept finite; got "
                             f"{self.slope!r}, {self.intercept!r}")
        if self.method == "isotonic" and (len(self.knots_z) < 1 or len(self.knots_z) != len(self.knots_p)):
            raise ValueError("ProbabilityMap: isotonic needs as many knots_p as knots_z (at least one)")

    @property
    def contribution_scale(self) -> float:
        """Factor that turns a raw log-odds contribution into a calibrated one.

        Exact for the affine maps (their calibrated log-odds are ``slope·z +
        intercept``); 1 for ``isotonic``, whose explanations stay in the
        model's raw log-odds.
        """
        return self.slope if self.method in ("platt", "temperature") else 1.0

    @property
    def calibrated_intercept(self) -> float:
        """What the affine map adds to ``slope·z`` (0 for identity and isotonic)."""
        return self.intercept if self.method == "platt" else 0.0

    def probability(self, logits) -> np.ndarray:
        """Calibrated spam probabilities, float64, for raw log-odds ``logits`` (an array, or a list of floats)."""
        if type(logits) is list and len(logits) == 1 or type(logits) is np.ndarray and logits.shape == (1,):
            return np.array([self.probability_one(float(logits[0]))])  # one comment: plain floats, the same value
        z = np.asarray(logits, dtype=np.float64)
        if self.method == "identity":
            return sigmoid(z)
        if self.method == "isotonic":
            return np.interp(z, self.knots_z, self.knots_p)
        return sigmoid(self.slope * z + self.intercept)

    def probability_one(self, logit: float) -> float:
        """:meth:`probability` of one raw log-odds value, in plain float arithmetic (the same result).

        Examples
        --------
        >>> m = ProbabilityMap(method="platt", slope=2.0, intercept=-1.0)
        >>> m.probability_one(0.75) == float(m.probability(np.array([0.75, 0.0]))[0])
        True
        """
        if self.method == "identity":
            return sigmoid_one(logit)
        if self.method == "isotonic":
            return float(np.interp(logit, self.knots_z, self.knots_p))
        return sigmoid_one(self.slope * logit + self.intercept)

    def to_dict(self) -> dict:
        out = {"method": self.method, "slope": self.slope, "intercept": self.intercept,
               "n_ham": self.n_ham, "n_spam": self.n_spam}
        if self.method == "isotonic":
            out.update(knots_z=list(self.knots_z), knots_p=list(self.knots_p))
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "ProbabilityMap":
        return cls(method=data["method"], slope=float(data["slope"]), intercept=float(data["intercept"]),
                   knots_z=tuple(float(x) for x in data.get("knots_z", ())),
                   knots_p=tuple(float(x) for x in data.get("knots_p", ())),
                   n_ham=int(data.get("n_ham", 0)), n_spam=int(data.get("n_spam", 0)))


IDENTITY = ProbabilityMap()


def _platt_targets(y: np.ndarray) -> tuple[np.ndarray, int, int]:
    # Platt (1999), section 2.2: fit to (N+ + 1) / (N+ + 2) and 1 / (N- + 2) instead of 1 and 0,
    # so that a separable held-out set cannot send the fitted slope to infinity.
    n_spam = int(np.count_nonzero(y > 0))
    n_ham = int(y.size - n_spam)
    return np.where(y > 0, (n_spam + 1.0) / (n_spam + 2.0), 1.0 / (n_ham + 2.0)), n_ham, n_spam


def _log_loss(r: np.ndarray, t: np.ndarray) -> float:
    """Cross-entropy of targets ``t`` against ``sigmoid(r)``, summed (stable for any ``r``)."""
    return float(np.sum(np.logaddexp(0.0, r) - t * r))


def _fit_platt(z: np.ndarray, t: np.ndarray, n_ham: int, n_spam: int) -> tuple[float, float]:
    from scipy.optimize import minimize

    # Large log-odds are rescaled for the optimiser and the slope scaled back (a logistic fit
    # without penalty is invariant to that), as scikit-learn's sigmoid calibration does.
    scale = max(1.0, float(np.max(np.abs(z)))) if z.size else 1.0
    scale = scale if scale >= 30.0 else 1.0
    f = z / scale

    def loss_grad(ab):
        r = ab[0] * f + ab[1]
        g = _expit(r) - t
        return _log_loss(r, t), np.array([g @ f, g.sum()])

    start = np.array([0.0, math.log((n_spam + 1.0) / (n_ham + 1.0))])
    result = minimize(loss_grad, start, method="L-BFGS-B", jac=True,
                      options={"gtol": 1e-6, "ftol": 64 * np.finfo(float).eps})
    return float(result.x[0]) / scale, float(result.x[1])


def _fit_temperature(z: np.ndarray, t: np.ndarray) -> float:
    from scipy.optimize import minimize_scalar

    result = minimize_scalar(lambda lb: _log_loss(math.exp(lb) * z, t), bounds=(-7.0, 7.0), method="bounded",
                             options={"xatol": 1e-8})
    return math.exp(float(result.x))


def _pool_adjacent_violators(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """The non-decreasing sequence closest to ``y`` in weighted squared error (Ayer et al. 1955)."""
    values: list[float] = []
    weights: list[float] = []
    sizes: list[int] = []
    for v, wt in zip(y.tolist(), w.tolist()):
        values.append(v)
        weights.append(wt)
        sizes.append(1)
        while len(values) > 1 and values[-2] > values[-1]:
            total = weights[-2] + weights[-1]
            values[-2] = (values[-2] * weights[-2] + values[-1] * weights[-1]) / total
            weights[-2] = total
            sizes[-2] += sizes[-1]
            del values[-1], weights[-1], sizes[-1]
    return np.repeat(values, sizes)


def _fit_isotonic(z: np.ndarray, y: np.ndarray, low: float, high: float) -> tuple[tuple, tuple]:
    # Equal log-odds form one point (their mean label, weighted by their count).
    zs, inverse, counts = np.unique(z, return_inverse=True, return_counts=True)
    means = np.bincount(inverse, weights=y, minlength=zs.size) / counts
    fitted = np.clip(_pool_adjacent_violators(means, counts.astype(np.float64)), low, high)
    # Keep the ends of each flat step: interpolation between them reproduces the fit.
    keep = np.ones(zs.size, dtype=bool)
    if zs.size > 2:
        keep[1:-1] = ~((fitted[1:-1] == fitted[:-2]) & (fitted[1:-1] == fitted[2:]))
    return tuple(zs[keep].tolist()), tuple(fitted[keep].tolist())


def fit_probability_map(logits, labels, method: str = DEFAULT_METHOD) -> ProbabilityMap:
    """Fit a :class:`ProbabilityMap` to held-out raw log-odds and 0/1 labels (1 = spam).

    Parameters
    ----------
    logits : array-like (n,), the model's raw log-odds on data it did not train on.
    labels : array-like (n,), 0/1.
    method : ``"temperature"`` (default), ``"platt"``, ``"isotonic"`` or ``"identity"``.

    Raises
    ------
    DataError
        When a class is missing, or the fitted map would not rise with the
        score (the model ranks this held-out spam below its ham).
    ValueError
        On an unknown method or mismatched shapes.

    Examples
    --------
    >>> z = np.array([-4.0, -3.0, -2.5, -1.0, 1.5, 3.0, 4.0, 5.0])
    >>> y = np.array([0, 0, 0, 0, 1, 1, 1, 1])
    >>> m = fit_probability_map(z, y, "platt")
    >>> m.method, bool(m.slope > 0), bool(m.probability(np.array([5.0]))[0] > 0.5)
    ('platt', True, True)
    """
    if method not in METHODS:
        raise ValueError(f"fit_probability_map: method must be one of {METHODS}, got {method!r}")
    z = np.asarray(logits, dtype=np.float64).ravel()
    y = np.asarray(labels).ravel()
    if z.shape != y.shape:
        raise ValueError(f"fit_probability_map: {z.size} log-odds but {y.size} labels")
    if not np.all(np.isfinite(z)):
        raise ValueError("fit_probability_map: log-odds must be finite")
    t, n_ham, n_spam = _platt_targets(y)
    if n_ham == 0 or n_spam == 0:
        raise DataError("calibrate: the held-out data need both spam and ham to fit the probability map")
    if method == "identity":
        return ProbabilityMap(n_ham=n_ham, n_spam=n_spam)
    if method == "isotonic":
        zk, pk = _fit_isotonic(z, (y > 0).astype(np.float64), float(t.min()), float(t.max()))
        return ProbabilityMap(method="isotonic", knots_z=zk, knots_p=pk, n_ham=n_ham, n_spam=n_spam)
    if method == "temperature":
        slope, intercept = _fit_temperature(z, t), 0.0
    else:
        slope, intercept = _fit_platt(z, t, n_ham, n_spam)
    if not slope > 0:
        raise DataError(f"calibrate: the held-out spam does not score above the ham (fitted slope {slope:.3g}); "
                        "the model cannot be calibrated on these data")
    return ProbabilityMap(method=method, slope=slope, intercept=intercept, n_ham=n_ham, n_spam=n_spam)


# --- thresholds ----------------------------------------------------------------

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


def resolvable(n_ham: int, fpr: float) -> bool:
    """Whether ``n_ham`` held-out hams can measure a false-positive rate of ``fpr``.

    Below ``1 / fpr`` hams not one ham may be flagged, so the threshold is
    merely "above the highest ham seen": an optimistic, high-variance estimate.
    """
    return fpr > 0 and n_ham * fpr >= 1.0 - 1e-9


#: Ranks of the held-out ham kept exactly; further ranks are kept on a geometric grid.
_EXACT_RANKS = 1024
_GRID_RANKS = 1024


def _round_up(x: float) -> float:
    return min(1.0, math.ceil(x * 1e6) / 1e6)


@dataclass(frozen=True)
class HeldOutHam:
    """The upper tail of the calibrated held-out ham scores, which every target is measured on.

    ``scores[i]`` is the ham score of rank ``ranks[i]`` (0 = the highest),
    rounded *up* to 6 decimals.  Ranks up to ``floor(MAX_TARGET_FPR · n)``
    are covered: the first 1,024 exactly, the rest on a geometric grid, where
    a target between two kept ranks uses the higher-scoring one (never more
    ham flagged than the target allows).

    Examples
    --------
    >>> ham = HeldOutHam.from_scores(np.linspace(0.0, 0.5, 1000))
    >>> ham.n, round(ham.threshold_for(0.02), 4)
    (1000, 0.49)
    """

    n: int
    ranks: tuple[int, ...] = field(default=())
    scores: tuple[float, ...] = field(default=())

    def __post_init__(self) -> None:
        if self.n < 1 or len(self.ranks) != len(self.scores) or not self.ranks or self.ranks[0] != 0:
            raise ValueError("HeldOutHam: needs n >= 1 and matching ranks and scores starting at rank 0")

    @classmethod
    def from_scores(cls, ham_scores) -> "HeldOutHam":
        ham = np.sort(np.asarray(ham_scores, dtype=np.float64))[::-1]
        if ham.size == 0:
            raise DataError("calibrate: the held-out data has no ham; give it labelled ham, "
                            "the thresholds target ham false-positive rates")
        last = min(ham.size - 1, int(math.floor(MAX_TARGET_FPR * ham.size + 1e-9)))
        ranks = np.arange(min(last, _EXACT_RANKS - 1) + 1)
        if last >= _EXACT_RANKS:
            grid = np.geomspace(_EXACT_RANKS, last, _GRID_RANKS).round().astype(np.int64)
            ranks = np.unique(np.concatenate([ranks, grid, [last]]))
        return cls(n=int(ham.size), ranks=tuple(int(r) for r in ranks),
                   scores=tuple(_round_up(float(s)) for s in ham[ranks]))

    def threshold_for(self, fpr: float) -> float:
        """The lowest threshold that flags at most ``fpr`` of these hams (see :func:`threshold_for_fpr`)."""
        if not 0.0 < fpr <= MAX_TARGET_FPR:
            raise ValueError(f"HeldOutHam: a target rate must be in (0, {MAX_TARGET_FPR}], got {fpr!r}")
        allowed = int(math.floor(fpr * self.n + 1e-9))
        if allowed >= self.n:
            return 0.0
        i = bisect.bisect_right(self.ranks, allowed) - 1
        return float(min(1.0, np.nextafter(self.scores[i], np.inf)))

    def measurable(self, fpr: float) -> bool:
        return resolvable(self.n, fpr)

    def to_dict(self) -> dict:
        return {"n": self.n, "ranks": list(self.ranks), "scores": list(self.scores)}

    @classmethod
    def from_dict(cls, data: dict) -> "HeldOutHam":
        return cls(n=int(data["n"]), ranks=tuple(int(r) for r in data["ranks"]),
                   scores=tuple(float(s) for s in data["scores"]))


def _check_rate(name: str, value) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 < value <= MAX_TARGET_FPR:
        raise ValueError(f"ThresholdTargets: {name} must be a rate in (0, {MAX_TARGET_FPR}], got {value!r}")


def _check_floor(name: str, value) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 <= value <= 1.0:
        raise ValueError(f"ThresholdTargets: {name} must be a probability in [0, 1], got {value!r}")


@dataclass(frozen=True)
class ThresholdTargets:
    """What the hold and reject thresholds aim at: a ham false-positive rate each, and a floor each."""

    hold_fpr: float = DEFAULT_HOLD_FPR
    reject_fpr: float = DEFAULT_REJECT_FPR
    hold_floor: float = DEFAULT_HOLD_FLOOR
    reject_floor: float = DEFAULT_REJECT_FLOOR

    def __post_init__(self) -> None:
        _check_rate("hold_fpr", self.hold_fpr)
        _check_rate("reject_fpr", self.reject_fpr)
        _check_floor("hold_floor", self.hold_floor)
        _check_floor("reject_floor", self.reject_floor)
        if self.reject_fpr > self.hold_fpr:
            raise ValueError(f"ThresholdTargets: reject_fpr ({self.reject_fpr!r}) must not exceed "
                             f"hold_fpr ({self.hold_fpr!r})")
        if self.hold_floor > self.reject_floor:
            raise ValueError(f"ThresholdTargets: hold_floor ({self.hold_floor!r}) must not exceed "
                             f"reject_floor ({self.reject_floor!r})")


DEFAULT_TARGETS = ThresholdTargets()


@dataclass(frozen=True)
class Cutoff:
    """One threshold and how it was chosen.

    ``from_target`` is what the false-positive-rate target alone gives
    (``None`` for a model that kept no held-out ham: its stored threshold
    stands in); ``value`` is the higher of it and ``floor``.
    """

    name: str
    value: float
    target_fpr: float
    from_target: float | None
    floor: float
    measurable: bool

    @property
    def at_floor(self) -> bool:
        return self.from_target is not None and self.floor >= self.from_target


@dataclass(frozen=True)
class ThresholdChoice:
    """The hold and reject :class:`Cutoff` of one model under one set of targets."""

    hold: Cutoff
    reject: Cutoff
    n_ham: int | None

    @property
    def thresholds(self) -> Thresholds:
        return Thresholds(hold=self.hold.value, reject=self.reject.value)

    def warnings(self) -> list[str]:
        """What an operator should know before trusting these thresholds (empty when nothing)."""
        out = []
        if self.n_ham is None:
            out.append("the model kept no held-out ham scores (an older model file, or no held-out data): "
                       "its stored thresholds stand in for the false-positive-rate targets; retrain to measure them")
        for c in (self.hold, self.reject):
            if self.n_ham is not None and not c.measurable:
                where = (f"it sits at its floor {c.floor:.4f}" if c.at_floor else
                         f"the target alone puts it just above every held-out ham, at {c.value:.4f}")
                out.append(f"{c.name} threshold: {self.n_ham} held-out hams are too few to measure a "
                           f"{c.target_fpr:.2%} false-positive rate (that needs "
                           f"{math.ceil(1 / c.target_fpr - 1e-9)}); {where}")
            elif c.at_floor:
                out.append(f"{c.name} threshold sits at its floor {c.floor:.4f}: the {c.target_fpr:.2%} "
                           f"false-positive-rate target alone would put it at {c.from_target:.4f} (held-out spam and "
                           f"ham barely overlap); comments unlike the training data are judged by the floor")
        return out

    def to_dict(self) -> dict:
        return {"n_ham": self.n_ham, **{c.name: {"value": c.value, "target_fpr": c.target_fpr,
                                                 "from_target": c.from_target, "floor": c.floor,
                                                 "measurable": c.measurable, "at_floor": c.at_floor}
                                        for c in (self.hold, self.reject)}}


def choose_thresholds(ham: HeldOutHam | None, targets: ThresholdTargets = DEFAULT_TARGETS, *,
                      stored: Thresholds | None = None) -> ThresholdChoice:
    """Hold and reject thresholds: the stricter of each false-positive-rate target and its floor.

    Parameters
    ----------
    ham : the model's held-out ham tail; ``None`` for a model without one,
        whose ``stored`` thresholds then stand in for the targets.
    targets : rates and floors (global or one site's).
    stored : the model's own thresholds (used only when ``ham`` is ``None``).

    Examples
    --------
    >>> ham = HeldOutHam.from_scores(np.linspace(0.0, 0.05, 500))  # a well separated model
    >>> t = choose_thresholds(ham).thresholds
    >>> t.hold, t.reject
    (0.5, 0.9)
    """
    def one(name: str, fpr: float, floor: float, fallback: float) -> Cutoff:
        if ham is None:
            return Cutoff(name, max(fallback, floor), fpr, None, floor, False)
        from_target = ham.threshold_for(fpr)
        return Cutoff(name, max(from_target, floor), fpr, from_target, floor, ham.measurable(fpr))

    stored = DEFAULT_THRESHOLDS if stored is None else stored
    hold = one(Action.HOLD.value, targets.hold_fpr, targets.hold_floor, stored.hold)
    reject = one(Action.REJECT.value, targets.reject_fpr, targets.reject_floor, stored.reject)
    if hold.value > reject.value:  # only with stored thresholds under crossed floors
        hold = replace(hold, value=reject.value)
    return ThresholdChoice(hold, reject, None if ham is None else ham.n)


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
    fallback : the floors (default :data:`DEFAULT_THRESHOLDS`: hold 0.5,
        reject 0.9); each threshold is the higher of its target's and its floor.

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
    targets = ThresholdTargets(hold_fpr=hold_fpr, reject_fpr=reject_fpr,
                               hold_floor=fallback.hold, reject_floor=fallback.reject)
    return choose_thresholds(HeldOutHam.from_scores(scores[labels == 0]), targets).thresholds
