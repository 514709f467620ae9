"""Tabular CUSUM (Page 1954) on standardized observations: pure numpy, no I/O.

The wave detector feeds one standardized observation per site per minute,

    z_t = (p_t - p0) / sqrt(p0 (1 - p0) / n_t),

the flagged share ``p_t`` of the minute's ``n_t`` comments against the site's
normal share ``p0``, and runs the *upper* one-sided statistic

    C_t = max(0, C_{t-1} + z_t - k),     alarm when C_t > h.

Defaults k = 0.5 and h = 5 (in standard deviations) are the textbook choice
(Montgomery, *Introduction to Statistical Quality Control*, sec. 9.1, from
memory): k = 0.5 is tuned to detect a 1-sigma shift fastest; with h = 5 the
*two-sided* chart's in-control average run length (ARL0) is about 465
observations and the one-sided upper chart's about twice that (~930 minutes,
i.e. roughly one false wave per 15 quiet hours per site), while a 1-sigma shift
is caught in about 10 minutes and a 3-sigma shift in about 2.  ``tests/
test_cusum.py`` checks these run lengths by simulation.

:func:`run_lengths` simulates many charts at once (vectorised) for that check.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np


@dataclass(frozen=True)
class CusumParams:
    """Reference value ``k`` and decision interval ``h``, both in standard deviations."""

    k: float = 0.5
    h: float = 5.0

    def __post_init__(self):
        for name in ("k", "h"):
            value = getattr(self, name)
            if not isinstance(value, (int, float)) or not np.isfinite(value) or value < 0:
                raise ValueError(f"CusumParams: {name} must be a finite number >= 0, got {value!r}")
        if self.h == 0:
            raise ValueError(f"CusumParams: h must be > 0, got {self.h!r}")


def upper_step(c: float, z: float, params: CusumParams) -> float:
    """One step of the upper statistic: ``max(0, c + z - k)``."""
    return max(0.0, float(c) + float(z) - params.k)


def standardize(flagged: int, total: int, p0: float) -> float:
    """The minute's flagged share as a z-score under the binomial model at ``p0``."""
    if total <= 0:
        raise ValueError(f"standardize: total must be > 0, got {total!r}")
    if not 0.0 < p0 < 1.0:
        raise ValueError(f"standardize: p0 must be in (0, 1), got {p0!r}")
    return (flagged / total - p0) / np.sqrt(p0 * (1.0 - p0) / total)


def run_lengths(
    params: CusumParams,
    *,
    shift: float = 0.0,
    charts: int = 10_000,
    two_sided: bool = False,
    max_steps: int = 100_000,
    seed: int = 0,
) -> np.ndarray:
    """Simulated run lengths (observations until the first alarm) of many charts.

    Each chart starts at C = 0 and sees i.i.d. N(shift, 1) observations.  The
    two-sided chart also runs the lower statistic ``max(0, D + (-z) - k)`` and
    alarms when either exceeds h (the textbook's tabular CUSUM).

    Parameters
    ----------
    params : k and h.
    shift : mean of the observations, in standard deviations.
    charts : how many independent charts to simulate.
    two_sided : also run the lower side.
    max_steps : give up after this many steps (the run length is then
        ``max_steps``, which biases the mean down; keep it far above the ARL).
    seed : of the generator.

    Returns
    -------
    numpy.ndarray of int64, shape (charts,)
    """
    if charts <= 0 or max_steps <= 0:
        raise ValueError(f"run_lengths: charts and max_steps must be > 0, got {charts!r}, {max_steps!r}")
    rng = np.random.default_rng(seed)
    lengths = np.full(charts, max_steps, dtype=np.int64)
    alive = np.arange(charts)
    upper = np.zeros(charts)
    lower = np.zeros(charts)
    for step in range(1, max_steps + 1):
        z = rng.standard_normal(alive.size) + shift
        upper = np.maximum(0.0, upper + z - params.k)
        alarm = upper > params.h
        if two_sided:
            lower = np.maximum(0.0, lower - z - params.k)
            alarm |= lower > params.h
        if alarm.any():
            lengths[alive[alarm]] = step
            keep = ~alarm
            alive, upper, lower = alive[keep], upper[keep], lower[keep]
            if alive.size == 0:
                break
    return lengths


def siegmund_arl(params: CusumParams, shift: float) -> float:
    """Siegmund's (1985) approximation of the upper one-sided chart's ARL.

    ``ARL = (exp(-2 d b) + 2 d b - 1) / (2 d^2)`` with ``d = shift - k`` and
    ``b = h + 1.166`` (as quoted in Montgomery, sec. 9.1; from memory).
    """
    d = shift - params.k
    b = params.h + 1.166
    if abs(d) < 1e-12:
        return b * b
    return float((np.exp(-2.0 * d * b) + 2.0 * d * b - 1.0) / (2.0 * d * d))


@dataclass(frozen=True)
class WaveParams:
    """How a site's minutes turn into waves (``[waves]`` settings).

    ``baseline_alpha`` is the EWMA weight (Roberts 1959) that lets the normal
    flagged share follow slow drift outside waves; ``baseline_minutes`` minutes
    seed it (their plain mean) before the chart may alarm.
    """

    cusum: CusumParams = CusumParams()
    baseline_alpha: float = 0.05
    baseline_minutes: int = 30
    min_rate: float = 0.01
    min_comments: int = 20
    end_quiet_minutes: int = 5

    def __post_init__(self):
        checks = {
            "baseline_alpha": 0.0 < self.baseline_alpha <= 1.0,
            "baseline_minutes": isinstance(self.baseline_minutes, int) and self.baseline_minutes >= 1,
            "min_rate": 0.0 < self.min_rate < 0.5,
            "min_comments": isinstance(self.min_comments, int) and self.min_comments >= 1,
            "end_quiet_minutes": isinstance(self.end_quiet_minutes, int) and self.end_quiet_minutes >= 1,
        }
        for name, ok in checks.items():
            if not ok:
                raise ValueError(f"WaveParams: bad {name} {getattr(self, name)!r}")

    @classmethod
    def from_settings(cls, waves) -> "WaveParams":
        return cls(
            cusum=CusumParams(k=waves.cusum_k, h=waves.cusum_h),
            baseline_alpha=waves.baseline_alpha,
            baseline_minutes=waves.baseline_minutes,
            min_rate=waves.min_rate,
            min_comments=waves.min_comments,
            end_quiet_minutes=waves.end_quiet_minutes,
        )


@dataclass(frozen=True)
class WaveState:
    """One site's detector state between minutes (stored as JSON in Redis)."""

    c: float = 0.0
    p0: float | None = None
    seen: int = 0
    quiet: int = 0
    active: bool = False
    start: int | None = None
    peak: float = 0.0
    last_z: float = 0.0

    def to_dict(self) -> dict:
        return {"c": self.c, "p0": self.p0, "seen": self.seen, "quiet": self.quiet, "active": self.active,
                "start": self.start, "peak": self.peak, "last_z": self.last_z}

    @classmethod
    def from_dict(cls, d: dict) -> "WaveState":
        known = cls().to_dict().keys()
        return cls(**{k: v for k, v in d.items() if k in known})


def observe_minute(state: WaveState, *, flagged: int, total: int, minute: int,
                   params: WaveParams) -> tuple[WaveState, str | None]:
    """Feed one site's completed minute; returns the new state and ``"start"``, ``"end"`` or ``None``.

    A minute with fewer than ``min_comments`` comments carries too little
    evidence to move the chart; during a wave it counts as a quiet minute, so
    a wave on a site that falls silent still ends.
    """

    if total < params.min_comments:
        if not state.active:
            return state, None
        return _maybe_end(replace(state, quiet=state.quiet + 1), params)
    share = flagged / total
    if state.p0 is None or state.seen < params.baseline_minutes:
        p0 = share if state.p0 is None else state.p0 + (share - state.p0) / (state.seen + 1)
        return replace(state, p0=p0, seen=state.seen + 1), None
    base = min(max(state.p0, params.min_rate), 0.99)
    z = float(standardize(flagged, total, base))
    c = upper_step(state.c, z, params.cusum)
    if state.active:
        quiet = state.quiet + 1 if z < params.cusum.k else 0
        return _maybe_end(replace(state, c=c, quiet=quiet, peak=max(state.peak, share), last_z=z), params)
    if c > params.cusum.h:
        return replace(state, c=c, active=True, start=minute, peak=share, quiet=0, last_z=z), "start"
    p0 = state.p0 + params.baseline_alpha * (share - state.p0)
    return replace(state, c=c, p0=p0, seen=state.seen + 1, last_z=z), None


def _maybe_end(state: WaveState, params: WaveParams) -> tuple[WaveState, str | None]:

    if state.quiet >= params.end_quiet_minutes:
        return replace(state, c=0.0, active=False, quiet=0), "end"
    return state, None
