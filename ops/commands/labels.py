"""``seawall labels export FILE.jsonl`` / ``seawall labels import FILE.jsonl``.

One JSON object per line: ``{"id", "text", "label": "spam"|"ham", "moderator",
"reason", "site", "ts"}``; ``label`` may also be 1 (spam) or 0 (ham).  Export
writes the labelled store oldest first (``-`` is standard output).  Import
checks the whole file before it writes anything, then appends every record
to the labelled store (source ``import``) and takes those comments off the
hold queue, as feedback would.
"""
from __future__ import annotations

import contextlib
import json
import sys
import time
from pathlib import Path

from model.errors import DataError
from ops.connection import add_connection_args, config_from_args, connect

EXPORTED = ("id", "text", "label", "moderator", "reason", "site", "ts", "source")


def register(sub) -> None:
    parser = sub.add_parser("labels", help="export or import the labelled store as JSON lines")
    inner = parser.add_subparsers(dest="labels_command", metavar="ACTION", required=True)
    exp = inner.add_parser("export", help="write every label, oldest first, to FILE.jsonl (- for stdout)")
    exp.add_argument("file", metavar="FILE.jsonl")
    imp = inner.add_parser("import", help="append the labels of FILE.jsonl to the labelled store")
    imp.add_argument("file", metavar="FILE.jsonl")
    for p in (exp, imp):
        p.add_argument("--json", action="store_true", help="print the result as JSON")
        add_connection_args(p)
    exp.set_defaults(func=run_export)
    imp.set_defaults(func=run_import)


def parse_label_line(line: str, where: str, *, text_max_bytes: int, now: float):
    """One JSONL line -> a :class:`worker.labels.LabelRecord` (pure); raises DataError naming the line."""
    from ops.datafiles import parse_object
    from worker.feedback import ID_MAX_BYTES, NAME_MAX_BYTES, REASON_MAX_BYTES
    from worker.labels import LabelRecord, parse_label

    obj = parse_object(line, where, "labels import", wanted='"id", "text" and "label"')
    comment_id = str(obj.get("id", "")).strip()
    text = obj.get("text")
    if not comment_id or len(comment_id.encode()) > ID_MAX_BYTES:
        raise DataError(f"labels import: {where}: id missing or longer than {ID_MAX_BYTES} bytes")
    if not isinstance(text, str) or not text.strip():
        raise DataError(f"labels import: {where}: text missing or empty")
    if len(text.encode("utf-8", "surrogatepass")) > text_max_bytes:
        raise DataError(f"labels import: {where}: text over retrain.feedback_text_max_bytes={text_max_bytes}")
    moderator = str(obj.get("moderator") or "")
    reason = str(obj.get("reason") or "")
    if len(moderator.encode()) > NAME_MAX_BYTES or len(reason.encode()) > REASON_MAX_BYTES:
        raise DataError(f"labels import: {where}: moderator or reason too long")
    ts = obj.get("ts", now)
    try:
        ts = float(ts)
    except (TypeError, ValueError):
        raise DataError(f"labels import: {where}: ts must be epoch seconds, got {ts!r}") from None
    try:
        label = parse_label(obj.get("label"))
    except ValueError as exc:
        raise DataError(f"labels import: {where}: {exc}") from None
    return LabelRecord(id=comment_id, text=text, label=label, moderator=moderator, reason=reason,
                       site=str(obj.get("site") or ""), ts=f"{ts:.3f}", source="import")


def read_label_file(path: str, *, text_max_bytes: int, now: float) -> list:
    """Every record of a label file (``-``: standard input), checked before anything is written."""
    from ops.datafiles import iter_lines

    return [parse_label_line(line, f"{path}:{number}", text_max_bytes=text_max_bytes, now=now)
            for number, line in iter_lines(path, "labels import") if line.strip()]


def run_import(args) -> int:
    from worker.labels import append_label

    config = config_from_args(args)
    records = read_label_file(args.file, text_max_bytes=config.retrain.feedback_text_max_bytes, now=time.time())
    client = connect(config)
    for i in range(0, len(records), 500):
        chunk = records[i:i + 500]
        # A labelled comment leaves its partition's hold queue (idempotent), then the labels go in one
        # MULTI on the shared keys: no transaction spans a partition and the labelled store.
        release = client.pipeline(transaction=False)
        for record in chunk:
            release.zrem(config.keys.part_of(record.id).held, record.id)
        release.execute()
        pipe = client.pipeline(transaction=True)
        for record in chunk:
            append_label(client, config.keys, record, labels_max=config.retrain.labels_max, pipeline=pipe)
        pipe.execute()
    if args.json:
        print(json.dumps({"imported": len(records), "file": args.file}))
    else:
        print(f"labels import: {len(records)} labels from {args.file}")
    return 0


def run_export(args) -> int:
    from worker.labels import scan_labels

    config = config_from_args(args)
    client = connect(config)
    try:
        handle = contextlib.nullcontext(sys.stdout) if args.file == "-" else Path(args.file).open("w", encoding="utf-8")
    except OSError as exc:
        raise DataError(f"labels export: cannot write {args.file}: {exc.strerror}") from None
    n = 0
    with handle as out_file:
        for _sid, record in scan_labels(client, config.keys):
            fields = record.as_fields()
            out = {k: fields[k] for k in EXPORTED}
            out["ts"] = float(out["ts"] or 0)
            out_file.write(json.dumps(out, ensure_ascii=False) + "\n")
            n += 1
    summary = {"exported": n, "file": args.file}
    if args.file != "-":
        print(json.dumps(summary) if args.json else f"labels export: {n} labels to {args.file}")
    return 0
