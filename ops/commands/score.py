"""``seawall score``: score comments given as arguments, or read from stdin.

Stdin holds one comment per line: either plain text or a JSON object with a
``text`` field (and optionally ``id`` and ``site``).  Each comment prints its
score, the action (publish / hold / reject) and its top tokens.  Actions come
from the same router as ``seawall serve``'s, with the same settings
(``worker.hold_fpr``, ``worker.hold_floor``, ... and ``worker.site_thresholds``,
from ``SEAWALL_*`` variables and the config file).

Comments go through the model :data:`CHUNK` at a time: stdin is read a batch
of lines at a time, a batch whose lines are all JSON objects is parsed in one
``orjson`` call, and each batch's output is written at once.  Only numpy is
needed at run time (no scikit-learn, no scipy).
"""
from __future__ import annotations

import sys
from collections.abc import Iterator
from itertools import islice

from model.actions import THRESHOLD_ACTIONS
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


def _line_batches(stream, size: int) -> Iterator[list[bytes]]:
    """Lists of up to ``size`` raw lines (bytes) of a text stream, read through its binary buffer."""
    binary = getattr(stream, "buffer", None)
    if binary is None:  # a text stream without a buffer (a StringIO in a test)
        lines = (line.encode("utf-8", "surrogatepass") for line in stream)
    else:
        lines = iter(binary)
    while batch := list(islice(lines, size)):
        yield batch


def parse_lines(lines: list[bytes], first_number: int) -> tuple[list, list[str], list[str]]:
    """Ids, texts and sites of a batch of stdin lines; blank lines are skipped.

    A line is a JSON object when it starts with ``{`` (after blanks), else
    plain UTF-8 text.  ``first_number`` is the line number of ``lines[0]``,
    for error messages.

    Raises
    ------
    DataError
        On a malformed JSON line, one without a string ``text``, or text
        that is not UTF-8; the message names the line.

    Examples
    --------
    >>> parse_lines([b'{"id": 7, "text": "hi", "site": "a.example"}\\n', b"\\n", b"plain words\\n"], 1)
    ([7, None], ['hi', 'plain words'], ['a.example', ''])
    """
    import orjson

    if all(line[:1] == b"{" for line in lines):  # the usual case: JSON Lines, parsed in one call
        try:
            records = orjson.loads(b"[" + b",".join(lines) + b"]")
        except orjson.JSONDecodeError:
            pass  # find the bad line below
        else:
            texts = [record.get("text") if type(record) is dict else None for record in records]
            # One record per line (a line "{...}, {...}" would parse as two) and every text a string.
            if len(records) == len(lines) and all(type(text) is str for text in texts):
                return ([record.get("id") for record in records], texts,
                        [str(record.get("site") or "") for record in records])
    ids: list = []
    texts: list[str] = []
    sites: list[str] = []
    for number, line in enumerate(lines, start=first_number):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped[:1] == b"{":
            try:
                record = orjson.loads(stripped)
            except orjson.JSONDecodeError as exc:
                raise DataError(f"score: stdin:{number}: malformed JSON ({exc})") from None
            text = record.get("text") if isinstance(record, dict) else None
            if not isinstance(text, str):
                raise DataError(f"score: stdin:{number}: a JSON line needs a string \"text\" field")
            ids.append(record.get("id"))
            texts.append(text)
            sites.append(str(record.get("site") or ""))
        else:
            try:
                texts.append(line.rstrip(b"\r\n").decode("utf-8"))
            except UnicodeDecodeError:
                raise DataError(f"score: stdin:{number}: the line is not UTF-8 text") from None
            ids.append(None)
            sites.append("")
    return ids, texts, sites


def json_lines(ids: list, scores, decisions: list, reasons: list, version: str) -> bytes:
    """One JSON object per comment, newline-terminated, as bytes.

    Scores are rounded to 6 decimals (in one numpy call); contributions are
    written as the model gives them (each ``(token, contribution)`` pair
    becomes a two-element array), since rounding them costs a Python call each.
    """
    import numpy as np
    import orjson

    dumps = orjson.dumps
    out = [dumps({"score": score, "action": d.action, "rule": d.rule, "reasons": why, "model": version}
                 if ident is None else
                 {"score": score, "action": d.action, "rule": d.rule, "reasons": why, "model": version, "id": ident})
           for ident, score, d, why in zip(ids, np.round(scores, 6).tolist(), decisions, reasons)]
    out.append(b"")
    return b"\n".join(out)


def text_lines(ids: list, scores, decisions: list, reasons: list) -> bytes:
    """``[id<TAB>]score<TAB>action<TAB>top tokens`` per comment, as UTF-8 bytes."""
    out = []
    for ident, score, decision, why in zip(ids, scores, decisions, reasons):
        action = decision.action
        tokens = "  ".join(f"{tok} {c:+.3f}" for tok, c in why)
        prefix = f"{ident}\t" if ident is not None else ""
        out.append(f"{prefix}{score:.4f}\t{action}\t{tokens}\n")
    return "".join(out).encode("utf-8", "surrogatepass")


def run(args) -> int:
    from model.classifier import EmbeddingClassifier
    from ops.config import load_config
    from worker.routing import Router, score_and_decide

    config = load_config(config_file=args.config)
    clf = EmbeddingClassifier.load(args.model)
    fixed = {a: getattr(args, a) for a in THRESHOLD_ACTIONS if getattr(args, a) is not None}
    try:
        router = Router.for_model(clf, config.worker, fixed=fixed)
    except ValueError as exc:
        raise DataError(f"score: {exc}") from None
    if args.texts:
        batches = (([None] * len(chunk), chunk, [""] * len(chunk)) for chunk in
                   (args.texts[i:i + CHUNK] for i in range(0, len(args.texts), CHUNK)))
    else:
        batches = _parsed(sys.stdin)
    top_k = max(args.top, 0)
    version = clf.version
    sys.stdout.flush()
    out = getattr(sys.stdout, "buffer", None)
    for ids, texts, sites in batches:
        if not texts:
            continue
        scores, decisions, reasons = score_and_decide(clf, router, texts, sites, top_k=top_k)
        data = json_lines(ids, scores, decisions, reasons, version) if args.json else \
            text_lines(ids, scores, decisions, reasons)
        if out is not None:
            out.write(data)
        else:
            sys.stdout.write(data.decode("utf-8", "surrogatepass"))
    if out is not None:
        out.flush()
    return 0


def _parsed(stream) -> Iterator[tuple[list, list[str], list[str]]]:
    number = 1
    for lines in _line_batches(stream, CHUNK):
        yield parse_lines(lines, number)
        number += len(lines)
