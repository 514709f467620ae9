"""No pickle crosses Redis in an RQ job: every job Seawall enqueues is JSON, read back raw.

RQ keeps a job's call in the ``data`` field of the hash ``rq:job:<id>``,
zlib-compressed, in whatever its serializer wrote (RQ's ``rq/job.py``,
``Job.to_dict``).  These tests read that field from a real redis-server and
decode it as JSON; a pickle would start with the PROTO opcode ``0x80`` and
fail to parse.  A forged pickled job, the attack the JSON serializer closes,
runs its code under RQ's default serializer and is refused by Seawall's worker.
"""
from __future__ import annotations

import json
import pickle
import zlib
from pathlib import Path

import pytest
from rq import Queue

from kit import run_rq_burst
from ops.cli import main
from ops.jobs import job_queue
from retrain_kit import KEYS, bootstrap, model_bytes
from test_schedule import keep_time_zone, load_schedule  # noqa: F401 - keep_time_zone is a fixture

pytestmark = pytest.mark.redis_server


def raw_job(client, job_id: str) -> dict:
    """The call stored in ``rq:job:<id>``, decoded as JSON (fails on anything else)."""
    data = zlib.decompress(client.hget(f"rq:job:{job_id}", "data"))
    assert not data.startswith(b"\x80"), "a pickle (PROTO opcode) is stored in the job record"
    return json.loads(data)


def test_the_rescore_job_a_promote_queues_is_json(redis_server, redis_client, monkeypatch, capsys):
    r = redis_client
    monkeypatch.setenv("SEAWALL_REDIS_URL", redis_server.url)  # the job reads its settings like any rq worker
    registry, first = bootstrap(r)
    second = registry.push(model_bytes(1))
    r.hset(KEYS.text("c1"), mapping={"text": "lovely allotment photos", "site": "allotments.example"})
    r.zadd(KEYS.held, {"c1": 1.0})
    listening = job_queue(r, "seawall")
    from rq import Worker

    Worker([listening], connection=r, name="idle-listener").register_birth()  # an RQ worker is up
    assert main(["models", "promote", second, "--rescore", "queue", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["rescore_mode"] == "queue" and out["rq_workers"] == 1
    func, instance, args, kwargs = raw_job(r, out["rescore_job"])
    assert (func, instance, args, kwargs) == ("ops.jobs.rescore_job", None, [], {"version": second})

    assert run_rq_burst(r)
    result = Queue("seawall", connection=r, serializer="json").fetch_job(out["rescore_job"])
    assert result.get_status() == "finished" and result.return_value()["rescored"] == 1
    verdict = r.xrange(KEYS.verdicts)[-1][1]
    assert verdict[b"id"] == b"c1" and verdict[b"rescored"] == b"1" and verdict[b"model"] == second.encode()


def test_the_nightly_retrain_the_scheduler_enqueues_is_json(redis_client, keep_time_zone):
    (cron_job,) = load_schedule(redis_client)._cron_jobs
    job = cron_job.enqueue(redis_client)  # what `rq cron ops.schedule` does at 03:00
    assert raw_job(redis_client, job.id) == ["ops.jobs.retrain_job", None, [], {}]


class Forged:
    """A pickle that runs code when it is read: it creates ``path``."""

    def __init__(self, path: Path):
        self.path = path

    def __reduce__(self):
        return (Path.touch, (self.path,))


def test_a_forged_pickled_job_cannot_run_code_in_seawalls_rq_worker(redis_client, tmp_path):
    r = redis_client
    marker = tmp_path / "code-ran"
    # Someone who can write rq:* keys plants a job the way RQ's default (pickle) serializer would.
    forged = Queue("seawall", connection=r).enqueue("builtins.print", Forged(marker))
    assert pickle.loads(zlib.decompress(r.hget(f"rq:job:{forged.id}", "data"))) and marker.exists()  # it is live
    marker.unlink()

    run_rq_burst(r)  # Seawall's worker: JSON only
    assert not marker.exists()
    assert Queue("seawall", connection=r).count == 0  # taken off the queue, not left to a pickle worker
