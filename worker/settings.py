"""Settings the data plane runs with, and the Redis key names it uses.

These are plain frozen dataclasses. ``ops.config`` fills them once at start-up
from the command line, the environment and an optional TOML file; nothing in
worker/ reads the environment itself.  Every field carries a ``help`` text in
its metadata, which ``seawall serve --help`` and the example config print.
"""
from __future__ import annotations

from dataclasses import dataclass, field


def setting(default, help: str, **extra):
    """A dataclass field with a help text (shown by ``--help`` and the docs)."""
    return field(default=default, metadata={"help": help, **extra})


@dataclass(frozen=True, kw_only=True)
class Keys:
    """Every Redis key name Seawall uses, derived from one prefix.

    Use a prefix with a hash tag, such as ``{seawall}:``, on Redis Cluster so
    that the streams and the keys a comment's MULTI touches share one slot.
    """

    prefix: str = "seawall:"

    def __post_init__(self):
        if not isinstance(self.prefix, str) or not self.prefix:
            raise ValueError(f"Keys: prefix must be a non-empty string, got {self.prefix!r}")

    def key(self, *parts: str) -> str:
        return self.prefix + ":".join(parts)

    @property
    def comments(self) -> str:
        return self.key("comments")

    @property
    def verdicts(self) -> str:
        return self.key("verdicts")

    @property
    def deadletter(self) -> str:
        return self.key("deadletter")

    @property
    def feedback(self) -> str:
        return self.key("feedback")

    @property
    def events(self) -> str:
        return self.key("events")

    @property
    def group(self) -> str:
        return self.key("workers")


@dataclass(frozen=True, kw_only=True)
class WorkerSettings:
    """How a stream worker reads, scores, routes and acknowledges comments."""

    consumer: str = setting("", "consumer name inside the group; empty means <hostname>-<pid>")
    batch: int = setting(256, "entries read per XREADGROUP call and scored in one model call")
    block_ms: int = setting(1000, "how long one XREADGROUP blocks waiting for entries, in milliseconds")
    processes: int = setting(1, "consumer processes to run on this host")
