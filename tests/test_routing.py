"""Routing: score -> a decision (publish | hold | reject) and the rule that decided, with floors,
targets and per-site settings computed in one place for every path."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from model.actions import ACTIONS, THRESHOLD_ACTIONS, Action, parse_action
from model.calibration import HeldOutHam, Thresholds
from worker.routing import (HOLD, PUBLISH, REJECT, Decision, Router, RoutingSettings, parse_site_overrides,
                            route, routing_settings_from_environment)

MODEL = Thresholds(hold=0.3, reject=0.8)
NO_FLOORS = RoutingSettings(hold_floor=0.0, reject_floor=0.0)


def actions(router, scores, sites):
    return [d.action for d in router.decide_many(scores, sites)]


def test_the_action_vocabulary():
    assert [a.value for a in ACTIONS] == ["publish", "hold", "reject"]
    assert THRESHOLD_ACTIONS == (Action.HOLD, Action.REJECT)
    # Each threshold is named after the action it leads to (Thresholds.hold, .reject).
    assert all(hasattr(Thresholds(hold=0.5, reject=0.9), a) for a in THRESHOLD_ACTIONS)
    assert parse_action(b"reject") is Action.REJECT and Action.HOLD == "hold"
    with pytest.raises(ValueError, match="action must be one of"):
        parse_action("delete")


def test_a_decision_keeps_its_action_as_an_action():
    assert Decision("hold").action is Action.HOLD


@pytest.mark.parametrize(
    "score,action",
    [(0.0, PUBLISH), (0.2999, PUBLISH), (0.3, HOLD), (0.7999, HOLD), (0.8, REJECT), (1.0, REJECT)],
    ids=["zero", "just-below-hold", "at-hold", "just-below-reject", "at-reject", "one"],
)
def test_route_boundaries(score, action):
    assert route(score, MODEL) == action


def test_router_applies_site_overrides_and_keeps_the_model_elsewhere():
    router = Router(thresholds=MODEL, settings=NO_FLOORS,
                    site_overrides={"strict.example": {"hold": 0.1}, "lax.example": {"reject": 0.95}})
    scores = [0.2, 0.2, 0.9, 0.9]
    sites = ["strict.example", "other.example", "lax.example", "other.example"]
    assert actions(router, scores, sites) == [HOLD, PUBLISH, HOLD, REJECT]
    assert [d.rule for d in router.decide_many(scores, sites)] == ["site", "model", "site", "model"]
    assert router.cutoffs("strict.example") == Thresholds(0.1, 0.8)


def test_router_matches_route_for_every_score():
    router = Router(thresholds=MODEL, settings=NO_FLOORS)
    scores = [i / 100 for i in range(101)]
    assert actions(router, scores, [""] * len(scores)) == [route(s, MODEL) for s in scores]


def test_floors_lift_low_model_thresholds():
    # A model whose targets gave hold 0.0005 (near-separable held-out data) still holds only from 0.5.
    router = Router(thresholds=Thresholds(0.0005, 0.3))
    assert router.cutoffs("") == Thresholds(0.5, 0.9)
    assert actions(router, [0.0723, 0.6, 0.95], ["", "", ""]) == [PUBLISH, HOLD, REJECT]


def test_the_stricter_of_target_and_floor_per_site():
    ham = HeldOutHam.from_scores(np.random.default_rng(0).beta(2, 5, size=4_000))  # overlapping ham
    settings = RoutingSettings(site_thresholds={
        "lenient.example": {"hold_fpr": 0.1},           # a looser target: falls to the floor 0.5
        "careful.example": {"hold_floor": 0.7, "reject_floor": 0.97},
        "tight.example": {"reject_fpr": 0.0005, "hold_fpr": 0.005},
    })
    router = Router(thresholds=Thresholds(0.5, 0.9), held_out_ham=ham, settings=settings)
    default = router.cutoffs("")
    assert default.hold == pytest.approx(ham.threshold_for(0.02)) and default.hold > 0.5
    assert router.cutoffs("lenient.example").hold == max(0.5, ham.threshold_for(0.1))
    assert router.cutoffs("careful.example") == Thresholds(max(0.7, default.hold), max(0.97, default.reject))
    tight = router.cutoffs("tight.example")
    assert tight.hold == pytest.approx(max(0.5, ham.threshold_for(0.005))) and tight.hold > default.hold
    assert tight.reject == max(0.9, ham.threshold_for(0.0005))


def test_a_site_cutoff_that_changes_the_action_names_the_site_rule():
    router = Router(thresholds=Thresholds(0.5, 0.9), settings=RoutingSettings(site_thresholds={"quiet.example": {"hold": 0.95}}))
    decisions = router.decide_many([0.3, 0.7, 0.93, 0.97, 0.7], ["quiet.example"] * 4 + ["busy.example"])
    assert [(d.action, d.rule) for d in decisions] == [
        ("publish", "model"), ("publish", "site"), ("publish", "site"), ("reject", "model"), ("hold", "model")]


@pytest.mark.parametrize(
    "override,expected",
    [({"hold": 0.9}, Thresholds(0.9, 0.9)), ({"reject": 0.2}, Thresholds(0.2, 0.2))],
    ids=["hold-above-model-reject", "reject-below-model-hold"],
)
def test_a_one_sided_override_moves_the_other_threshold(override, expected):
    router = Router(thresholds=MODEL, settings=NO_FLOORS, site_overrides={"s.example": override})
    assert router.cutoffs("s.example") == expected


def test_fixed_cutoffs_for_one_run():
    router = Router(thresholds=MODEL, fixed={"hold": 0.2})
    assert router.cutoffs("") == Thresholds(0.2, 0.9)
    with pytest.raises(ValueError, match="must not exceed"):
        Router(thresholds=MODEL, fixed={"hold": 0.9, "reject": 0.2})


@pytest.mark.parametrize(
    "table",
    [
        {"s.example": {"hold": 1.5}},
        {"s.example": {"hold": -0.1}},
        {"s.example": {"hold": "high"}},
        {"s.example": {"hold": True}},
        {"s.example": {"hold": 0.9, "reject": 0.5}},
        {"s.example": {"block": 0.5}},
        {"s.example": {"hold_fpr": 0.0}},
        {"s.example": {"reject_floor": 2}},
        {"s.example": 0.5},
        ["s.example"],
    ],
    ids=["above-one", "negative", "string", "bool", "hold-over-reject", "unknown-key", "zero-rate", "floor-above-one",
         "not-a-table", "list"],
)
def test_bad_overrides_raise_naming_the_site(table):
    with pytest.raises(ValueError, match="site_thresholds"):
        parse_site_overrides(table)


def test_crossed_site_targets_are_refused_when_the_router_is_built():
    with pytest.raises(ValueError, match="must not exceed"):
        RoutingSettings(site_thresholds={"s.example": {"hold_floor": 0.95}}).targets({"hold_floor": 0.95})


@pytest.mark.parametrize("hold,reject", [(0.9, 0.1), (math.nan, 0.5), (0.1, 2.0)], ids=["crossed", "nan", "above-one"])
def test_thresholds_check_their_values(hold, reject):
    with pytest.raises(ValueError, match="thresholds"):
        Thresholds(hold, reject)


@pytest.mark.parametrize(
    "kwargs, match",
    [({"action": "delete"}, "action"), ({"action": "hold", "rule": "mood"}, "rule"),
     ({"action": "hold", "rule": "campaign"}, "names its campaign")],
    ids=["action", "rule", "campaign-without-id"],
)
def test_decisions_are_validated(kwargs, match):
    with pytest.raises(ValueError, match=match):
        Decision(**kwargs)


def test_routing_settings_come_from_the_environment_and_the_config_file(tmp_path):
    # The RQ job reads them as `seawall serve` does: SEAWALL_WORKER_* over [worker] in SEAWALL_CONFIG.
    from ops.config import load_config

    path = tmp_path / "seawall.toml"
    path.write_text('[worker]\nhold_floor = 0.6\nreject_fpr = 0.0005\nbatch = 64\n'
                    '[worker.site_thresholds]\n"quiet.example" = { hold = 0.95 }\n')
    env = {"SEAWALL_CONFIG": str(path), "SEAWALL_WORKER_REJECT_FLOOR": "0.97"}
    got = routing_settings_from_environment(env)
    assert got == RoutingSettings.of(load_config(environ=env).worker)
    assert (got.hold_floor, got.reject_floor, got.reject_fpr, got.hold_fpr) == (0.6, 0.97, 0.0005, 0.02)
    assert dict(got.site_thresholds) == {"quiet.example": {"hold": 0.95}}
    env["SEAWALL_WORKER_SITE_THRESHOLDS"] = json.dumps({"a.example": {"hold_floor": 0.8}})
    assert dict(routing_settings_from_environment(env).site_thresholds) == {"a.example": {"hold_floor": 0.8}}
    with pytest.raises(ValueError, match="SEAWALL_WORKER_HOLD_FLOOR"):
        routing_settings_from_environment({"SEAWALL_WORKER_HOLD_FLOOR": "high"})


def test_numpy_scores_route_like_floats():
    router = Router(thresholds=MODEL, settings=NO_FLOORS, site_overrides={"s.example": {"hold": 0.1}})
    scores = np.array([0.05, 0.2, 0.5, 0.95])
    sites = ["s.example", "s.example", "", ""]
    assert [(d.action, d.rule) for d in router.decide_many(scores, sites)] == \
        [(d.action, d.rule) for d in router.decide_many([float(s) for s in scores], sites)] == \
        [(PUBLISH, "model"), (HOLD, "site"), (HOLD, "model"), (REJECT, "model")]
