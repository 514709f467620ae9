"""Which worker reads which partition: leases, so that every partition has one active reader.

With K > 1 partitions (:mod:`worker.partitions`) the workers share them out:

* every worker heartbeats itself in the members sorted set (``keys.members``,
  score = when its heartbeat runs out, in ms); members whose heartbeat ran out
  are removed by whoever looks next, and the rest are the live workers;
* a worker holds at most ``ceil(K / live workers)`` partitions.  It takes a
  free partition with ``SET <partition's lease key> <consumer> NX PX lease_ms``,
  and renews the ones it holds with a compare-and-pexpire script (a lease that
  has meanwhile gone to another worker is not renewed: it is dropped);
* when a new worker appears the share goes down, and a worker above it gives
  back its extra partitions (compare-and-delete) at its next renewal, which
  happens between batches: the batch in hand is finished first.  The
  newcomer takes them at its next renewal, so adding a worker rebalances;
* a worker that dies stops renewing: its leases run out within ``lease_ms``,
  its heartbeat too, and the others take its partitions.  Entries it had read
  but not committed stay pending under its name, and the new owner takes them
  over with XAUTOCLAIM once they are idle ``claim_idle_ms`` (as between any two
  workers of a group); so a dead worker's partitions move within
  ``max(lease_ms, claim_idle_ms)`` plus one renewal interval.

Leases are safe to lose: the commit script writes only entries still pending
for the committing consumer, and the ``done`` markers stop a second verdict,
so two readers of one partition for a moment (a paused worker whose lease ran
out) cost duplicate work, never a duplicate verdict.

Every command touches one key (SET, a one-key script, ZADD...), so leases work
the same on a Redis Cluster.  Heartbeats use each host's clock: hosts must
agree on the time to well within ``lease_ms`` (NTP does that).
"""
from __future__ import annotations

import logging
import math
import time
import zlib
from collections.abc import Callable

from worker.settings import Keys

log = logging.getLogger("seawall.worker")

# Renew only while the lease is still this consumer's (the lock pattern of the Redis docs for SET ... NX PX).
RENEW_LUA = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('PEXPIRE', KEYS[1], ARGV[2]) end
return 0
"""
RELEASE_LUA = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('DEL', KEYS[1]) end
return 0
"""

# A lease is renewed this many times per lease_ms, so one slow renewal does not lose it.
RENEWALS_PER_LEASE = 3


def fair_share(partitions: int, live: int) -> int:
    """The most partitions one of ``live`` workers holds: ``ceil(K / live)`` (all of them when alone).

    >>> fair_share(4, 1), fair_share(4, 2), fair_share(4, 3), fair_share(4, 8)
    (4, 2, 2, 1)
    """
    return math.ceil(partitions / max(1, live))


class Leases:
    """The partitions one worker holds; :meth:`tick` keeps them (call it before each read).

    Parameters
    ----------
    client : a redis-py client (or cluster client).
    keys : the deployment's key names (``keys.partitions`` > 1 to be useful).
    consumer : this worker's consumer name (the lease's value).
    lease_ms : how long a lease and a heartbeat last without renewal.
    clock : seconds since the epoch (injectable for tests).
    """

    def __init__(self, *, client, keys: Keys, consumer: str, lease_ms: int,
                 clock: Callable[[], float] = time.time):
        if not isinstance(consumer, str) or not consumer:
            raise ValueError(f"Leases: consumer must be a non-empty string, got {consumer!r}")
        if isinstance(lease_ms, bool) or not isinstance(lease_ms, int) or lease_ms < 10:
            raise ValueError(f"Leases: lease_ms must be an integer >= 10, got {lease_ms!r}")
        self.client = client
        self.keys = keys
        self.consumer = consumer
        self.lease_ms = lease_ms
        self.clock = clock
        self.held: list[int] = []
        self._next_tick = 0.0
        self._renew = client.register_script(RENEW_LUA)
        self._release = client.register_script(RELEASE_LUA)
        # Where this worker starts looking for free partitions: spread, so that workers starting
        # together do not all race for partition 0.
        self._start = zlib.crc32(consumer.encode()) % keys.partitions

    @property
    def interval_s(self) -> float:
        """Seconds between renewals."""
        return self.lease_ms / 1000.0 / RENEWALS_PER_LEASE

    def tick(self, *, force: bool = False) -> tuple[int, ...]:
        """Heartbeat, renew, give back or take partitions when a renewal is due; the partitions held now."""
        now = self.clock()
        if not force and now < self._next_tick:
            return tuple(self.held)
        self._next_tick = now + self.interval_s
        before = tuple(self.held)
        live = self._heartbeat(now)
        self._renew_held()
        share = fair_share(self.keys.partitions, live)
        if len(self.held) > share:
            self._give_back(len(self.held) - share)
        elif len(self.held) < share:
            self._take(share - len(self.held))
        self.held.sort()
        if tuple(self.held) != before:
            log.info("consumer %s holds partitions %s of %d (%d live workers)", self.consumer,
                     ",".join(map(str, self.held)) or "none", self.keys.partitions, live)
        return tuple(self.held)

    def _heartbeat(self, now: float) -> int:
        now_ms = int(now * 1000)
        members = self.keys.members
        pipe = self.client.pipeline(transaction=False)
        pipe.zadd(members, {self.consumer: now_ms + self.lease_ms})
        pipe.zremrangebyscore(members, "-inf", now_ms)  # heartbeats that ran out: dead workers
        pipe.zcard(members)
        return int(pipe.execute()[-1])

    def _renew_held(self) -> None:
        kept = []
        for p in self.held:
            if int(self._renew(keys=[self.keys.part(p).lease], args=[self.consumer, self.lease_ms])):
                kept.append(p)
            else:
                log.warning("consumer %s lost its lease on partition %d (it ran out); another worker reads it now",
                            self.consumer, p)
        self.held = kept

    def _give_back(self, extra: int) -> None:
        # The highest-numbered ones go first.
        for p in self.held[-extra:]:
            self._release(keys=[self.keys.part(p).lease], args=[self.consumer])
        self.held = self.held[:-extra]

    def _take(self, wanted: int) -> None:
        k = self.keys.partitions
        for i in range(k):
            if wanted == 0:
                return
            p = (self._start + i) % k
            if p in self.held:
                continue
            if self.client.set(self.keys.part(p).lease, self.consumer, nx=True, px=self.lease_ms):
                self.held.append(p)
                wanted -= 1

    def release_all(self) -> None:
        """Give back every lease and leave the members (a worker stopping cleanly)."""
        for p in self.held:
            self._release(keys=[self.keys.part(p).lease], args=[self.consumer])
        self.held = []
        self.client.zrem(self.keys.members, self.consumer)
        log.info("consumer %s gave back its partitions", self.consumer)
