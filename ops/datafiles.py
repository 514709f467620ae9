"""Labelled comments in JSON Lines files, read with errors that name file and line.

One example per line: ``{"text": str, "label": "spam"|"ham"}`` (or 1|0) plus optional
``id``, ``site`` and ``author``.  Blank lines are skipped.  Every problem is a
:class:`model.errors.DataError` whose message names the file and the line, so
the command line can print it on one line and the user can go straight there.
"""
from __future__ import annotations

import json
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from model.errors import DataError
from worker.labels import label_value, parse_label

OPTIONAL_FIELDS = ("id", "site", "author")


@dataclass(frozen=True)
class Example:
    """One labelled comment and where it came from."""

    text: str
    label: int
    id: str | None = None
    site: str | None = None
    author: str | None = None
    source: str = ""


def iter_lines(path: str | Path, op: str):
    """``(number, line)`` of a UTF-8 text file, numbered from 1 (``-`` reads standard input).

    Lines end at ``\n`` only: texts may hold U+2028 and other separators.
    """
    if str(path) == "-":
        yield from _numbered(sys.stdin.buffer, "stdin", op)
        return
    try:
        fh = open(path, "rb")
    except FileNotFoundError:
        raise DataError(f"{op}: {path}: no such file; check the path") from None
    except IsADirectoryError:
        raise DataError(f"{op}: {path}: is a directory; pass a JSON Lines file") from None
    except OSError as exc:
        raise DataError(f"{op}: {path}: cannot read it ({exc.strerror or exc})") from None
    with fh:
        yield from _numbered(fh, path, op)


def _numbered(fh, name, op: str):
    for number, raw in enumerate(fh, start=1):
        try:
            yield number, raw.decode("utf-8")
        except UnicodeDecodeError:
            raise DataError(f"{op}: {name}:{number}: not valid UTF-8; save the file as UTF-8") from None


def parse_object(line: str, where: str, op: str, *, wanted: str = '"text" and "label"') -> dict:
    """One JSON Lines line as a JSON object; :class:`DataError` naming the line otherwise."""
    try:
        record = json.loads(line)
    except json.JSONDecodeError as exc:
        raise DataError(f"{op}: {where}: malformed JSON ({exc.msg} at column {exc.colno}); fix or remove the line") from None
    if not isinstance(record, dict):
        raise DataError(f"{op}: {where}: expected a JSON object with {wanted}, got {type(record).__name__}")
    return record


def parse_line(line: str, where: str, op: str) -> Example | None:
    """One JSON Lines record as an :class:`Example`; ``None`` for a blank line."""
    if not line.strip():
        return None
    record = parse_object(line, where, op)
    text = record.get("text")
    if not isinstance(text, str):
        what = "missing" if text is None else f"a {type(text).__name__}, not a string"
        raise DataError(f"{op}: {where}: \"text\" is {what}")
    if "label" not in record:
        raise DataError(f"{op}: {where}: missing \"label\"; use \"spam\" or \"ham\"")
    try:
        label = label_value(parse_label(record["label"]))
    except ValueError:
        raise DataError(f"{op}: {where}: unknown label {record['label']!r}; use \"spam\" or \"ham\" (or 1 or 0)") from None
    extras = {}
    for name in OPTIONAL_FIELDS:
        value = record.get(name)
        extras[name] = None if value is None else str(value)
    return Example(text=text, label=label, source=where, **extras)


def read_examples(paths: Iterable[str | Path], *, op: str = "read data") -> list[Example]:
    """Every example in ``paths``, in order.

    Raises
    ------
    DataError
        For a missing or unreadable file, invalid UTF-8, a malformed JSON line,
        a missing text, a missing or unknown label, or no examples at all.
    """
    paths = [Path(p) for p in paths]
    if not paths:
        raise DataError(f"{op}: no data files given; pass one or more JSON Lines files")
    examples: list[Example] = []
    for path in paths:
        for number, line in iter_lines(path, op):
            example = parse_line(line, f"{path}:{number}", op)
            if example is not None:
                examples.append(example)
    if not examples:
        names = ", ".join(str(p) for p in paths)
        raise DataError(f"{op}: {names}: no examples (every line is blank); add labelled comments")
    return examples


def require_both_classes(examples: list[Example], paths, *, op: str) -> None:
    """Raise :class:`DataError` unless the examples hold both spam and ham."""
    n_spam = sum(e.label for e in examples)
    if n_spam == 0 or n_spam == len(examples):
        only = "spam" if n_spam else "ham"
        names = ", ".join(str(p) for p in paths)
        raise DataError(
            f"{op}: {names}: all {len(examples)} examples are {only}; both spam and ham are needed"
        )
