"""What a worker reports as it runs, for metrics and logs to pick up.

The worker calls these hooks; ops/metrics.py implements them with
prometheus-client on an injected registry.  Hooks must be quick and must not
raise: they run on the worker's hot path.  ``on_verdicts`` gets one dict per
verdict actually written (a duplicate skipped by the exactly-once guard is
not reported), with at least ``id``, ``site``, ``action``, ``score``,
``model`` and ``latency_s`` (XADD of the comment to its verdict, from the
server's clock in the two stream ids).
"""
from __future__ import annotations

from typing import Protocol, runtime_checkable


@runtime_checkable
class WorkerObserver(Protocol):
    def on_batch(self, size: int, seconds: float) -> None: ...

    def on_verdicts(self, verdicts: list[dict]) -> None: ...

    def on_deadletter(self, reason: str) -> None: ...

    def on_model(self, version: str, created_at: float) -> None: ...

    def on_lag(self, lag: int | None, pending: int, partitions: int | None = None) -> None: ...

    def on_reconnect(self) -> None: ...


class NullObserver:
    """Reports nothing."""

    def on_batch(self, size: int, seconds: float) -> None:
        pass

    def on_verdicts(self, verdicts: list[dict]) -> None:
        pass

    def on_deadletter(self, reason: str) -> None:
        pass

    def on_model(self, version: str, created_at: float) -> None:
        pass

    def on_lag(self, lag: int | None, pending: int, partitions: int | None = None) -> None:
        pass

    def on_reconnect(self) -> None:
        pass
