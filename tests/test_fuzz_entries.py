"""Fuzzed stream entries: every malformed entry ends as a dead letter with the reason of its defect.

A hypothesis strategy builds entries of one *defect class* each (or none):
random bytes and invalid UTF-8, huge values, missing and extra fields, too
many fields, a field given twice, whitespace-only text; the valid ones carry
control characters, bidirectional overrides, emoji, NUL bytes and reserved
field names.  Each entry's expected outcome is known from how it was built,
so the check is exact: a valid entry gets exactly one verdict, a defective
one exactly one dead letter whose ``reason`` names that defect.

Two runs against a real redis-server: >= 10,000 entries through the worker's
batch processing in-process (fast), and a smaller run, with a few extreme
entries, through a real ``seawall serve`` subprocess.
"""
from __future__ import annotations

import json
import random
import time
from collections import Counter

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from faults_kit import KEYS, group_pending, read_stream, write_model
from kit import Worker, stop_all, wait_until
from worker.connection import connect
from worker.consumer import StreamConsumer
from worker.redistransport import redis_consumer
from worker.loader import FileModelSource
from worker.settings import WorkerSettings

pytestmark = pytest.mark.redis_server

LIMITS = {"max_text_bytes": 4096, "max_fields": 12, "max_id_bytes": 64, "max_meta_bytes": 256,
          "deadletter_field_bytes": 256}
SETTINGS = WorkerSettings(batch=256, block_ms=5, claim_every_s=3600.0, **LIMITS)
ENV = {f"SEAWALL_WORKER_{k.upper()}": str(v) for k, v in LIMITS.items()}

# Characters that break naive text handling: NUL and other controls, bidirectional overrides and
# isolates, zero-width characters, a BOM, combining marks, emoji with modifiers and joiners.
SPECIAL = ["\x00", "\x01", "\x07", "\x1b", "\x7f", "\u0085", "\u202e", "\u202d", "\u202a", "\u2066", "\u2067",
           "\u2069", "\u200b", "\u200d", "\u200e", "\ufeff", "\u0301", "\u0336", "😀", "👍🏽", "👩‍💻", "🇳🇴",
           "\U0010fffd", "\ufffd", "ﬁ", "Ａ", "\r\n", "\t"]
WHITESPACE = " \t\n\r\x0b\x0c\x1c\x1d\x1e\x1f\x85\xa0\u1680\u2000\u2003\u2009\u200a\u2028\u2029\u202f\u205f\u3000"
# Byte sequences that are invalid UTF-8 wherever they stand.
INVALID = [b"\xff", b"\xfe", b"\xc0\xaf", b"\xc1\xbf", b"\xed\xa0\x80", b"\xf5\x80\x80\x80", b"\xf8\x88\x80\x80\x80"]
RESERVED_NAMES = ["reason", "detail", "stream_id", "source", "truncated"]
CLASSES = ["verdict", "invalid_utf8", "missing_id", "missing_text", "id_too_large", "text_too_large",
           "field_too_large", "too_many_fields", "duplicate_field", "empty_text"]



# Code point ranges the noise is drawn from: ASCII, C0/C1 controls, Latin, the rest of the BMP
# (surrogates excluded: they cannot be UTF-8), and the astral planes (emoji, private use).
RANGES = [(0x20, 0x7E), (0x00, 0x1F), (0x80, 0x9F), (0xA0, 0x24F), (0x250, 0xD7FF), (0xE000, 0xFFFD),
          (0x1F300, 0x1FAFF), (0x10000, 0x10FFFF)]


class Noise:
    """Fast random text for one entry, from a seed hypothesis draws.

    Drawing every character through hypothesis costs about a millisecond each;
    hypothesis draws the structure of each entry (its defect class, which
    field, which sizes and names) and one seed, and the characters come from
    a PRNG seeded with it, so 10,000 entries generate in seconds and every
    run is still reproducible from hypothesis's choices.
    """

    def __init__(self, seed: int):
        self.rng = random.Random(seed)

    def text(self, max_size: int) -> str:
        rng = self.rng
        out = []
        for _ in range(rng.randint(0, max_size)):
            if rng.random() < 0.2:
                out.append(rng.choice(SPECIAL))
            else:
                lo, hi = rng.choice(RANGES)
                out.append(chr(rng.randint(lo, hi)))
        return "".join(out)

    def visible(self, max_size: int) -> str:
        """Noise around at least one character that is not whitespace."""
        return self.text(max_size // 2) + self.rng.choice("abcxyz0129éßЖ漢😀") + self.text(max_size // 2)

    def whitespace(self, max_size: int) -> str:
        return "".join(self.rng.choice(WHITESPACE) for _ in range(self.rng.randint(0, max_size)))


def _b(value: str) -> bytes:
    return value.encode("utf-8")


def valid_fields(noise: Noise, *, extras_max: int = 4) -> list[tuple[bytes, bytes]]:
    """id (filled in at send time), text, some of site/author/ts, and a few extra fields, shuffled."""
    rng = noise.rng
    fields = [(b"id", b""), (b"text", _b(noise.visible(60)))]
    for name in ("site", "author", "ts"):
        if rng.random() < 0.5:
            fields.append((_b(name), _b(noise.text(16))))
    names = {rng.choice(RESERVED_NAMES + ["lang", "x"]) if rng.random() < 0.5 else "x_" + noise.visible(6)
             for _ in range(rng.randint(0, extras_max))}
    fields += [(_b(n), _b(noise.text(16))) for n in sorted(names)]
    rng.shuffle(fields)
    return fields


def _replace(fields, name: bytes, value: bytes):
    return [(n, value if n == name else v) for n, v in fields]


@st.composite
def fuzzed_entry(draw) -> tuple[list[tuple[bytes, bytes]], str, str]:
    """``(fields, expected outcome, id suffix)``: the id is ``f<n>-<suffix>`` unless the class says otherwise."""
    kind = draw(st.sampled_from(CLASSES))
    noise = Noise(draw(st.integers(0, 2**32 - 1)))
    fields = valid_fields(noise)
    suffix = noise.text(4)
    if kind == "invalid_utf8":
        victim = draw(st.integers(0, len(fields) - 1))
        name, value = fields[victim]
        bad = draw(st.binary(max_size=8)) + draw(st.sampled_from(INVALID)) + draw(st.binary(max_size=8))
        if name != b"id" and draw(st.booleans()):
            fields[victim] = (b"x_" + bad, value)  # a field name that is not UTF-8
        else:
            fields[victim] = (name, value + bad) if name != b"id" else (name, bad)
    elif kind == "missing_id":
        fields = [(n, v) for n, v in fields if n != b"id"]
        if draw(st.booleans()):
            fields.append((b"id", b""))  # present but empty counts as missing
    elif kind == "missing_text":
        fields = [(n, v) for n, v in fields if n != b"text"]
    elif kind == "id_too_large":
        suffix = draw(st.sampled_from(["x", "é", "😀"])) * draw(st.integers(LIMITS["max_id_bytes"], 300))
    elif kind == "text_too_large":
        unit = noise.visible(40)
        limit = LIMITS["max_text_bytes"]
        size = draw(st.sampled_from([limit + 1, 2 * limit, 16 * limit]))  # the 8 MiB one is in extreme_entries
        fields = _replace(fields, b"text", _b(unit * (size // len(_b(unit)) + 1)))  # whole characters, still UTF-8
    elif kind == "field_too_large":
        name = draw(st.sampled_from([b"site", b"author", b"ts"]))
        fields = [(n, v) for n, v in fields if n != name]
        fields.append((name, b"s" * draw(st.integers(LIMITS["max_meta_bytes"] + 1, 4 * LIMITS["max_meta_bytes"]))))
    elif kind == "too_many_fields":
        count = draw(st.integers(LIMITS["max_fields"] + 1, 3 * LIMITS["max_fields"]))
        fields = fields + [(f"x_many{i}".encode(), b"v") for i in range(count - len(fields))]
    elif kind == "duplicate_field":
        name, value = draw(st.sampled_from(fields))
        fields.append((name, value if draw(st.booleans()) else _b(noise.text(16))))
        noise.rng.shuffle(fields)
    elif kind == "empty_text":
        fields = _replace(fields, b"text", _b(noise.whitespace(30)))
    return fields, kind, suffix


class Sender:
    """XADDs fuzzed entries and remembers each one's expected outcome by stream id."""

    def __init__(self, client):
        self.client = client
        self.expected: dict[bytes, str] = {}
        self.n = 0

    def send(self, entries) -> None:
        pipe = self.client.pipeline(transaction=False)
        for fields, kind, suffix in entries:
            self.n += 1
            args = []
            for name, value in fields:
                if name == b"id" and value == b"" and kind != "missing_id":
                    value = f"f{self.n}-{suffix}".encode()
                args += [name, value]
            pipe.execute_command("XADD", KEYS.comments, "*", *args)
        for sid, (_fields, kind, _suffix) in zip(pipe.execute(), entries):
            self.expected[sid] = kind


def outcomes(client) -> tuple[Counter, dict, list]:
    verdicts = Counter(fields[b"stream_id"] for _sid, fields in read_stream(client, KEYS.verdicts))
    dead: dict[bytes, list[bytes]] = {}
    rows = []
    for _sid, fields in read_stream(client, KEYS.deadletter):
        dead.setdefault(fields[b"stream_id"], []).append(fields[b"reason"])
        rows.append(fields)
    return verdicts, dead, rows


def check_outcomes(client, expected: dict[bytes, str]) -> Counter:
    """Every entry in exactly one place with exactly the expected reason; returns the reasons seen."""
    verdicts, dead, rows = outcomes(client)
    wrong = []
    for sid, kind in expected.items():
        got_v, got_d = verdicts.get(sid, 0), dead.get(sid, [])
        if kind == "verdict":
            if (got_v, got_d) != (1, []):
                wrong.append((sid, kind, got_v, got_d))
        elif (got_v, got_d) != (0, [kind.encode()]):
            wrong.append((sid, kind, got_v, got_d))
    assert not wrong, f"{len(wrong)} entries ended wrongly, e.g. {wrong[:5]}"
    assert sum(verdicts.values()) + len(rows) == len(expected)
    for fields in rows:
        assert fields[b"source"] == KEYS.comments.encode()
        # Cut to the limit, invalid bytes then shown as \xNN: at most 4 characters per byte kept.
        assert all(len(v) <= 4 * LIMITS["deadletter_field_bytes"] for k, v in fields.items() if k != b"detail")
        fields[b"stream_id"].decode("ascii")
        for k, v in fields.items():  # dead letters are always valid UTF-8, whatever came in
            k.decode("utf-8"), v.decode("utf-8")
    return Counter(expected.values())


def drain(consumer: StreamConsumer) -> int:
    total = 0
    while True:
        result = consumer.step()
        total += result.read
        if result.read == 0:
            return total


@pytest.mark.slow
def test_ten_thousand_fuzzed_entries_through_the_batch_processing(redis_server, tmp_path):
    client = connect(redis_server.url)
    model = write_model(tmp_path / "model.bin")
    consumer = redis_consumer(client=client, keys=KEYS, settings=SETTINGS, model_source=FileModelSource(path=model),
                              consumer="fuzz")
    consumer.prepare()
    sender = Sender(client)
    queued = []
    t0 = time.monotonic()

    @settings(max_examples=520, deadline=None, database=None, derandomize=True, phases=[Phase.generate],
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much])
    @given(st.lists(fuzzed_entry(), min_size=20, max_size=20))
    def run(entries):
        timings["generate"] += time.monotonic() - timings.pop("mark", time.monotonic())
        queued.extend(entries)
        if len(queued) >= SETTINGS.batch:
            sender.send(queued)
            queued.clear()
            drain(consumer)
        timings["mark"] = time.monotonic()

    timings = {"generate": 0.0}
    run()
    sender.send(queued)
    drain(consumer)
    seconds = time.monotonic() - t0
    admin = redis_server.client()
    assert group_pending(admin) == 0
    classes = check_outcomes(admin, sender.expected)
    print("faults:", json.dumps({"test": "fuzz_in_process", "entries": len(sender.expected), "crashes": 0,
                                 "classes": dict(sorted(classes.items())), "seconds": round(seconds, 1),
                                 "generating_seconds": round(timings["generate"], 1)}))
    assert len(sender.expected) >= 10_000
    assert set(classes) == set(CLASSES) and min(classes.values()) >= 500


def extreme_entries(n0: int) -> list[tuple[list[tuple[bytes, bytes]], str, str]]:
    """A few entries no strategy should be trusted to reach: 8 MiB text, 1,000 fields, a 1 MiB field name."""
    return [
        ([(b"id", b""), (b"text", b"spam " * (8 * 2**20 // 5))], "text_too_large", "huge"),
        ([(b"id", b""), (b"text", b"ok")] + [(f"f{i}".encode(), b"v") for i in range(1000)], "too_many_fields", "wide"),
        ([(b"id", b""), (b"text", b"ok"), (b"\xff" * 2**20, b"v")], "invalid_utf8", "name"),
        ([(b"id", b""), (b"text", b"\x00" * 100)], "verdict", "nul"),
        ([(b"id", b""), (b"text", "\u202e\u2066 evil 🇳🇴 \u200d".encode())], "verdict", "bidi"),
        ([(b"id", b""), (b"text", bytes(range(256)))], "invalid_utf8", "bytes"),
    ]


@pytest.mark.slow
def test_fuzzed_entries_through_a_real_worker_process(redis_server, tmp_path):
    client = redis_server.client()
    model = write_model(tmp_path / "model.bin")
    worker = Worker(url=redis_server.url, name="fuzz-w", log_dir=tmp_path, model_path=model, env=ENV).start()
    sender = Sender(client)
    collected = []

    @settings(max_examples=60, deadline=None, database=None, derandomize=True, phases=[Phase.generate],
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much])
    @given(st.lists(fuzzed_entry(), min_size=20, max_size=20))
    def collect(entries):
        collected.extend(entries)

    collect()
    try:
        sender.send(extreme_entries(0))
        for i in range(0, len(collected), 200):
            sender.send(collected[i:i + 200])
        total = len(sender.expected)
        done = wait_until(lambda: client.xlen(KEYS.verdicts) + client.xlen(KEYS.deadletter) >= total
                          and group_pending(client) == 0, timeout=120, interval=0.2)
        assert done, worker.output()[-3000:]
        assert worker.alive(), worker.output()[-3000:]
    finally:
        codes = stop_all([worker])
    classes = check_outcomes(client, sender.expected)
    print("faults:", json.dumps({"test": "fuzz_worker_process", "entries": len(sender.expected), "crashes": 0,
                                 "classes": dict(sorted(classes.items()))}))
    assert codes == [0] and "Traceback" not in worker.output()
    assert len(sender.expected) >= 1000 and set(classes) == set(CLASSES)
