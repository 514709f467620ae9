"""The whole loop with a real worker: serve from the registry, moderators label held
comments, a retrain promotes, the worker switches without a restart, rollback switches back."""
from __future__ import annotations

import itertools
import os
import subprocess
import sys
from pathlib import Path

import pytest

from kit import terminate, wait_until
from ops.cli import main
from ops.registry import Registry
from retrain_kit import KEYS, MODERATORS, stream
from test_retrain import bootstrap

ROOT = Path(__file__).resolve().parent.parent


def served_by(client, comment) -> str:
    """Send one comment, wait for its verdict; the model version that gave it."""
    mark = client.xadd(KEYS.comments, comment.fields())
    got = wait_until(lambda: [f for _i, f in client.xrange(KEYS.verdicts, min=mark) if f[b"id"] == comment.id.encode()],
                     timeout=60, interval=0.02, what=f"the verdict of comment {comment.id}")
    return got[0][b"model"].decode()


def switches_to(client, version: str, probes) -> bool:
    """Probe one comment at a time until one is judged by ``version``; then ten more must be too (no flip back).

    Bounded by the number of probes, not by a clock: the worker may take as long
    as a loaded machine needs to load the new model, as long as it gets there.
    """
    probes = iter(probes)
    if not any(served_by(client, c) == version for c in probes):
        return False
    return all(served_by(client, c) == version for c in itertools.islice(probes, 10))


def verdict_models(client, after="-"):
    return [f[b"model"].decode() for _i, f in client.xrange(KEYS.verdicts, min=after)]


@pytest.mark.redis_server
@pytest.mark.slow
def test_feedback_retrain_promote_hot_reload_and_rollback_with_a_running_worker(redis_server, redis_client, capsys,
                                                                                tmp_path):
    r = redis_client
    registry, first = bootstrap(r)
    env = dict(os.environ, SEAWALL_REDIS_URL=redis_server.url, SEAWALL_WORKER_RELOAD_POLL_S="0.2",
               SEAWALL_WORKER_BLOCK_MS="100", SEAWALL_RETRAIN_FEEDBACK_BLOCK_MS="100", SEAWALL_LOG_LEVEL="INFO",
               SEAWALL_METRICS_PORT="0")
    env.pop("SEAWALL_CONFIG", None)
    env.pop("SEAWALL_MODEL_PATH", None)
    log_path = tmp_path / "serve.log"
    log_file = log_path.open("w")
    worker = subprocess.Popen([sys.executable, "-m", "ops.cli", "serve", "--consumer", "e2e-1"], cwd=ROOT, env=env,
                              stdout=subprocess.DEVNULL, stderr=log_file)
    log = lambda: log_path.read_text()[-3000:]  # noqa: E731
    try:
        comments = stream()[:1200]
        pipe = r.pipeline(transaction=False)
        for c in comments:
            pipe.xadd(KEYS.comments, c.fields())
        pipe.execute()
        assert wait_until(lambda: r.xlen(KEYS.verdicts) >= len(comments), timeout=60), log()
        assert set(verdict_models(r)) == {first}

        # Moderators label comments by id only: the text comes from the worker's cache.
        for i, c in enumerate(comments[:1000]):
            pipe.xadd(KEYS.feedback, {"id": c.id, "label": "spam" if c.label else "ham",
                                      "moderator": MODERATORS[i % len(MODERATORS)]})
        pipe.execute()
        # The worker's own feedback thread turns them into labels.
        assert wait_until(lambda: r.xlen(KEYS.labels) >= 1000, timeout=30)
        assert r.xlen(KEYS.deadletter) == 0

        assert main(["retrain", "--redis", redis_server.url, "--rescore", "now"]) == 0
        out = capsys.readouterr().out
        new = registry.active()
        assert new != first and f"promoted {new}" in out, out

        # Pub/sub tells the worker; it switches while it runs (same process, no restart), and stays switched.
        assert switches_to(r, new, stream()[1200:2200]), log()
        assert worker.poll() is None, log()

        assert main(["models", "rollback", "--redis", redis_server.url, "--rescore", "off"]) == 0
        assert switches_to(r, first, stream()[2200:3200]), log()
        assert worker.poll() is None, log()
    finally:
        code = terminate(worker)
        log_file.close()
    assert code == 0, log()
    assert Registry(client=r, keys=KEYS).active() == first
