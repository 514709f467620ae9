"""From a spam score to a decision: publish, hold for review, or reject, and the rule that decided.

The one place the effective cutoffs are computed.  Scores are calibrated
probabilities; the hold and reject thresholds are each the **stricter
(higher)** of a false-positive-rate target, measured on the model's held-out
ham, and a probability floor (defaults: hold 2 % of ham and >= 0.5, reject
0.1 % of ham and >= 0.9; see :mod:`model.calibration`).  Targets and floors
are deployment settings (``worker.hold_fpr``, ``worker.reject_fpr``,
``worker.hold_floor``, ``worker.reject_floor``), and a site may set its own
in ``worker.site_thresholds``, or fixed ``hold`` / ``reject`` cutoffs.  The
stream worker, ``seawall score``, the RQ job and the hold-queue re-score all
route through :class:`Router`.

Every decision names its rule:

* ``model``: the model's score against the deployment's cutoffs;
* ``site``: the comment's site has cutoffs of its own, and they gave another
  action than the deployment's would have;
* ``campaign``: a batch policy changed the action because the comment belongs
  to a campaign (its id in ``campaign``).
"""
from __future__ import annotations

import json
import math
import os
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

from model.actions import ACTIONS, THRESHOLD_ACTIONS, Action
from model.calibration import ThresholdChoice, Thresholds, ThresholdTargets, choose_thresholds

PUBLISH, HOLD, REJECT = Action.PUBLISH, Action.HOLD, Action.REJECT

MODEL_RULE = "model"
SITE_RULE = "site"
CAMPAIGN_RULE = "campaign"
RULES = (MODEL_RULE, SITE_RULE, CAMPAIGN_RULE)

#: Keys a site may set in ``worker.site_thresholds``.
CUTOFF_KEYS = tuple(a.value for a in THRESHOLD_ACTIONS)
TARGET_KEYS = ("hold_fpr", "reject_fpr", "hold_floor", "reject_floor")


@dataclass(frozen=True, slots=True)
class Decision:
    """What happens to one comment and which rule decided it.

    ``campaign`` is the id of the campaign the comment belongs to, if any
    (also when the campaign did not change the action).
    """

    action: Action
    rule: str = MODEL_RULE
    campaign: str = ""

    def __post_init__(self):
        if self.action not in ACTIONS:
            raise ValueError(f"Decision: action must be one of {[a.value for a in ACTIONS]}, got {self.action!r}")
        object.__setattr__(self, "action", Action(self.action))
        if self.rule not in RULES:
            raise ValueError(f"Decision: rule must be one of {RULES}, got {self.rule!r}")
        if not isinstance(self.campaign, str) or (self.rule == CAMPAIGN_RULE and not self.campaign):
            raise ValueError(f"Decision: a campaign decision names its campaign, got {self.campaign!r}")


# The six decisions routing can make, shared (a Decision is immutable): no allocation per comment.  Each
# tuple is indexed by how many thresholds a score reached (0 publish, 1 hold, 2 reject: ACTIONS is mildest first).
_BY_MODEL = tuple(Decision(a, MODEL_RULE) for a in ACTIONS)
_BY_SITE = tuple(Decision(a, SITE_RULE) for a in ACTIONS)


def route(score: float, thresholds: Thresholds) -> Action:
    """The action for one score under ``thresholds``: the rule :meth:`Router.decide_many` applies to each comment.

    A score at or above a threshold moves one step up from publish, so the action
    is :data:`ACTIONS` at the number of thresholds reached.
    """
    return ACTIONS[2 if score >= thresholds.reject else 1 if score >= thresholds.hold else 0]


def _number(site, name: str, value, low: float, high: float, low_open: bool = False) -> float:
    bad = isinstance(value, bool) or not isinstance(value, (int, float)) or math.isnan(value)
    if bad or not (low < value <= high if low_open else low <= value <= high):
        interval = f"({low}, {high}]" if low_open else f"[{low}, {high}]"
        raise ValueError(f"site_thresholds: {site!r} {name} must be a number in {interval}, got {value!r}")
    return float(value)


def parse_site_overrides(table: Mapping) -> dict[str, dict[str, float]]:
    """Check ``worker.site_thresholds``: ``{site: {key: value}}``.

    Keys: ``hold`` / ``reject`` (fixed cutoffs, which win over everything
    else for that side), and ``hold_fpr``, ``reject_fpr``, ``hold_floor``,
    ``reject_floor`` (the site's own targets and floors; the others keep the
    deployment's).
    """
    if not isinstance(table, Mapping):
        raise ValueError(f"site_thresholds: expected a table of sites, got {table!r}")
    out: dict[str, dict[str, float]] = {}
    for site, entry in table.items():
        if not isinstance(site, str) or not isinstance(entry, Mapping):
            raise ValueError(f"site_thresholds: {site!r} must map to a table like {{hold = 0.5, reject = 0.9}}")
        unknown = set(entry) - set(CUTOFF_KEYS) - set(TARGET_KEYS)
        if unknown:
            raise ValueError(f"site_thresholds: {site!r} has unknown keys {sorted(unknown)}; use "
                             f"{', '.join(CUTOFF_KEYS + TARGET_KEYS)}")
        picked = {}
        for name in CUTOFF_KEYS + TARGET_KEYS:
            if name in entry:
                rate = name.endswith("_fpr")
                picked[name] = _number(site, name, entry[name], 0.0, 0.5 if rate else 1.0, low_open=rate)
        if HOLD in picked and REJECT in picked and picked[HOLD] > picked[REJECT]:
            raise ValueError(f"site_thresholds: {site!r} hold {picked[HOLD]} exceeds reject {picked[REJECT]}")
        out[site] = picked
    return out


def _fixed(fixed: Mapping) -> dict[str, float]:
    unknown = set(fixed) - set(CUTOFF_KEYS)
    if unknown:
        raise ValueError(f"thresholds: fixed cutoffs are hold and reject, got {sorted(unknown)}")
    for name, value in fixed.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 <= value <= 1.0:
            raise ValueError(f"thresholds: {name} must be a number in [0, 1], got {value!r}")
    if fixed.get(HOLD, 0.0) > fixed.get(REJECT, 1.0):
        raise ValueError(f"thresholds: hold ({fixed[HOLD]!r}) must not exceed reject ({fixed[REJECT]!r})")
    return {k: float(v) for k, v in fixed.items()}


@dataclass(frozen=True)
class RoutingSettings(ThresholdTargets):
    """The deployment's targets and floors, and its per-site table (``worker.*`` settings)."""

    site_thresholds: Mapping = field(default_factory=lambda: MappingProxyType({}))

    def __post_init__(self):
        super().__post_init__()  # refuse bad values at start-up, naming the field
        parse_site_overrides(self.site_thresholds)

    @classmethod
    def of(cls, settings) -> "RoutingSettings":
        """The routing part of ``WorkerSettings`` (or of anything with the same fields)."""
        return cls(**{name: getattr(settings, name) for name in cls.__dataclass_fields__})

    def targets(self, override: Mapping | None = None) -> ThresholdTargets:
        values = {name: getattr(self, name) for name in TARGET_KEYS}
        values.update({k: v for k, v in (override or {}).items() if k in TARGET_KEYS})
        try:
            return ThresholdTargets(**values)
        except ValueError as exc:
            raise ValueError(f"thresholds: {exc}") from None


#: ``worker.*`` setting -> environment variable, for processes that get no Config (the RQ job).
ROUTING_ENV = {name: f"SEAWALL_WORKER_{name.upper()}" for name in RoutingSettings.__dataclass_fields__}


def routing_settings_from_environment(environ: Mapping[str, str] | None = None) -> RoutingSettings:
    """:class:`RoutingSettings` as ``seawall serve`` would read them: ``SEAWALL_WORKER_*``
    variables over the ``[worker]`` table of the ``SEAWALL_CONFIG`` file over the defaults.

    For processes started by something else than ``seawall`` (an ``rq worker``), which have
    no :class:`ops.config.Config`; the names and meanings are the same.
    """
    environ = os.environ if environ is None else environ
    values: dict[str, object] = {}
    path = environ.get("SEAWALL_CONFIG", "")
    if path:
        try:
            with open(path, "rb") as fh:
                section = tomllib.load(fh).get("worker", {})
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise ValueError(f"routing settings: cannot read SEAWALL_CONFIG {path}: {exc}") from None
        values.update({k: v for k, v in section.items() if k in ROUTING_ENV})
    for name, env in ROUTING_ENV.items():
        raw = environ.get(env, "").strip()
        if raw:
            try:
                values[name] = json.loads(raw) if name == "site_thresholds" else float(raw)
            except ValueError:
                raise ValueError(f"routing settings: ${env} has a bad value {raw!r}") from None
    return RoutingSettings(**values)


class Router:
    """Decides a batch with the effective cutoffs of each comment's site.

    Parameters
    ----------
    thresholds : the model's stored thresholds (``.hold``, ``.reject``); they
        stand in for the targets when the model kept no held-out ham.
    held_out_ham : the model's :class:`model.calibration.HeldOutHam`, or None.
    settings : :class:`RoutingSettings` (or ``WorkerSettings``); default: Seawall's defaults.
    site_overrides : a ``worker.site_thresholds`` table instead of the one in ``settings``.
    fixed : ``{HOLD: x}`` and/or ``{REJECT: y}``: fixed cutoffs for every
        site without its own (an operator's override for one run).

    Examples
    --------
    >>> r = Router(thresholds=Thresholds(hold=0.2, reject=0.6),
    ...            settings=RoutingSettings(site_thresholds={"q.example": {HOLD: 0.95}}))
    >>> r.cutoffs("any.example"), r.cutoffs("q.example")
    (Thresholds(hold=0.5, reject=0.9), Thresholds(hold=0.95, reject=0.95))
    >>> [(d.action.value, d.rule) for d in r.decide_many([0.7, 0.7], ["any.example", "q.example"])]
    [('hold', 'model'), ('publish', 'site')]
    """

    def __init__(self, *, thresholds, held_out_ham=None, settings=None, site_overrides: Mapping | None = None,
                 fixed: Mapping | None = None):
        settings = RoutingSettings() if settings is None else settings
        if not isinstance(settings, RoutingSettings):
            settings = RoutingSettings.of(settings)
        self.settings = settings
        self.thresholds = thresholds
        self._ham = held_out_ham
        self._stored = Thresholds(hold=float(thresholds.hold), reject=float(thresholds.reject))
        self.choice = self._choose(settings.targets())
        self._default = self.choice.thresholds
        if fixed:
            self._default = self._site_cutoffs(_fixed(fixed))
        table = settings.site_thresholds if site_overrides is None else site_overrides
        self.site_overrides = table
        self._by_site = {site: self._site_cutoffs(o) for site, o in parse_site_overrides(table).items()}
        self._by_site = {site: c for site, c in self._by_site.items() if c != self._default}

    @classmethod
    def for_model(cls, model, settings=None, *, fixed: Mapping | None = None) -> "Router":
        """The router of ``model`` (anything with ``thresholds``; ``held_out_ham_`` when it kept one)."""
        return cls(thresholds=model.thresholds, held_out_ham=getattr(model, "held_out_ham_", None), settings=settings,
                   fixed=fixed)

    def _choose(self, targets: ThresholdTargets) -> ThresholdChoice:
        return choose_thresholds(self._ham, targets, stored=self._stored)

    def _site_cutoffs(self, override: dict) -> Thresholds:
        base = self._default
        if any(k in override for k in TARGET_KEYS):
            base = self._choose(self.settings.targets(override)).thresholds
        # A fixed cutoff may cross the other side (hold 0.95 against a reject of 0.9): the fixed
        # side wins and the other one moves to meet it.
        hold = override.get(HOLD, base.hold)
        reject = override.get(REJECT, base.reject)
        if hold > reject:
            if HOLD in override:
                reject = hold
            else:
                hold = reject
        return Thresholds(hold=hold, reject=reject)

    def cutoffs(self, site: str) -> Thresholds:
        """The effective (hold, reject) of ``site``."""
        return self._by_site.get(site, self._default)

    def warnings(self) -> list[str]:
        """The deployment-wide thresholds' warnings (see :meth:`ThresholdChoice.warnings`)."""
        return self.choice.warnings()

    def hold_cutoffs(self, sites: Sequence[str]) -> list[float]:
        """Each comment's hold cutoff: a comment at or above it is held or rejected."""
        if not self._by_site:
            return [self._default.hold] * len(sites)
        by_site, default = self._by_site, self._default
        return [by_site.get(site, default).hold for site in sites]

    def decide_many(self, scores: Sequence[float], sites: Sequence[str]) -> list[Decision]:
        """Each comment's action under its site's cutoffs, and the rule that decided it.

        The only path from a score to an action (:func:`route` is the same rule
        for one score); the comparison is written out here because this loop
        runs for every comment.  Scores may be floats or numpy floats.
        """
        hold, reject = self._default.hold, self._default.reject
        by_site = self._by_site
        out = []
        for score, site in zip(scores, sites):
            reached = 2 if score >= reject else 1 if score >= hold else 0
            c = by_site.get(site) if by_site else None
            if c is not None:
                own = 2 if score >= c.reject else 1 if score >= c.hold else 0
                if own != reached:
                    out.append(_BY_SITE[own])
                    continue
            out.append(_BY_MODEL[reached])
        return out


def explain_decisions(model, texts: Sequence[str], scores: Sequence[float], decisions: Sequence[Decision],
                      reasons: list, ranked_from: Sequence[float], *, top_k: int) -> list:
    """Reasons that explain each final action.

    The scoring call lists spam-ward tokens first for comments at or above
    ``ranked_from`` (its ``spamward_from``, normally each comment's hold
    cutoff); a comment held or rejected below it (a campaign member the model
    would publish, or one text scored once for several sites) is explained
    again here, spam-ward tokens first.  ``reasons`` is returned, fixed in place.
    """
    again = [i for i, (d, s, c) in enumerate(zip(decisions, scores, ranked_from)) if d.action != PUBLISH and s < c]
    if again and top_k > 0:
        _, fixed = model.score_many([texts[i] for i in again], top_k=top_k, spamward_from=0.0)
        for i, why in zip(again, fixed):
            reasons[i] = why
    return reasons


def score_and_decide(model, router: Router, texts: Sequence[str], sites: Sequence[str], *, top_k: int = 5):
    """One model call for ``texts``: ``(scores, decisions, reasons)`` as the stream worker makes them."""
    cutoffs = router.hold_cutoffs(sites)
    scores, reasons = model.score_many(list(texts), top_k=top_k, spamward_from=cutoffs)
    scores = [float(s) for s in scores]
    return scores, router.decide_many(scores, sites), list(reasons)
