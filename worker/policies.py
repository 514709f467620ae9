"""Batch policies: a last word on decisions after scoring, before anything is written.

A :class:`BatchPolicy` sees the batch's comments, their scores and the
:class:`worker.routing.Decision` routing made for each, and returns the
decisions to use (same length).  A policy that changes an action says so in
the decision's ``rule`` (campaign detection holds members of an active
near-duplicate campaign with rule ``campaign`` and the campaign's id).  A
policy may read or write Redis through the client it is given; its writes are
not part of the comments' exactly-once commit, so they must be safe to repeat
(SET with TTL, set adds, counters that tolerate a rare double count).
"""
from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Protocol, runtime_checkable

from worker.routing import Decision

log = logging.getLogger("seawall.worker.policies")


@runtime_checkable
class BatchPolicy(Protocol):
    def apply(self, client, comments: Sequence, scores: Sequence[float],
              decisions: list[Decision]) -> list[Decision]: ...


def apply_policies(policies: Sequence[BatchPolicy], client, comments, scores,
                   decisions: list[Decision]) -> list[Decision]:
    """Run each policy in turn; a policy that returns a malformed answer is ignored and logged.

    Connection errors propagate (the worker reconnects and retries the batch);
    a bug in a policy must not stop moderation, so other exceptions keep the
    decisions as they were and are logged with their traceback.
    """
    import redis

    for policy in policies:
        try:
            proposed = policy.apply(client, comments, scores, list(decisions))
        except (redis.ConnectionError, redis.TimeoutError):
            raise
        except Exception:  # a policy's bug: keep routing's decisions, say so loudly
            log.exception("batch policy %s failed; keeping the decisions it was given", type(policy).__name__)
            continue
        if proposed is None or len(proposed) != len(decisions) or any(type(d) is not Decision for d in proposed):
            log.error("batch policy %s returned malformed decisions; ignored", type(policy).__name__)
            continue
        decisions = list(proposed)
    return decisions
