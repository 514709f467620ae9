"""Batch policies: a last word on decisions after scoring, before anything is written.

A :class:`BatchPolicy` sees the batch's comments, their scores and the
:class:`worker.routing.Decision` routing made for each, and returns the
decisions to use (same length).  A policy that changes an action says so in
the decision's ``rule`` (campaign detection holds members of an active
near-duplicate campaign with rule ``campaign`` and the campaign's id).

Policies keep their state through a :class:`PolicyState` port, whatever
transport the comments came by, and never see a client: its ``campaigns`` is
the campaign state (a :class:`worker.campaignstore.CampaignStore`), and its
``guard()`` turns a lost connection to the state store into a
:class:`worker.transport.TransientError` so that the batch is read again.  A policy's writes are not part of the
comments' exactly-once commit, so they must be safe to repeat (SET with TTL,
set adds, counters that tolerate a rare double count).
"""
from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import TYPE_CHECKING, Protocol, runtime_checkable

from worker.campaignstore import CampaignStore
from worker.routing import Decision
from worker.transport import TransientError

if TYPE_CHECKING:
    from model.features import BatchWords

log = logging.getLogger("seawall.worker.policies")


@runtime_checkable
class PolicyState(Protocol):
    """Where batch policies keep their state (see :class:`worker.redistransport.RedisState`)."""

    campaigns: CampaignStore

    def guard(self): ...


@runtime_checkable
class BatchPolicy(Protocol):
    def apply(self, state: PolicyState, comments: Sequence, scores: Sequence[float],
              decisions: list[Decision]) -> list[Decision]: ...


def held_before_scoring(policies: Sequence[BatchPolicy], state: PolicyState, comments,
                        words: BatchWords | None = None) -> set[int]:
    """The comments some policy will hold whatever they score, when it can tell before they are scored.

    A policy tells by an optional method ``will_hold(state, comments, words) -> set of indices``; ``words``
    (a :class:`model.features.BatchWords` or None) are the comments' words as the worker's model cut them
    for scoring, for a policy that would cut them the same way.  The worker then
    ranks those comments' reasons spam-ward first in its one scoring pass instead of scoring them a second
    time after routing.  A failure costs only that ranking (logged); a lost connection to the state store
    propagates as :class:`TransientError`, as in :func:`apply_policies`.
    """
    out: set[int] = set()
    for policy in policies:
        will_hold = getattr(policy, "will_hold", None)
        if will_hold is None:
            continue
        try:
            with state.guard():
                out.update(i for i in will_hold(state, comments, words) if 0 <= i < len(comments))
        except TransientError:
            raise
        except Exception:  # a policy's bug: the reasons are ranked after routing, as without the hint
            log.exception("batch policy %s failed before scoring; its holds are explained after routing",
                          type(policy).__name__)
    return out


def apply_policies(policies: Sequence[BatchPolicy], state: PolicyState, comments, scores,
                   decisions: list[Decision]) -> list[Decision]:
    """Run each policy in turn; a policy that returns a malformed answer is ignored and logged.

    A lost connection to the state store propagates as :class:`TransientError`
    (the worker reconnects and retries the batch); a bug in a policy must not
    stop moderation, so other exceptions keep the decisions as they were and
    are logged with their traceback.
    """
    for policy in policies:
        try:
            with state.guard():
                proposed = policy.apply(state, comments, scores, list(decisions))
        except TransientError:
            raise
        except Exception:  # a policy's bug: keep routing's decisions, say so loudly
            log.exception("batch policy %s failed; keeping the decisions it was given", type(policy).__name__)
            continue
        if proposed is None or len(proposed) != len(decisions) or any(type(d) is not Decision for d in proposed):
            log.error("batch policy %s returned malformed decisions; ignored", type(policy).__name__)
            continue
        decisions = list(proposed)
    return decisions
