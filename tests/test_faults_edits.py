"""SIGKILL real workers while comments are edited mid-stream: exactly one verdict per (id, text version)."""
from __future__ import annotations

import json
import random
from collections import Counter, defaultdict

import pytest

from faults_kit import (
    KEYS,
    comment_text,
    deadletters,
    group_pending,
    kill_mid_batch,
    kills_on_fresh_backlogs,
    read_stream,
    slice_of,
    start_workers,
    wait_for_verdicts,
)
from kit import stop_all, wait_until
from worker.commit import text_digest

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]

COMMENTS = 4_000
KILLS = 8


def edited(k: int, version: int) -> str:
    """Version ``version`` (2, 3) of comment ``k``: the kind of edit spammers make after a publish."""
    if version == 2:
        return comment_text(k) + " edit: free bonus at prize.invalid"
    return comment_text(k) + " edited again, sorry"


def entries(rng: random.Random) -> list[dict]:
    """Every comment, then (a chunk later) edits of a quarter of them and of some edits, with
    producer retries of originals and edits mixed in, in the order a site would send them."""
    out, later = [], []
    for start in range(0, COMMENTS, 200):
        out.extend(later)
        later = []
        for k in range(start, start + 200):
            out.append({"id": f"c{k}", "text": comment_text(k)})
            if k % 4 == 0:
                later.append({"id": f"c{k}", "text": edited(k, 2)})
            if k % 16 == 0:
                later.append({"id": f"c{k}", "text": edited(k, 3)})
            if k % 10 == 3:
                later.append({"id": f"c{k}", "text": comment_text(k)})           # a retried XADD
            if k % 40 == 8:
                later.append({"id": f"c{k}", "text": edited(k, 2)})              # a retried edit
        rng.shuffle(later)  # edits and retries of a chunk arrive in any order, after the chunk itself
    out.extend(later)
    return out


def send(client, numbered: list[tuple[int, dict]]) -> None:
    """XADD the numbered entries in order, in one pipeline."""
    pipe = client.pipeline(transaction=False)
    for i, e in numbered:
        pipe.xadd(KEYS.comments, {**e, "site": f"site{i % 3}.example"})
    pipe.execute()


def test_sigkills_while_comments_are_edited_give_one_verdict_per_version(redis_server, tmp_path):
    client = redis_server.client()
    rng = random.Random(12)
    sent = entries(rng)
    versions_sent = defaultdict(list)  # id -> distinct texts in the order they were first sent
    for e in sent:
        if e["text"] not in versions_sent[e["id"]]:
            versions_sent[e["id"]].append(e["text"])
    expected = sum(len(v) for v in versions_sent.values())
    workers = start_workers(redis_server.url, tmp_path,
                            env={"SEAWALL_WORKER_MAX_DELIVERIES": "1000", "SEAWALL_WAVES_ENABLED": "0"})
    kills = []
    try:
        # The entries go in slices, one before each kill, in the order a site sends them.
        numbered = list(enumerate(sent))
        kills = [held for _name, held in kills_on_fresh_backlogs(
            workers, rng, kills=KILLS,
            feed=lambda k: send(client, [numbered[i] for i in slice_of(len(numbered), k, KILLS + 2)]),
            kill=lambda k: kill_mid_batch(client, workers, rng, k))]
        wait_for_verdicts(client, expected)
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60)
    finally:
        codes = stop_all(workers)
    per_version = Counter()
    versions = defaultdict(dict)  # id -> {version: digest}
    for _sid, f in read_stream(client, KEYS.verdicts):
        cid, version, digest = f[b"id"].decode(), int(f[b"version"]), f[b"digest"].decode()
        per_version[(cid, digest)] += 1
        assert (f.get(b"edit") == b"1") == (version > 1)
        assert version not in versions[cid], (cid, version)
        versions[cid][version] = digest
    print("faults:", json.dumps({"test": "worker_kills_with_edits", "entries": len(sent), "versions": expected,
                                 "kills": len(kills), "kills_mid_batch": sum(1 for h in kills if h > 0),
                                 "duplicates": sum(n - 1 for n in per_version.values()),
                                 "pending": group_pending(client)}))
    assert max(per_version.values()) == 1                                          # nothing doubled
    assert set(per_version) == {(i, text_digest(t)) for i, texts in versions_sent.items() for t in texts}  # nothing lost
    assert all(sorted(v) == list(range(1, len(v) + 1)) for v in versions.values())  # versions 1..k, no gap
    assert client.xlen(KEYS.verdicts) == expected
    assert group_pending(client) == 0 and deadletters(client) == []
    assert sum(1 for h in kills if h > 0) >= KILLS // 2, kills
    assert codes == [0, 0]
