"""The label record and the labelled store: what moderators said about comments.

A label is ``spam`` or ``ham``; :func:`parse_label` is the one reader of a
label anywhere (feedback entries, label files, training data, replay sets),
and it also takes ``1`` and ``0``.  The labelled store is a bounded Redis
stream (``Keys.labels``) of :class:`LabelRecord` entries, appended by the
feedback consumer and ``seawall labels import``, read in order by
:func:`scan_labels` (the retrain and ``seawall labels export``).
"""
from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import astuple, dataclass, fields
from typing import Literal

from worker.settings import Keys

SPAM = "spam"
HAM = "ham"
LABELS = (SPAM, HAM)
_SPELLINGS = {SPAM: SPAM, HAM: HAM, "1": SPAM, "0": HAM}


def parse_label(value) -> str:
    """``spam`` or ``ham`` from ``spam``/``ham`` (any case, outer blanks ignored), ``1``/``0``, or bytes of those.

    Raises ``ValueError`` for anything else (``True``/``False`` included: a
    label file says what it means).

    Examples
    --------
    >>> [parse_label(v) for v in (" SPAM ", b"ham", 1, "0")]
    ['spam', 'ham', 'spam', 'ham']
    """
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    if type(value) is int:
        value = str(value)
    label = _SPELLINGS.get(value.strip().lower()) if isinstance(value, str) else None
    if label is None:
        raise ValueError(f"label must be spam, ham, 1 or 0, got {value!r}")
    return label


def label_value(label: str) -> int:
    """1 for spam, 0 for ham (a label already parsed)."""
    return 1 if label == SPAM else 0


def label_name(value: int) -> str:
    """``spam`` for 1, ``ham`` for 0: a 0/1 label as moderators and files spell it."""
    return SPAM if value else HAM


@dataclass(frozen=True, slots=True)
class LabelRecord:
    """One entry of the labelled store; every field is a string, as Redis keeps it.

    ``ts`` is epoch seconds; ``source`` is ``feedback`` or ``import``;
    ``feedback_id`` the feedback entry's stream id (empty for an import).
    """

    id: str
    text: str
    label: Literal["spam", "ham", ""]  # "" only for a stored entry whose label does not parse
    moderator: str = ""
    reason: str = ""
    site: str = ""
    ts: str = ""
    source: str = "feedback"
    feedback_id: str = ""

    def as_fields(self) -> dict[str, str]:
        """The stream entry, fields in declaration order."""
        return dict(zip(_FIELDS, astuple(self)))

    @classmethod
    def from_fields(cls, entry: Mapping) -> "LabelRecord":
        """A stored entry (bytes or str) as a record; a label that does not parse is kept as ``""``."""
        text = {_text(k): _text(v) for k, v in entry.items()}
        try:
            label = parse_label(text.get("label", ""))
        except ValueError:
            label = ""
        return cls(**{name: text.get(name, "") for name in _FIELDS if name not in ("label", "source")},
                   label=label, source=text.get("source", ""))

    @property
    def usable(self) -> bool:
        """Whether a retrain can learn from it: an id, a label and some text."""
        return bool(self.id and self.label and self.text.strip())


_FIELDS = tuple(f.name for f in fields(LabelRecord))


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def append_label(client, keys: Keys, record: LabelRecord, *, labels_max: int, pipeline=None):
    """Append one record to the labelled store, trimmed to ``labels_max`` entries (oldest first out)."""
    pipe = pipeline if pipeline is not None else client.pipeline(transaction=True)
    pipe.xadd(keys.labels, record.as_fields(), maxlen=labels_max, approximate=False)
    if pipeline is None:
        return pipe.execute()
    return None


def iter_label_records(entries: Iterable[tuple]) -> Iterable[tuple[str, LabelRecord]]:
    """Decode ``XRANGE`` entries of the labelled store (pure)."""
    for sid, entry in entries:
        yield _text(sid), LabelRecord.from_fields(entry)


def scan_labels(client, keys: Keys, *, start: str = "-", end: str = "+", chunk: int = 1000):
    """Yield ``(stream_id, LabelRecord)`` of the labelled store in order, ``chunk`` entries per XRANGE.

    ``start`` may be exclusive (``"(1700000000000-0"``), as XRANGE allows.
    """
    cursor = start
    while True:
        entries = list(iter_label_records(client.xrange(keys.labels, min=cursor, max=end, count=chunk)))
        yield from entries
        if len(entries) < chunk:
            return
        cursor = "(" + entries[-1][0]
