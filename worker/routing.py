"""From a spam score to an action: publish, hold for review, or reject.

The model's artifact carries calibrated thresholds (``hold`` <= ``reject``);
an operator may override either of them per site in config
(``worker.site_thresholds``).  A score at or above ``reject`` is rejected, at
or above ``hold`` is held, anything lower is published.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

PUBLISH = "publish"
HOLD = "hold"
REJECT = "reject"
ACTIONS = (PUBLISH, HOLD, REJECT)


@dataclass(frozen=True, slots=True)
class Cutoffs:
    """A (hold, reject) pair, both in [0, 1], hold <= reject."""

    hold: float
    reject: float

    def __post_init__(self):
        for name in ("hold", "reject"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 <= value <= 1.0 or math.isnan(value):
                raise ValueError(f"thresholds: {name} must be a number in [0, 1], got {value!r}")
        if self.hold > self.reject:
            raise ValueError(f"thresholds: hold ({self.hold!r}) must not exceed reject ({self.reject!r})")


def route(score: float, thresholds) -> str:
    """The action for one score under ``thresholds`` (anything with ``hold`` and ``reject``)."""
    if score >= thresholds.reject:
        return REJECT
    if score >= thresholds.hold:
        return HOLD
    return PUBLISH


def parse_site_overrides(table: Mapping) -> dict[str, dict[str, float]]:
    """Check ``worker.site_thresholds``: ``{site: {"hold": x, "reject": y}}``, either key optional."""
    if not isinstance(table, Mapping):
        raise ValueError(f"site_thresholds: expected a table of sites, got {table!r}")
    out: dict[str, dict[str, float]] = {}
    for site, entry in table.items():
        if not isinstance(site, str) or not isinstance(entry, Mapping):
            raise ValueError(f"site_thresholds: {site!r} must map to a table like {{hold = 0.5, reject = 0.9}}")
        unknown = set(entry) - {"hold", "reject"}
        if unknown:
            raise ValueError(f"site_thresholds: {site!r} has unknown keys {sorted(unknown)}; use hold and reject")
        picked = {}
        for name in ("hold", "reject"):
            if name in entry:
                value = entry[name]
                if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 <= value <= 1.0:
                    raise ValueError(f"site_thresholds: {site!r} {name} must be a number in [0, 1], got {value!r}")
                picked[name] = float(value)
        if "hold" in picked and "reject" in picked and picked["hold"] > picked["reject"]:
            raise ValueError(f"site_thresholds: {site!r} hold {picked['hold']} exceeds reject {picked['reject']}")
        out[site] = picked
    return out


class Router:
    """Routes a batch with the model's thresholds and the per-site overrides.

    Parameters
    ----------
    thresholds : the model's thresholds (``.hold``, ``.reject``).
    site_overrides : ``worker.site_thresholds``; keys a site leaves out keep the model's value.
    """

    def __init__(self, *, thresholds, site_overrides: Mapping = None):
        self.thresholds = thresholds
        self.site_overrides = site_overrides or {}
        self._default = Cutoffs(float(thresholds.hold), float(thresholds.reject))
        self._by_site = {site: self._merge(o) for site, o in parse_site_overrides(self.site_overrides).items()}

    def _merge(self, override: dict) -> Cutoffs:
        # A one-sided override may cross the model's other threshold (hold 0.95 against a
        # model reject of 0.9): the overridden side wins and the other one moves to meet it.
        hold = override.get("hold", self._default.hold)
        reject = override.get("reject", self._default.reject)
        if hold > reject:
            if "hold" in override:
                reject = hold
            else:
                hold = reject
        return Cutoffs(hold, reject)

    def cutoffs(self, site: str) -> Cutoffs:
        return self._by_site.get(site, self._default)

    def route_many(self, scores: Sequence[float], sites: Sequence[str]) -> list[str]:
        default = self._default
        by_site = self._by_site
        out = []
        for score, site in zip(scores, sites):
            c = by_site.get(site, default) if by_site else default
            out.append(REJECT if score >= c.reject else HOLD if score >= c.hold else PUBLISH)
        return out
