"""Parsing of raw stream replies, with no server: the shapes come from the Redis docs
for XREADGROUP, XAUTOCLAIM (6.2 and 7.0 forms), XPENDING (extended form) and XINFO GROUPS."""
from __future__ import annotations

import pytest

from worker.streams import (
    Entry,
    StreamReplyError,
    parse_entry,
    parse_xautoclaim,
    parse_xinfo_group,
    parse_xpending_range,
    parse_xreadgroup,
    stream_id_ms,
)

STREAM = b"seawall:comments"


def test_resp2_xreadgroup_keeps_field_order_and_duplicates():
    reply = [[STREAM, [[b"1-0", [b"id", b"a", b"text", b"hi", b"text", b"again"]], [b"2-0", [b"id", b"b"]]]]]
    entries = parse_xreadgroup(reply, STREAM)
    assert entries == [
        Entry(b"1-0", ((b"id", b"a"), (b"text", b"hi"), (b"text", b"again"))),
        Entry(b"2-0", ((b"id", b"b"),)),
    ]


def test_resp3_map_reply_gives_the_same_entries():
    resp2 = [[STREAM, [[b"1-0", [b"id", b"a", b"text", b"hi"]]]]]
    resp3 = {STREAM: [[b"1-0", [b"id", b"a", b"text", b"hi"]]]}
    assert parse_xreadgroup(resp2, STREAM) == parse_xreadgroup(resp3, STREAM)


@pytest.mark.parametrize("reply", [None, [], {}], ids=["timeout-nil", "empty-array", "empty-map"])
def test_an_empty_read_is_not_an_error(reply):
    assert parse_xreadgroup(reply, STREAM) == []


def test_other_streams_in_the_reply_are_ignored():
    reply = [[b"other", [[b"9-0", [b"x", b"y"]]]], [STREAM, [[b"1-0", [b"id", b"a"]]]]]
    assert [e.stream_id for e in parse_xreadgroup(reply, STREAM)] == [b"1-0"]


def test_deleted_pending_entry_has_no_fields():
    reply = [[STREAM, [[b"5-0", None]]]]
    assert parse_xreadgroup(reply, STREAM) == [Entry(b"5-0", None)]


def test_odd_field_count_is_flagged_not_raised():
    entry = parse_entry([b"3-0", [b"id", b"a", b"text"]])
    assert entry.odd and entry.fields == ((b"id", b"a"),)


def test_invalid_utf8_stays_bytes():
    entry = parse_entry([b"3-0", [b"text", b"\xff\xfe"]])
    assert entry.fields == ((b"text", b"\xff\xfe"),)


@pytest.mark.parametrize(
    "reply",
    [42, [[STREAM]], [[STREAM, [[b"1-0"]]]], [[STREAM, [[b"1-0", 7]]]], [[STREAM, [[b"1-0", [b"id", 3]]]]]],
    ids=["not-array", "stream-without-entries", "entry-without-fields", "fields-not-array", "value-not-bulk"],
)
def test_malformed_replies_raise(reply):
    with pytest.raises(StreamReplyError):
        parse_xreadgroup(reply, STREAM)


def test_xautoclaim_redis7_reports_deleted_ids():
    reply = [b"0-0", [[b"1-0", [b"id", b"a", b"text", b"t"]]], [b"2-0", b"3-0"]]
    claimed = parse_xautoclaim(reply)
    assert claimed.cursor == b"0-0"
    assert [e.stream_id for e in claimed.entries] == [b"1-0"]
    assert claimed.deleted == [b"2-0", b"3-0"]


def test_xautoclaim_redis62_inline_deleted_entries():
    reply = [b"7-0", [[b"1-0", [b"id", b"a"]], [b"2-0", None]]]
    claimed = parse_xautoclaim(reply)
    assert claimed.cursor == b"7-0"
    assert [e.stream_id for e in claimed.entries] == [b"1-0"]
    assert claimed.deleted == [b"2-0"]


@pytest.mark.parametrize("reply", [None, [b"0-0"], [b"0-0", [], [], []]], ids=["nil", "one-element", "four-elements"])
def test_xautoclaim_bad_shapes_raise(reply):
    with pytest.raises(StreamReplyError):
        parse_xautoclaim(reply)


def test_xpending_rows():
    rows = parse_xpending_range([[b"1-0", b"w1", 1500, 3], [b"2-0", b"w2", b"20", b"1"]])
    assert [(r.stream_id, r.consumer, r.idle_ms, r.deliveries) for r in rows] == [
        (b"1-0", b"w1", 1500, 3),
        (b"2-0", b"w2", 20, 1),
    ]
    assert parse_xpending_range([]) == []


@pytest.mark.parametrize("reply", [[[b"1-0", b"w1", 5]], [[b"1-0", b"w1", b"x", 1]], b"nope"],
                         ids=["short-row", "non-integer", "not-array"])
def test_xpending_bad_rows_raise(reply):
    with pytest.raises(StreamReplyError):
        parse_xpending_range(reply)


def test_xinfo_groups_picks_the_group():
    reply = [
        [b"name", b"other", b"consumers", 1, b"pending", 9, b"last-delivered-id", b"0-0", b"entries-read", 1, b"lag", 4],
        [b"name", b"seawall:workers", b"consumers", 2, b"pending", 3, b"last-delivered-id", b"5-0",
         b"entries-read", 5, b"lag", 11],
    ]
    assert parse_xinfo_group(reply, "seawall:workers") == {"pending": 3, "lag": 11}
    assert parse_xinfo_group(reply, "missing") == {"pending": 0, "lag": None}


@pytest.mark.parametrize("sid,ms", [(b"1700000000123-0", 1700000000123), ("5-17", 5)], ids=["bytes", "str"])
def test_stream_id_ms(sid, ms):
    assert stream_id_ms(sid) == ms


def test_stream_id_ms_rejects_garbage():
    with pytest.raises(StreamReplyError):
        stream_id_ms(b"abc")
