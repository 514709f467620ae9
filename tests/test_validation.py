"""Every way an input entry can be bad ends as one dead letter with a specific reason."""
from __future__ import annotations

import pytest
from hypothesis import given, settings, strategies as st

from worker.streams import Entry
from worker.validation import Comment, DeadLetter, Limits, cut_utf8, validate

LIMITS = Limits(max_text_bytes=100, max_fields=6, max_id_bytes=16, max_meta_bytes=32, deadletter_field_bytes=24)


def entry(*pairs, sid=b"1-0"):
    return Entry(sid, tuple((k.encode() if isinstance(k, str) else k, v.encode() if isinstance(v, str) else v)
                            for k, v in pairs))


def test_a_good_entry_becomes_a_comment():
    got = validate(entry(("id", "c1"), ("text", "hello there"), ("site", "a.example"), ("author", "u1"), ("ts", "17")),
                   LIMITS)
    assert got == Comment(stream_id="1-0", id="c1", text="hello there", site="a.example", author="u1", ts="17")


def test_optional_fields_default_to_empty_and_unknown_fields_are_ignored():
    got = validate(entry(("text", "hi"), ("id", "c1"), ("lang", "en")), LIMITS)
    assert isinstance(got, Comment) and got.site == "" and got.author == ""


@pytest.mark.parametrize(
    "pairs,reason",
    [
        ((("text", "hi"),), "missing_id"),
        ((("id", ""), ("text", "hi")), "missing_id"),
        ((("id", "c1"),), "missing_text"),
        ((("id", "c1"), ("text", b"caf\xe9")), "invalid_utf8"),
        ((("id", b"\xff"), ("text", "hi")), "invalid_utf8"),
        ((("id", "c1"), ("text", "x" * 101)), "text_too_large"),
        ((("id", "c1"), ("text", "é" * 51)), "text_too_large"),
        (tuple((f"f{i}", "v") for i in range(7)), "too_many_fields"),
        ((("id", "c1"), ("text", "")), "empty_text"),
        ((("id", "c1"), ("text", " \t\n\u3000")), "empty_text"),
        ((("id", "c1"), ("text", "a"), ("text", "b")), "duplicate_field"),
        ((("id", "c" * 17), ("text", "hi")), "id_too_large"),
        ((("id", "c1"), ("text", "hi"), ("site", "s" * 33)), "field_too_large"),
    ],
    ids=["no-id", "empty-id", "no-text", "latin1-text", "latin1-id", "text-101-bytes", "text-102-utf8-bytes",
         "seven-fields", "empty-text", "whitespace-text", "text-twice", "long-id", "long-site"],
)
def test_bad_entries_are_dead_letters_with_their_reason(pairs, reason):
    got = validate(entry(*pairs), LIMITS)
    assert isinstance(got, DeadLetter)
    assert got.reason == reason
    assert got.stream_id == "1-0"
    assert got.detail


def test_text_at_the_limit_is_accepted():
    assert isinstance(validate(entry(("id", "c1"), ("text", "x" * 100)), LIMITS), Comment)


def test_deleted_and_odd_entries():
    assert validate(Entry(b"1-0", None), LIMITS).reason == "trimmed"
    assert validate(Entry(b"1-0", ((b"id", b"x"),), odd=True), LIMITS).reason == "malformed"


def test_dead_letter_keeps_original_fields_cut_to_size():
    got = validate(entry(("id", "c1"), ("text", "y" * 500)), LIMITS)
    fields = got.as_fields("seawall:comments")
    assert fields["reason"] == "text_too_large"
    assert fields["source"] == "seawall:comments"
    assert fields["stream_id"] == "1-0"
    assert fields["id"] == "c1"
    assert fields["text"] == "y" * 24
    assert fields["truncated"] == "1"


def test_too_many_fields_keeps_only_the_first_ones():
    got = validate(entry(*((f"f{i}", "v") for i in range(50))), LIMITS)
    fields = got.as_fields("src")
    assert [k for k in fields if k.startswith("f")] == [f"f{i}" for i in range(6)]
    assert fields["truncated"] == "1"


def test_invalid_bytes_are_shown_escaped_in_the_dead_letter():
    fields = validate(entry(("id", "c1"), ("text", b"ab\xffcd")), LIMITS).as_fields("src")
    assert fields["text"] == "ab\\xffcd"


def test_original_fields_never_overwrite_the_reason():
    got = validate(entry(("reason", "forged"), ("source", "me"), ("text", "hi")), LIMITS)
    fields = got.as_fields("src")
    assert fields["reason"] == "missing_id"
    assert fields["source"] == "src"
    assert fields["orig_reason"] == "forged" and fields["orig_source"] == "me"


@pytest.mark.parametrize(
    "raw,limit,expected",
    [(b"abcdef", 10, ("abcdef", False)), (b"abcdef", 3, ("abc", True)),
     ("aé".encode(), 2, ("a", True)), ("€€".encode(), 4, ("€", True)), (b"\xff\xff", 1, ("\\xff", True))],
    ids=["short", "ascii-cut", "cut-inside-2-byte-char", "cut-inside-3-byte-char", "invalid-byte"],
)
def test_cut_utf8_stops_on_a_character_boundary(raw, limit, expected):
    assert cut_utf8(raw, limit) == expected


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.binary(max_size=40), st.binary(max_size=120)), max_size=10))
def test_validate_never_raises_and_always_decides(pairs):
    got = validate(Entry(b"9-9", tuple(pairs)), LIMITS)
    assert isinstance(got, (Comment, DeadLetter))
    if isinstance(got, DeadLetter):
        for name, value in got.as_fields("src").items():
            name.encode("utf-8")
            value.encode("utf-8")
