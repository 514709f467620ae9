"""The CUSUM against the textbook's average run lengths, by vectorised simulation.

Reference values: Montgomery, *Introduction to Statistical Quality Control*,
table of tabular-CUSUM ARLs for k = 0.5 (two-sided chart), quoted from memory:

    shift (sigma)   0      1      2      3
    h = 4           168    8.38   3.34   2.19
    h = 5           465    10.4   4.01   2.57

The one-sided (upper) chart is checked against Siegmund's (1985)
approximation, also quoted in that book (from memory).

Tolerance: the simulated mean may differ from the reference by at most 4
standard errors of the simulated mean plus 3 % of the reference (the table's
rounding and the approximations behind it).
"""
from __future__ import annotations

import numpy as np
import pytest

from ops.cusum import CusumParams, run_lengths, siegmund_arl, standardize, upper_step

TEXTBOOK = {
    (4, 0.0): 168.0, (4, 1.0): 8.38, (4, 2.0): 3.34, (4, 3.0): 2.19,
    (5, 0.0): 465.0, (5, 1.0): 10.4, (5, 2.0): 4.01, (5, 3.0): 2.57,
}


def within(lengths: np.ndarray, reference: float) -> tuple[bool, str]:
    mean = lengths.mean()
    se = lengths.std(ddof=1) / np.sqrt(lengths.size)
    ok = abs(mean - reference) <= 4 * se + 0.03 * reference
    return ok, f"simulated ARL {mean:.2f} (SE {se:.2f}) vs reference {reference}"


@pytest.mark.parametrize(("h", "shift"), sorted(TEXTBOOK), ids=[f"h{h}-shift{s:g}" for h, s in sorted(TEXTBOOK)])
def test_two_sided_arl_matches_montgomery(h, shift):
    charts = 20_000 if shift == 0 else 5_000
    lengths = run_lengths(CusumParams(k=0.5, h=h), shift=shift, charts=charts, two_sided=True, seed=h)
    assert lengths.max() < 100_000  # no chart hit the step cap, so the mean is unbiased
    ok, msg = within(lengths, TEXTBOOK[(h, shift)])
    assert ok, msg


@pytest.mark.parametrize("h", [4, 5])
def test_upper_chart_arl0_matches_siegmund(h):
    params = CusumParams(k=0.5, h=h)
    lengths = run_lengths(params, shift=0.0, charts=10_000, seed=10 + h)
    ok, msg = within(lengths, siegmund_arl(params, 0.0))
    assert ok, msg


def test_the_tolerance_tells_h4_from_h5():
    lengths = run_lengths(CusumParams(k=0.5, h=4), charts=20_000, two_sided=True, seed=3)
    assert not within(lengths, TEXTBOOK[(5, 0.0)])[0]


def test_upper_step_and_standardize():
    params = CusumParams(k=0.5, h=5)
    assert upper_step(0.0, -3.0, params) == 0.0
    assert upper_step(1.0, 2.0, params) == pytest.approx(2.5)
    assert standardize(10, 100, 0.1) == pytest.approx(0.0)
    assert standardize(20, 100, 0.1) == pytest.approx(0.1 / np.sqrt(0.09 / 100))


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [({"k": -1}, "k"), ({"h": 0}, "h"), ({"h": float("nan")}, "h"), ({"k": "0.5"}, "k")],
    ids=["negative-k", "zero-h", "nan-h", "string-k"],
)
def test_params_are_validated(kwargs, field):
    with pytest.raises(ValueError, match=field):
        CusumParams(**kwargs)


@pytest.mark.parametrize(("flagged", "total", "p0"), [(1, 0, 0.1), (1, 10, 0.0), (1, 10, 1.0)],
                         ids=["no-comments", "p0-zero", "p0-one"])
def test_standardize_rejects_degenerate_input(flagged, total, p0):
    with pytest.raises(ValueError):
        standardize(flagged, total, p0)
