"""``seawall sample --out FILE``: invented labelled comments to start with.

Writes JSON Lines that ``seawall train``, ``models push --replay`` and
``labels import`` read: one ``{"id", "text", "label", "site", "author"}``
object per line (``label`` is ``spam`` or ``ham``).  The comments come from
the invented neighbourhood forum of ``seawall demo`` (ops/lab/scenario.py): no
real people, sites or products.

* by default, the forum's history: ordinary comments and the background spam
  every site sees (a quarter of them), for a first model;
* ``--later``: comments from after that history as moderators labelled them
  (with a ``moderator`` field, three moderators taking turns), a spam
  campaign the history never saw among them, for ``labels import`` and a
  retrain that has something to learn.

The same ``--seed`` gives the same file.
"""
from __future__ import annotations

import argparse
import itertools
import json
import sys
from pathlib import Path

from worker.labels import label_name

MODERATORS = ("mod-ana", "mod-bo", "mod-cy")
HISTORY = 3000
LATER = 600


def register(sub) -> None:
    parser = sub.add_parser("sample", help="write invented labelled comments (JSON Lines) to train and try Seawall on",
                            description=__doc__.split("\n\n", 1)[1],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", required=True, metavar="FILE.jsonl", help="where to write the comments (- for stdout)")
    parser.add_argument("--later", action="store_true",
                        help="comments after the history, labelled by moderators, a new campaign among them")
    parser.add_argument("--comments", type=int, default=None, metavar="N",
                        help=f"how many (default {HISTORY:,}, or {LATER} with --later)")
    parser.add_argument("--seed", type=int, default=7, help="seed of the invented forum (default 7)")
    parser.set_defaults(func=run)


def history(n: int, seed: int) -> list[dict]:
    """The forum's labelled history: ham and background spam, no campaign (pure)."""
    from ops.lab.scenario import Scenario

    return [_record(c) for c in Scenario(seed=seed).training_set(n)]


def later(n: int, seed: int) -> list[dict]:
    """Comments from after the history with a moderator's label; a campaign starts a third of the way in (pure)."""
    from ops.lab.scenario import Scenario

    # Ordinary traffic is one comment a second (60 a minute): the campaign starts after about n/3 of them.
    scenario = Scenario(seed=seed, wave_start_s=n / 3.0)
    rows = []
    for i, c in enumerate(itertools.islice(scenario.stream(), n)):
        rows.append(dict(_record(c), moderator=MODERATORS[i % len(MODERATORS)]))
    return rows


def _record(c) -> dict:
    return {"id": c.id, "text": c.text, "label": label_name(c.label), "site": c.site, "author": c.author}


def run(args) -> int:
    from model.errors import DataError

    n = args.comments if args.comments is not None else (LATER if args.later else HISTORY)
    if n < 10:
        raise DataError(f"sample: --comments must be at least 10, got {n}")
    rows = later(n, args.seed) if args.later else history(n, args.seed)
    lines = "".join(json.dumps(row, ensure_ascii=False) + "\n" for row in rows)
    if args.out == "-":
        sys.stdout.write(lines)
        return 0
    try:
        Path(args.out).write_text(lines, encoding="utf-8")
    except OSError as exc:
        raise DataError(f"sample: cannot write {args.out}: {exc.strerror}") from None
    spam = sum(row["label"] == "spam" for row in rows)
    what = "later comments labelled by moderators" if args.later else "comments of the forum's history"
    print(f"sample: wrote {len(rows):,} {what} to {args.out} ({spam:,} spam, {len(rows) - spam:,} ham; "
          "invented: no real people, sites or products)")
    return 0
