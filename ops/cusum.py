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

from dataclasses import dataclass

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
