"""``seawall feedback ID spam|ham``: send one moderator label to the feedback stream.

For scripts and tests; a moderation tool would XADD the same flat fields
(``id``, ``label``, optional ``moderator``, ``reason``, ``text``) itself.
It goes through the same helper as the console (:func:`worker.decisions.label_now`):
a comment still held also leaves the hold queue, and its final decision
(``ham`` publishes, ``spam`` rejects) goes to the decisions stream.

A label needs the comment's text.  Without ``--text`` the worker's cache
must hold it (``text:{id}``, kept ``worker.text_cache_ttl_s``); when it does
not (an id Seawall never scored, a typo, an expired entry) the command sends
nothing and exits 2 saying so, rather than queueing a label that could only
be dead-lettered.
"""
from __future__ import annotations

import json
import time

from model.errors import SeawallError
from ops.connection import add_connection_args, config_from_args, connect
from worker.labels import LABELS


def register(sub) -> None:
    parser = sub.add_parser("feedback", help="send one moderator label (spam|ham) for a comment id")
    parser.add_argument("id", help="the comment id")
    parser.add_argument("label", choices=LABELS, help="the moderator's decision")
    parser.add_argument("--text", default=None,
                        help="the comment text; required when Seawall has no cached text for ID "
                             "(never scored here, or older than worker.text_cache_ttl_s)")
    parser.add_argument("--moderator", default=None, help="who decided (the poisoning guard caps each one's share)")
    parser.add_argument("--reason", default=None, help="free-form note kept with the label")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    add_connection_args(parser)
    parser.set_defaults(func=run)


def feedback_fields(args) -> dict[str, str]:
    fields = {"id": args.id, "label": args.label}
    for name in ("moderator", "reason", "text"):
        value = getattr(args, name)
        if value is not None:
            fields[name] = value
    return fields


def run(args) -> int:
    from worker.decisions import label_now
    from worker.feedback import Rejected, parse_feedback

    config = config_from_args(args)
    fields = feedback_fields(args)
    checked = parse_feedback("0-0", fields, text_max_bytes=config.retrain.feedback_text_max_bytes)
    if isinstance(checked, Rejected):
        raise SeawallError(f"feedback: {checked.reason.removeprefix('feedback_').replace('_', ' ')}; "
                           "give a non-empty id, spam or ham, and a text within retrain.feedback_text_max_bytes")
    client = connect(config)
    # EXISTS is in the README's least-privilege ACL rule, so a script may run this as the worker's user.
    if "text" not in fields and not client.exists(config.keys.text(args.id)):
        raise SeawallError(f"feedback: no cached text for comment {args.id!r} (Seawall never scored that id, or its "
                           "text expired after worker.text_cache_ttl_s); nothing sent; check the id, or pass "
                           "--text with the comment's text")
    # The console's helper: its script uses only commands of that rule too (ZSCORE, ZREM, HMGET, XADD).
    sent = label_now(client, config.keys, args.id, args.label, moderator=args.moderator or "",
                     reason=args.reason or "", text=args.text, now=time.time())
    entry_id = sent["feedback_id"]
    if args.json:
        print(json.dumps({"stream_id": entry_id, "id": args.id, "label": args.label, "decided": sent["decided"]}))
    else:
        decided = "; it left the hold queue" if sent["decided"] else ""
        print(f"feedback {entry_id}: {args.id} -> {args.label}{decided}")
    return 0
