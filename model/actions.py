"""What can happen to a comment: the one vocabulary of actions.

Every layer names actions through :class:`Action`; a ``StrEnum``, so an
action is also its plain string (``Action.HOLD == "hold"``) wherever it is
written to Redis, JSON or a page.  Adding an action means adding it here and
teaching the router when to choose it.
"""
from __future__ import annotations

from enum import StrEnum


class Action(StrEnum):
    """A verdict's action, mildest first."""

    PUBLISH = "publish"
    HOLD = "hold"
    REJECT = "reject"


#: Every action, mildest first (a score at or above a threshold moves one step up).
ACTIONS: tuple[Action, ...] = tuple(Action)
#: The actions that have a threshold of their own: a score at or above ``thresholds.hold`` is held, and so on.
THRESHOLD_ACTIONS: tuple[Action, ...] = (Action.HOLD, Action.REJECT)
#: The actions that keep a comment from being published as it came.
FLAGGED_ACTIONS = frozenset(THRESHOLD_ACTIONS)


def parse_action(value) -> Action:
    """``value`` (str or bytes) as an :class:`Action`; ``ValueError`` naming the allowed values otherwise.

    Examples
    --------
    >>> parse_action(b"hold")
    <Action.HOLD: 'hold'>
    """
    text = value.decode("utf-8", "replace") if isinstance(value, bytes) else value
    try:
        return Action(text)
    except ValueError:
        raise ValueError(f"action must be one of {[a.value for a in ACTIONS]}, got {value!r}") from None
