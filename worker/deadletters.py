"""Dead letters in the log: an operator hears about bad input without a line per entry.

Every dead letter is in the dead-letter stream with its reason, detail and
fields.  The log says that they happen: the first dead letter of a reason is
logged at WARNING at once, with its detail; more of the same reason within
``interval_s`` are counted, and one line per reason reports the count when
the interval is over (at the next :meth:`DeadLetterLog.add` of that reason or
:meth:`DeadLetterLog.flush`, which the loops call every turn).  So a producer
that sends a million broken entries costs one line per reason per interval.

Details name fields and sizes, never field values, so no comment text reaches
the log this way (see :func:`worker.validation.field_names`).
"""
from __future__ import annotations

import logging
import time
from collections.abc import Callable

DEFAULT_INTERVAL_S = 60.0
DETAIL_CHARS = 300


class DeadLetterLog:
    """At most one WARNING line per dead-letter reason per interval, with counts.

    Parameters
    ----------
    logger : where the lines go.
    source : the stream the entries came from (named in each line).
    deadletter : the dead-letter stream's key (named in each line, where to read more).
    interval_s : the interval.
    clock : monotonic seconds, injectable for tests.
    """

    def __init__(self, *, logger: logging.Logger, source: str, deadletter: str,
                 interval_s: float = DEFAULT_INTERVAL_S, clock: Callable[[], float] = time.monotonic):
        if isinstance(interval_s, bool) or not isinstance(interval_s, (int, float)) or interval_s <= 0:
            raise ValueError(f"DeadLetterLog: bad interval_s={interval_s!r}")
        self.logger = logger
        self.source = source
        self.deadletter = deadletter
        self.interval_s = float(interval_s)
        self.clock = clock
        self._quiet_until: dict[str, float] = {}   # reason -> end of its interval
        self._counted: dict[str, int] = {}         # reason -> dead letters not logged yet
        self._latest: dict[str, str] = {}          # reason -> detail of the latest one counted

    def add(self, reason: str, detail: str = "", count: int = 1) -> None:
        """Note ``count`` dead letters of ``reason``; logs now unless this reason was logged within the interval."""
        now = self.clock()
        if now >= self._quiet_until.get(reason, 0.0):
            waiting = self._counted.pop(reason, 0)
            self._latest.pop(reason, None)
            self._line(reason, waiting + count, detail, now)
            return
        self._counted[reason] = self._counted.get(reason, 0) + count
        self._latest[reason] = detail

    def flush(self) -> None:
        """Log the counts of reasons whose interval is over."""
        if not self._counted:
            return
        now = self.clock()
        for reason in [r for r in self._counted if now >= self._quiet_until.get(r, 0.0)]:
            self._line(reason, self._counted.pop(reason), self._latest.pop(reason, ""), now)

    def _line(self, reason: str, count: int, detail: str, now: float) -> None:
        self._quiet_until[reason] = now + self.interval_s
        detail = detail if len(detail) <= DETAIL_CHARS else detail[:DETAIL_CHARS - 1] + "…"
        self.logger.warning("dead letters from %s: %d x %s%s; at most one line per reason every %gs, "
                            "the entries are in %s", self.source, count, reason,
                            f" (latest: {detail})" if detail else "", self.interval_s, self.deadletter)
