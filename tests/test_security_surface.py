"""What a worker exposes: where its metrics endpoint listens, what its RQ jobs accept, and that
no comment text reaches a log line or a metric, even at DEBUG and on the error paths.

The marker-word check of a worker's normal path at INFO level is in
test_observability_integration.py; this one extends it to DEBUG logging, dead
letters of every kind, feedback with text and a reason, and a refused model reload.
"""
from __future__ import annotations

import os
import secrets
import urllib.request

import pytest
import redis

from faults_kit import KEYS, verdict_ids, write_model
from kit import Worker, run_rq_burst, stop_all, wait_until
from ops.jobs import job_queue
from ops.registry import Registry
from retrain_kit import model_bytes
from servers import free_port

pytestmark = pytest.mark.redis_server


def listening_addresses(port: int) -> set[str]:
    """Local addresses of the TCP sockets in LISTEN state on ``port`` (from /proc/net/tcp and tcp6)."""
    found = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        if not os.path.exists(table):
            continue
        with open(table) as fh:
            next(fh)
            for line in fh:
                local, state = line.split()[1], line.split()[3]
                address, hex_port = local.rsplit(":", 1)
                if state == "0A" and int(hex_port, 16) == port:  # 0A = LISTEN
                    found.add(_address(address))
    return found


def _address(hex_address: str) -> str:
    if len(hex_address) == 8:  # IPv4, little-endian
        return ".".join(str(int(hex_address[i:i + 2], 16)) for i in (6, 4, 2, 0))
    return "::" if set(hex_address) == {"0"} else hex_address


@pytest.mark.slow
def test_metrics_listen_on_loopback_unless_configured_otherwise_and_no_text_leaks(redis_server, tmp_path):
    admin = redis_server.client()
    marker = "leak" + secrets.token_hex(5)
    serving = tmp_path / "model.bin"
    write_model(serving)
    default_port, open_port = free_port(), free_port()
    quiet = Worker(url=redis_server.url, name="loopback-w", log_dir=tmp_path, model_path=serving,
                   env={"SEAWALL_METRICS_PORT": str(default_port), "SEAWALL_LOG_LEVEL": "DEBUG",
                        "SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "1", "SEAWALL_WORKER_MAX_TEXT_BYTES": "2048"})
    exposed = Worker(url=redis_server.url, name="exposed-w", log_dir=tmp_path, model_path=serving,
                     env={"SEAWALL_METRICS_PORT": str(open_port), "SEAWALL_METRICS_HOST": "0.0.0.0",
                          "SEAWALL_KEYS_PREFIX": "other:"})
    try:
        quiet.start()
        exposed.start()
        assert wait_until(lambda: listening_addresses(default_port) and listening_addresses(open_port), timeout=60), \
            quiet.output()[-2000:]
        default_bind, open_bind = listening_addresses(default_port), listening_addresses(open_port)

        # The marker goes everywhere a moderator's or an author's words can go.
        for i in range(20):
            admin.xadd(KEYS.comments, {"id": f"c{i}", "text": f"free prize {marker} number {i}",
                                       "author": f"{marker}-author", "site": f"{marker}.example"})
        admin.xadd(KEYS.comments, {"text": f"no id {marker}"})                                   # missing_id
        admin.xadd(KEYS.comments, {"id": f"{marker}-x", "text": f"{marker} ".encode() + b"\xff"})  # invalid_utf8
        admin.xadd(KEYS.comments, {"id": "big", "text": f"{marker} " * 500})                      # text_too_large
        admin.xadd(KEYS.comments, {"id": "blank", "text": "   ", marker: marker})                 # empty_text
        assert wait_until(lambda: len(verdict_ids(admin)) == 20 and admin.xlen(KEYS.deadletter) == 4, timeout=60)
        admin.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "moderator": f"{marker}-mod",
                                   "reason": f"because {marker}", "text": f"edited {marker}"})
        admin.xadd(KEYS.feedback, {"id": "nope", "label": marker})                               # unknown label
        assert wait_until(lambda: admin.xlen(KEYS.key("labels")) == 1 and admin.xlen(KEYS.deadletter) == 5,
                          timeout=30), quiet.output()[-2000:]
        # A refused reload logs why, never what the file held.
        bad = tmp_path / "bad.tmp"
        bad.write_bytes(f"{marker} not a model".encode())
        os.replace(bad, serving)
        assert wait_until(lambda: "refused" in quiet.output(), timeout=30)
        with urllib.request.urlopen(f"http://127.0.0.1:{default_port}/metrics", timeout=10) as reply:
            metrics = reply.read().decode()
    finally:
        codes = stop_all([quiet, exposed])
    assert default_bind == {"127.0.0.1"}
    assert open_bind == {"0.0.0.0"}
    assert codes == [0, 0]
    assert "seawall_comments_total" in metrics and "seawall_deadletter" in metrics
    log = quiet.output()
    assert "DEBUG" in log  # the check ran at the most talkative level
    assert marker not in metrics
    assert marker not in log, [line for line in log.splitlines() if marker in line][:3]


@pytest.fixture
def rq_env(redis_server, monkeypatch, tmp_path):
    """The environment an `rq worker` for Seawall runs with: SEAWALL_* settings only."""
    monkeypatch.setenv("SEAWALL_REDIS_URL", redis_server.url)
    monkeypatch.setenv("SEAWALL_MODEL_PATH", str(write_model(tmp_path / "job-model.bin")))
    for name in [k for k in os.environ if k.startswith("SEAWALL_") and k not in ("SEAWALL_REDIS_URL",
                                                                                  "SEAWALL_MODEL_PATH")]:
        monkeypatch.delenv(name)
    import worker.jobs

    monkeypatch.setattr(worker.jobs, "_PROCESS", worker.jobs._Process())
    return redis.Redis.from_url(redis_server.url)


class Opaque:
    """Anything that is not a plain value (RQ's default serializer would pickle it into a job)."""


@pytest.mark.parametrize(
    "func, kwargs",
    [
        ("ops.jobs.rescore_job", {"version": Opaque()}),
        ("ops.jobs.rescore_job", {"config_file": b"/etc/seawall.toml"}),
        ("worker.jobs.score_batch", {"comments": [Opaque()]}),
        ("worker.jobs.score_batch", {"comments": [{"id": "a", "text": b"bytes"}]}),
    ],
    ids=["rescore-object", "rescore-bytes-path", "score-object", "score-bytes-text"],
)
def test_rq_jobs_cannot_even_carry_objects(rq_env, func, kwargs):
    # Seawall's queues serialize with JSON: an object or bytes never becomes a job record.
    with pytest.raises(TypeError, match="JSON serializable"):
        job_queue(rq_env, "seawall").enqueue(func, kwargs=kwargs)


@pytest.mark.parametrize(
    "func, kwargs, message",
    [
        ("ops.jobs.rescore_job", {"version": 12}, "re-score job: version must be a plain string"),
        ("ops.jobs.rescore_job", {"config_file": {"path": "/etc/seawall.toml"}}, "config_file must be a plain string"),
        ("ops.jobs.retrain_job", {"config_file": ["a.toml"]}, "retrain job: config_file must be a plain string"),
        ("worker.jobs.score_batch", {"comments": [["id", "a"]]}, "expected a plain dict"),
        ("worker.jobs.score_batch", {"comments": [{"id": "a", "text": ["free"]}]}, "score_batch"),
    ],
    ids=["rescore-int-version", "rescore-dict-path", "retrain-list-path", "score-pair-list", "score-list-text"],
)
def test_rq_jobs_built_with_anything_but_plain_values_are_refused(rq_env, func, kwargs, message):
    connection = rq_env
    registry = Registry(client=connection, keys=KEYS)
    registry.promote(registry.push(model_bytes(0)))
    queue = job_queue(connection, "seawall")
    bad = queue.enqueue(func, kwargs=kwargs)
    good = queue.enqueue("worker.jobs.score_batch", kwargs={"comments": [{"id": "a", "text": "free prize"}]})
    assert run_rq_burst(connection)
    bad.refresh()
    good.refresh()
    assert bad.get_status() == "failed"
    assert "JobArgumentError" in bad.latest_result().exc_string and message in bad.latest_result().exc_string
    assert good.get_status() == "finished" and good.return_value()[0]["id"] == "a"
    # Nothing was written on the refused job's behalf.
    assert connection.xlen(KEYS.verdicts) == 0
