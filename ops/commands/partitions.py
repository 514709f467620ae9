"""``seawall partitions``: where producers send each comment, for the configured number of partitions.

Prints, for ``keys.partitions`` = K (``--partitions`` overrides it), every
partition's index, hash tag, the Redis Cluster slot of that tag, the run of
slots the tag was chosen in, and the stream key a producer XADDs to.  With
``--id ID`` it prints only the partition and stream of that comment id.  A
producer in any language follows the same formula: the partition of a comment
is MurmurHash3 x86 32-bit of its id's UTF-8 bytes, seed 0, unsigned, mod K
(see worker/partitions.py).  Printing talks to no Redis.

``--move-from OLD_K`` is the one step of changing K that touches Redis: after
the old comment streams are drained, it moves the held comments, cached texts
and done markers from the OLD_K layout to the configured one (``--dry-run``
counts them first; see the README, "Changing the number of partitions").
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
    parser.add_argument("--move-from", type=int, metavar="OLD_K", default=None,
                        help="move held comments, cached texts and done markers from the OLD_K layout to this one "
                             "(after the old comment streams are drained)")
    parser.add_argument("--from-prefix", metavar="OLD_PREFIX", default=None,
                        help="with --move-from: the old layout's key prefix, when it differs (e.g. '{seawall}:')")
    parser.add_argument("--dry-run", action="store_true", help="with --move-from: count what would move, move nothing")
    parser.add_argument("--force", action="store_true",
                        help="with --move-from: move even though an old comment stream still has entries in flight")
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


def move(config, old_k: int, *, old_prefix: str, dry_run: bool, force: bool, out) -> int:
    from model.errors import SeawallError
    from ops.connection import connect
    from ops.repartition import move_partition_state
    from worker.settings import Keys

    try:
        old = Keys(prefix=old_prefix, partitions=old_k)
    except ValueError as exc:
        raise SeawallError(f"--move-from: {exc}") from None
    client = connect(config)
    report = move_partition_state(client, old, config.keys, dry_run=dry_run, force=force)
    if report.undrained and not force:
        streams = ", ".join(f"{s} (lag {lag}, pending {pending})" for s, (lag, pending) in report.undrained.items())
        raise SeawallError(f"the old comment streams are not drained: {streams}; stop the producers and let the "
                           "workers finish first (or pass --force)")
    verb = "would move" if dry_run else "moved"
    out.write(f"{verb} from {old_k} to {config.keys.partitions} partition(s): {report.held} held comment(s), "
              f"{report.text} cached text(s), {report.done} done marker(s), {report.pending} pending decision(s), "
              f"{report.shared} shared key(s) (registry, feedback, labels, ...)"
              + (f"; {report.kept} left in place (the new name existed)" if report.kept else "") + "\n")
    return 0


def run(args) -> int:
    from ops.connection import config_from_args

    overrides = {"keys.partitions": args.partitions, "keys.prefix": args.prefix}
    config = config_from_args(args, overrides)
    keys = config.keys
    out = sys.stdout
    if args.move_from is not None:
        return move(config, args.move_from, old_prefix=args.from_prefix or config.keys.prefix, dry_run=args.dry_run,
                    force=args.force, out=out)
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
    out.write(f"moderators' labels go to one stream, whatever the partition: {keys.feedback}\n")
    return 0
