"""Routing: score -> publish | hold | reject, with per-site overrides from config."""
from __future__ import annotations

import math

import pytest

from worker.routing import HOLD, PUBLISH, REJECT, Cutoffs, Router, parse_site_overrides, route

MODEL = Cutoffs(hold=0.3, reject=0.8)


@pytest.mark.parametrize(
    "score,action",
    [(0.0, PUBLISH), (0.2999, PUBLISH), (0.3, HOLD), (0.7999, HOLD), (0.8, REJECT), (1.0, REJECT)],
    ids=["zero", "just-below-hold", "at-hold", "just-below-reject", "at-reject", "one"],
)
def test_route_boundaries(score, action):
    assert route(score, MODEL) == action


def test_router_applies_site_overrides_and_keeps_the_model_elsewhere():
    router = Router(thresholds=MODEL, site_overrides={"strict.example": {"hold": 0.1}, "lax.example": {"reject": 0.95}})
    scores = [0.2, 0.2, 0.9, 0.9]
    sites = ["strict.example", "other.example", "lax.example", "other.example"]
    assert router.route_many(scores, sites) == [HOLD, PUBLISH, HOLD, REJECT]
    assert router.cutoffs("strict.example") == Cutoffs(0.1, 0.8)


def test_router_matches_route_for_every_score():
    router = Router(thresholds=MODEL)
    scores = [i / 100 for i in range(101)]
    assert router.route_many(scores, [""] * len(scores)) == [route(s, MODEL) for s in scores]


@pytest.mark.parametrize(
    "override,expected",
    [({"hold": 0.9}, Cutoffs(0.9, 0.9)), ({"reject": 0.2}, Cutoffs(0.2, 0.2))],
    ids=["hold-above-model-reject", "reject-below-model-hold"],
)
def test_a_one_sided_override_moves_the_other_threshold(override, expected):
    router = Router(thresholds=MODEL, site_overrides={"s.example": override})
    assert router.cutoffs("s.example") == expected


@pytest.mark.parametrize(
    "table",
    [
        {"s.example": {"hold": 1.5}},
        {"s.example": {"hold": -0.1}},
        {"s.example": {"hold": "high"}},
        {"s.example": {"hold": True}},
        {"s.example": {"hold": 0.9, "reject": 0.5}},
        {"s.example": {"block": 0.5}},
        {"s.example": 0.5},
        ["s.example"],
    ],
    ids=["above-one", "negative", "string", "bool", "hold-over-reject", "unknown-key", "not-a-table", "list"],
)
def test_bad_overrides_raise_naming_the_site(table):
    with pytest.raises(ValueError, match="site_thresholds"):
        parse_site_overrides(table)


@pytest.mark.parametrize("hold,reject", [(0.9, 0.1), (math.nan, 0.5), (0.1, 2.0)], ids=["crossed", "nan", "above-one"])
def test_cutoffs_check_their_values(hold, reject):
    with pytest.raises(ValueError, match="thresholds"):
        Cutoffs(hold, reject)

