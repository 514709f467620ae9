"""``seawall score``: score comments given as arguments, or read from stdin.

Stdin holds one comment per line: either plain text or a JSON object with a
``text`` field (and optionally ``id`` and ``site``).  Each comment prints its
score, the action (publish / hold / reject) and its top tokens.  Actions come
from the same router as ``seawall serve``'s, with the same settings
(``worker.hold_fpr``, ``worker.hold_floor``, ... and ``worker.site_thresholds``,
from ``SEAWALL_*`` variables and the config file).
"""
from __future__ import annotations

import json
import sys

from model.errors import DataError

CHUNK = 1024


def register(sub) -> None:
    parser = sub.add_parser("score", help="score comments: probability, action and top tokens")
    parser.add_argument("--model", required=True, metavar="MODEL_FILE", help="model file written by seawall train")
    parser.add_argument("texts", nargs="*", metavar="TEXT", help="comments to score; none = read stdin")
    parser.add_argument("--json", action="store_true", help="one JSON object per comment")
    parser.add_argument("--top", type=int, default=5, help="tokens to show per comment (default 5)")
    parser.add_argument("--hold", type=float, default=None, help="a fixed hold threshold for this run")
    parser.add_argument("--reject", type=float, default=None, help="a fixed reject threshold for this run")
    parser.add_argument("--config", metavar="FILE", default=None, help="TOML config file (default: SEAWALL_CONFIG)")
    parser.set_defaults(func=run)


def _stdin_comments(stream):
    for number, line in enumerate(stream, start=1):
        line = line.rstrip("\n")
        if not line.strip():
            continue
        if line.lstrip().startswith("{"):
            try:
                record = json.loads(line)
            except json.JSONDecodeError as exc:
                raise DataError(f"score: stdin:{number}: malformed JSON ({exc.msg} at column {exc.colno})") from None
            text = record.get("text") if isinstance(record, dict) else None
            if not isinstance(text, str):
                raise DataError(f"score: stdin:{number}: a JSON line needs a string \"text\" field")
            yield record.get("id"), text, str(record.get("site") or "")
        else:
            yield None, line, ""


def _chunks(items, size):
    chunk = []
    for item in items:
        chunk.append(item)
        if len(chunk) == size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def run(args) -> int:
    from model.classifier import EmbeddingClassifier
    from ops.config import load_config
    from worker.routing import Router, score_and_decide

    config = load_config(config_file=args.config)
    clf = EmbeddingClassifier.load(args.model)
    fixed = {k: v for k, v in (("hold", args.hold), ("reject", args.reject)) if v is not None}
    try:
        router = Router.for_model(clf, config.worker, fixed=fixed)
    except ValueError as exc:
        raise DataError(f"score: {exc}") from None
    comments = ((None, t, "") for t in args.texts) if args.texts else _stdin_comments(sys.stdin)
    for chunk in _chunks(comments, CHUNK):
        scores, decisions, reasons = score_and_decide(clf, router, [text for _, text, _ in chunk],
                                                      [site for _, _, site in chunk], top_k=max(args.top, 0))
        for (ident, _, _), score, decision, why in zip(chunk, scores, decisions, reasons):
            action = decision.action
            if args.json:
                out = {"score": round(float(score), 6), "action": action, "rule": decision.rule,
                       "reasons": [[tok, round(c, 4)] for tok, c in why], "model": clf.version}
                if ident is not None:
                    out["id"] = ident
                print(json.dumps(out))
            else:
                tokens = "  ".join(f"{tok} {c:+.3f}" for tok, c in why)
                prefix = f"{ident}\t" if ident is not None else ""
                print(f"{prefix}{score:.4f}\t{action}\t{tokens}")
    return 0
