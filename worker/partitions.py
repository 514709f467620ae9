"""Partitions of the comment stream: which partition a comment belongs to, and each partition's hash tag.

A deployment may split its comment stream into ``K`` partitions
(``keys.partitions``) so that it can span a Redis Cluster: every key that one
comment's commit touches (its partition's comment and verdict streams, hold
queue, dead-letter stream, per-minute counts, and the comment's ``text`` and
``done`` keys) carries the partition's hash tag, so the commit stays in one
hash slot, and different partitions land on different shards.

Two formulas, simple enough for a producer in any language to follow:

* **The partition of a comment** is ``murmur3_32(id) mod K``: MurmurHash3
  x86 32-bit of the comment id's UTF-8 bytes, seed 0, read as an unsigned
  integer (:func:`partition_of`).  K = 1 puts every comment in partition 0.
* **The hash tag of partition p** is the first of ``p<p>``, ``p<p>.1``,
  ``p<p>.2``, ... whose Redis Cluster hash slot (CRC16-XMODEM of the tag,
  mod 16384, as the cluster specification defines it) lies in
  ``[floor(p * 16384 / K), floor((p + 1) * 16384 / K))`` (:func:`partition_tag`).
  A cluster made by ``redis-cli --cluster create`` gives each primary one
  contiguous, equal run of slots, so K partitions on K primaries put one
  partition on each.  Partition p's keys start with ``<prefix>{<tag>}:``,
  for example ``seawall:{p1.4}:comments`` (K = 3).

K = 1 keeps the names of a single stream (``seawall:comments``, ``seawall:text:<id>``),
so a deployment that does not partition sees no change.  ``seawall partitions``
prints every partition's stream key for producers that cannot run Python.
"""
from __future__ import annotations

import functools

import mmh3

SLOTS = 16_384  # hash slots of a Redis Cluster (cluster specification)
MAX_PARTITIONS = 256


def check_partitions(partitions: int) -> int:
    if isinstance(partitions, bool) or not isinstance(partitions, int) or not 1 <= partitions <= MAX_PARTITIONS:
        raise ValueError(f"partitions must be an integer between 1 and {MAX_PARTITIONS}, got {partitions!r}")
    return partitions


def partition_of(comment_id: str | bytes, partitions: int) -> int:
    """The partition of ``comment_id``: MurmurHash3 x86 32-bit (seed 0, unsigned) of its UTF-8 bytes, mod K.

    >>> partition_of("c-1", 1)
    0
    >>> [partition_of(f"c-{i}", 4) for i in range(6)]
    [3, 2, 0, 1, 0, 3]
    """
    if partitions == 1:
        return 0
    data = comment_id.encode("utf-8") if isinstance(comment_id, str) else bytes(comment_id)
    return mmh3.hash(data, 0, signed=False) % partitions


def key_slot(key: str | bytes) -> int:
    """The Redis Cluster hash slot of ``key`` (CRC16-XMODEM of its hash tag or whole name, mod 16384)."""
    from redis.crc import key_slot as _slot

    return _slot(key.encode("utf-8") if isinstance(key, str) else bytes(key), SLOTS)


@functools.lru_cache(maxsize=4_096)
def partition_tag(partition: int, partitions: int) -> str:
    """The hash tag (without braces) of ``partition`` out of ``partitions``; see the module docstring.

    >>> partition_tag(0, 3), partition_tag(1, 3), partition_tag(2, 3)
    ('p0.1', 'p1.4', 'p2.4')
    """
    check_partitions(partitions)
    if not 0 <= partition < partitions:
        raise ValueError(f"partition must be in [0, {partitions}), got {partition!r}")
    low, high = partition * SLOTS // partitions, (partition + 1) * SLOTS // partitions
    n = 0
    while True:
        tag = f"p{partition}" if n == 0 else f"p{partition}.{n}"
        if low <= key_slot(tag) < high:
            return tag
        n += 1


def stream_key(keys, comment_id: str | bytes) -> str:
    """The stream a producer XADDs comment ``comment_id`` to: its partition's ``comments`` stream.

    ``keys`` is the deployment's :class:`worker.settings.Keys`.

    >>> from worker.settings import Keys
    >>> stream_key(Keys(), "c-1"), stream_key(Keys(partitions=3), "c-1")
    ('seawall:comments', 'seawall:{p2.4}:comments')
    """
    return keys.part_of(comment_id).comments


def _field(fields, name: str):
    for key in (name, name.encode()):
        if key in fields:
            return fields[key]
    return None


def send_comment(client, keys, fields, *, maxlen: int | None = None, pipeline=None):
    """XADD one comment (a flat field map with at least ``id``) to the stream of its partition.

    Returns the new entry's stream id; with ``pipeline`` the XADD is queued
    there (nothing is executed) and ``None`` is returned.  ``maxlen`` caps the
    stream approximately (``MAXLEN ~``).  A producer in another language does
    the same: ``XADD <stream_key> * id <id> text <text> ...``.
    """
    comment_id = _field(fields, "id")
    if not isinstance(comment_id, (str, bytes)) or not comment_id:
        raise ValueError(f"send_comment: fields need a non-empty 'id' (str or bytes), got {comment_id!r}")
    if maxlen is not None and (isinstance(maxlen, bool) or not isinstance(maxlen, int) or maxlen < 1):
        raise ValueError(f"send_comment: maxlen must be a positive integer or None, got {maxlen!r}")
    target = pipeline if pipeline is not None else client
    reply = target.xadd(stream_key(keys, comment_id), fields, maxlen=maxlen, approximate=maxlen is not None)
    return None if pipeline is not None else reply
