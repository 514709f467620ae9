"""Batch policies: a last word on actions after scoring, before anything is written.

A :class:`BatchPolicy` sees the batch's comments, their scores and the actions
routing chose, and returns the actions to use (same length, each one of
publish|hold|reject).  Campaign detection uses this to hold members of an
active near-duplicate campaign.  A policy may read or write Redis through the
client it is given; its writes are not part of the comments' exactly-once
commit, so they must be safe to repeat (SET with TTL, set adds, counters that
tolerate a rare double count).
"""
from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Protocol, runtime_checkable

from worker.routing import ACTIONS

log = logging.getLogger("seawall.worker.policies")


@runtime_checkable
class BatchPolicy(Protocol):
    def apply(self, client, comments: Sequence, scores: Sequence[float], actions: list[str]) -> list[str]: ...


def apply_policies(policies: Sequence[BatchPolicy], client, comments, scores, actions: list[str]) -> list[str]:
    """Run each policy in turn; a policy that returns a malformed answer is ignored and logged.

    Connection errors propagate (the worker reconnects and retries the batch);
    a bug in a policy must not stop moderation, so other exceptions keep the
    actions as they were and are logged with their traceback.
    """
    import redis

    for policy in policies:
        try:
            proposed = policy.apply(client, comments, scores, list(actions))
        except (redis.ConnectionError, redis.TimeoutError):
            raise
        except Exception:  # a policy's bug: keep routing's actions, say so loudly
            log.exception("batch policy %s failed; keeping the actions it was given", type(policy).__name__)
            continue
        if proposed is None or len(proposed) != len(actions) or any(a not in ACTIONS for a in proposed):
            log.error("batch policy %s returned malformed actions; ignored", type(policy).__name__)
            continue
        actions = list(proposed)
    return actions
