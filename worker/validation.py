"""Turn one raw stream entry into a :class:`Comment`, or say why it is dead.

Pure functions, no Redis.  Every entry ends as exactly one of the two: bad
input is never dropped silently, it becomes a :class:`DeadLetter` carrying a
specific reason and the original fields cut to a safe size.  Reasons:

``missing_id``, ``missing_text``, ``invalid_utf8``, ``text_too_large``,
``too_many_fields``, ``empty_text``, ``duplicate_field`` (a field name given
twice, so which value counts would be a guess), ``id_too_large``,
``field_too_large`` (site, author or ts over ``max_meta_bytes``), ``malformed``
(an odd number of field items), ``trimmed`` (the entry was deleted from the
stream before it was scored).  The consumer adds ``poison`` and ``score_error``.
"""
from __future__ import annotations

from dataclasses import dataclass

from worker.streams import Entry

REQUIRED = ("id", "text")
OPTIONAL = ("site", "author", "ts")
# Dead-letter fields the worker writes itself; original fields of the same name are kept as "orig_<name>".
RESERVED = frozenset({"reason", "detail", "stream_id", "source", "truncated"})
MAX_FIELD_NAME_BYTES = 64
# Field names a detail lists (names, never values: details are logged, and a value may be comment text).
NAMES_SHOWN = 8
NAME_SHOWN_CHARS = 32


@dataclass(frozen=True, slots=True)
class Limits:
    """Input limits, taken from :class:`worker.settings.WorkerSettings`."""

    max_text_bytes: int = 65_536
    max_fields: int = 16
    max_id_bytes: int = 256
    max_meta_bytes: int = 1024
    deadletter_field_bytes: int = 1024

    @classmethod
    def from_settings(cls, settings) -> "Limits":
        return cls(**{name: getattr(settings, name) for name in cls.__dataclass_fields__})


@dataclass(frozen=True, slots=True)
class Comment:
    stream_id: str
    id: str
    text: str
    site: str = ""
    author: str = ""
    ts: str = ""


@dataclass(frozen=True, slots=True)
class DeadLetter:
    """Why an entry cannot be scored, and what it held (already cut to size)."""

    stream_id: str
    reason: str
    detail: str
    fields: tuple[tuple[str, str], ...]
    truncated: bool = False

    def as_fields(self, source: str) -> dict[str, str]:
        """The flat field map written to the dead-letter stream."""
        out = {"reason": self.reason, "detail": self.detail, "stream_id": self.stream_id, "source": source}
        for name, value in self.fields:
            key = f"orig_{name}" if name in RESERVED else name
            while key in out:
                key = "orig_" + key
            out[key] = value
        if self.truncated:
            out["truncated"] = "1"
        return out


def cut_utf8(raw: bytes, limit: int) -> tuple[str, bool]:
    """``raw`` as text of at most about ``limit`` bytes, invalid bytes shown as ``\\xNN``.

    The cut backs off to a character boundary, so a valid text stays valid.
    """
    cut = len(raw) > limit
    if cut:
        end = limit
        while end > 0 and end > limit - 3 and (raw[end] & 0xC0) == 0x80:
            end -= 1
        raw = raw[:end]
    return raw.decode("utf-8", "backslashreplace"), cut


def dead_letter(entry: Entry, reason: str, detail: str, limits: Limits) -> DeadLetter:
    kept = []
    truncated = False
    pairs = entry.fields or ()
    if len(pairs) > limits.max_fields:
        pairs = pairs[: limits.max_fields]
        truncated = True
    for name, value in pairs:
        name_s, cut_name = cut_utf8(name, MAX_FIELD_NAME_BYTES)
        value_s, cut_value = cut_utf8(value, limits.deadletter_field_bytes)
        truncated = truncated or cut_name or cut_value
        kept.append((name_s, value_s))
    return DeadLetter(entry.stream_id.decode("ascii", "backslashreplace"), reason, detail, tuple(kept), truncated)


def comment_dead_letter(comment: Comment, reason: str, detail: str, limits: Limits) -> DeadLetter:
    """A dead letter for a comment that passed validation but failed later (e.g. ``score_error``)."""
    fields = (("id", comment.id), ("text", comment.text), ("site", comment.site),
              ("author", comment.author), ("ts", comment.ts))
    entry = Entry(comment.stream_id.encode(), tuple((k.encode(), v.encode()) for k, v in fields if v or k == "text"))
    return dead_letter(entry, reason, detail, limits)


def shown_name(name: str) -> str:
    """A producer's field name as a detail shows it: printable, cut, quoted (pure)."""
    safe = "".join(ch if ch.isprintable() else "?" for ch in name)
    return repr(safe if len(safe) <= NAME_SHOWN_CHARS else safe[:NAME_SHOWN_CHARS - 1] + "…")


def field_names(names, *, wanted: str = "") -> str:
    """What a detail says about the fields an entry had: their names, cut and made printable (pure).

    With ``wanted`` (``"id"`` or ``"text"``), a name that differs from it only
    in case is pointed out, since that is the usual mistake.
    """
    shown = [shown_name(name) for name in sorted(names)[:NAMES_SHOWN]]
    if not shown:
        return "the entry has no fields"
    more = len(names) - len(shown)
    text = "the entry has field" + ("s " if len(names) > 1 else " ") + ", ".join(shown)
    text += f" and {more} more" if more > 0 else ""
    near = next((n for n in sorted(names) if wanted and n != wanted and n.lower() == wanted), None)
    if near is not None:
        text += f"; field names are case-sensitive: send {wanted!r}, not {shown_name(near)}"
    return text


def validate(entry: Entry, limits: Limits) -> Comment | DeadLetter:
    """Check one entry against the input contract; never raises on any entry."""
    if entry.fields is None:
        return dead_letter(entry, "trimmed", "the entry was deleted from the stream before it was scored", limits)
    if entry.odd:
        return dead_letter(entry, "malformed", "the entry has an odd number of field items", limits)
    pairs = entry.fields
    if len(pairs) > limits.max_fields:
        return dead_letter(entry, "too_many_fields", f"{len(pairs)} fields, limit {limits.max_fields}", limits)
    decoded: dict[str, str] = {}
    sizes: dict[str, int] = {}
    for name, value in pairs:
        try:
            key = name.decode("utf-8")
            text = value.decode("utf-8")
        except UnicodeDecodeError:
            shown, _ = cut_utf8(name, MAX_FIELD_NAME_BYTES)
            return dead_letter(entry, "invalid_utf8", f"field {shown!r} is not valid UTF-8", limits)
        if key in decoded:
            return dead_letter(entry, "duplicate_field", f"field {key[:MAX_FIELD_NAME_BYTES]!r} appears more than once", limits)
        decoded[key] = text
        sizes[key] = len(value)
    comment_id = decoded.get("id")
    if not comment_id:
        return dead_letter(entry, "missing_id", "required field 'id' is missing or empty; "
                           + field_names(decoded, wanted="id" if "id" not in decoded else ""), limits)
    if "text" not in decoded:
        return dead_letter(entry, "missing_text", "required field 'text' is missing; "
                           + field_names(decoded, wanted="text"), limits)
    id_bytes = sizes["id"]
    if id_bytes > limits.max_id_bytes:
        return dead_letter(entry, "id_too_large", f"id is {id_bytes} bytes, limit {limits.max_id_bytes}", limits)
    text = decoded["text"]
    text_bytes = sizes["text"]
    if text_bytes > limits.max_text_bytes:
        return dead_letter(entry, "text_too_large", f"text is {text_bytes} bytes, limit {limits.max_text_bytes}", limits)
    if not text.strip():
        return dead_letter(entry, "empty_text", "text is empty or only whitespace", limits)
    for name in OPTIONAL:
        if sizes.get(name, 0) > limits.max_meta_bytes:
            return dead_letter(entry, "field_too_large", f"field {name!r} is over {limits.max_meta_bytes} bytes", limits)
    return Comment(
        stream_id=entry.stream_id.decode("ascii", "replace"),
        id=comment_id,
        text=text,
        site=decoded.get("site", ""),
        author=decoded.get("author", ""),
        ts=decoded.get("ts", ""),
    )
