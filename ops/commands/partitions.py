"""``seawall partitions``: where producers send each comment, for the configured number of partitions.

Prints, for ``keys.partitions`` = K (``--partitions`` overrides it), every
partition's index, hash tag, the Redis Cluster slot of that tag, the run of
slots the tag was chosen in, and the stream key a producer XADDs to.  With
``--id ID`` it prints only the partition and stream of that comment id.  A
producer in any language follows the same formula: the partition of a comment
is MurmurHash3 x86 32-bit of its id's UTF-8 bytes, seed 0, unsigned, mod K
(see worker/partitions.py).  Nothing here talks to Redis.
"""
from __future__ import annotations

import argparse
import json
import sys

from ops.connection import add_connection_args


def register(sub) -> None:
    parser = sub.add_parser("partitions", help="print each partition's hash tag, slots and stream key (for producers)",
                            description=__doc__.split("\n\n", 1)[1],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_args(parser)
    parser.add_argument("--partitions", type=int, metavar="K", default=None,
                        help="number of partitions (default: keys.partitions from the environment or config file)")
    parser.add_argument("--prefix", metavar="PREFIX", default=None, help="key prefix (default: keys.prefix)")
    parser.add_argument("--id", metavar="ID", action="append", default=None, dest="ids",
                        help="print the partition and stream of this comment id (repeatable)")
    parser.add_argument("--json", action="store_true", help="one JSON object per line instead of a table")
    parser.set_defaults(func=run)


def partition_rows(keys) -> list[dict]:
    """One row per partition: index, tag, tag slot, slot range (inclusive) and stream key (pure)."""
    from worker.partitions import SLOTS, key_slot

    k = keys.partitions
    rows = []
    for part in keys.parts:
        p = part.index
        rows.append({"partition": p, "tag": part.tag, "slot": key_slot(part.comments),
                     "slots": [p * SLOTS // k, (p + 1) * SLOTS // k - 1], "stream": part.comments})
    return rows


def id_rows(keys, ids) -> list[dict]:
    """The partition and stream of each comment id (pure)."""
    return [{"id": cid, "partition": keys.partition_of(cid), "stream": keys.part_of(cid).comments} for cid in ids]


def run(args) -> int:
    from ops.connection import config_from_args

    overrides = {"keys.partitions": args.partitions, "keys.prefix": args.prefix}
    keys = config_from_args(args, overrides).keys
    out = sys.stdout
    rows = id_rows(keys, args.ids) if args.ids else partition_rows(keys)
    if args.json:
        for row in rows:
            out.write(json.dumps(row) + "\n")
        return 0
    if args.ids:
        for row in rows:
            out.write(f"{row['id']}\tpartition {row['partition']}\t{row['stream']}\n")
        return 0
    out.write(f"{keys.partitions} partition(s); partition of a comment = murmur3_32(id, seed 0) mod "
              f"{keys.partitions}\n")
    out.write(f"{'partition':>9}  {'tag':<8} {'slot':>5}  {'slots':<13} stream\n")
    for row in rows:
        low, high = row["slots"]
        out.write(f"{row['partition']:>9}  {row['tag'] or '-':<8} {row['slot']:>5}  {f'{low}-{high}':<13} "
                  f"{row['stream']}\n")
    return 0
