"""worker.jobs.score_batch run by a real `rq worker` process against a real redis-server."""
from __future__ import annotations

import datetime
import os
import subprocess
from pathlib import Path

import pytest

from kit import rq_worker_argv
from worker_models import tiny_model
from ops.bench.stream import invented_comments
from worker.jobs import JOB_SERIALIZER

pytestmark = pytest.mark.redis_server


@pytest.fixture(scope="module")
def model_file():
    return tiny_model(4)[0]


@pytest.fixture
def fresh_jobs(monkeypatch):
    """worker.jobs keeps its model per process; give each in-process check a clean slate."""
    import worker.jobs as jobs

    monkeypatch.setattr(jobs, "_PROCESS", jobs._Process())
    return jobs


def run_burst(url: str, model: Path, tmp_path: Path, **env_extra) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env.update({"SEAWALL_MODEL_PATH": str(model), **env_extra})
    return subprocess.run(rq_worker_argv(url, "seawall"), env=env, cwd=tmp_path,
                          capture_output=True, text=True, timeout=120)


def test_score_batch_in_a_real_rq_worker(redis_server, model_file, tmp_path, fresh_jobs, monkeypatch):
    from rq import Queue

    texts = invented_comments(30, seed=5)
    comments = [{"id": f"c{i}", "text": t, "site": "news.example" if i % 2 else "pets.example"} for i, (t, _) in
                enumerate(texts)]
    comments.append({"id": "bad", "text": "   "})
    comments.append({"id": 77, "text": "an integer id is a plain value too", "author": None})
    overrides = '{"pets.example": {"hold": 0.0}}'                 # everything on pets.example is at least held
    queue = Queue("seawall", connection=redis_server.client(), serializer=JOB_SERIALIZER)
    good_job = queue.enqueue("worker.jobs.score_batch", comments)
    not_a_list = queue.enqueue("worker.jobs.score_batch", "just a string")
    not_plain = queue.enqueue("worker.jobs.score_batch", [{"id": "x", "text": "t", "ts": ["2026-01-01"]}])
    with pytest.raises(TypeError, match="JSON serializable"):  # JSON jobs carry data only: no objects at all
        queue.enqueue("worker.jobs.score_batch", [{"id": "x", "text": "t", "ts": datetime.datetime(2026, 1, 1)}])

    done = run_burst(redis_server.url, model_file, tmp_path, SEAWALL_WORKER_SITE_THRESHOLDS=overrides)
    assert done.returncode == 0, done.stderr[-2000:]

    got = good_job.return_value(refresh=True)
    # The same job in this process, with the same environment, must give the same verdicts.
    monkeypatch.setenv("SEAWALL_MODEL_PATH", str(model_file))
    monkeypatch.setenv("SEAWALL_WORKER_SITE_THRESHOLDS", overrides)
    assert got == fresh_jobs.score_batch(comments)
    assert len(got) == len(comments)
    assert got[-2] == {"id": "bad", "error": "empty_text", "detail": "text is empty or only whitespace"}
    assert got[-1]["id"] == "77" and got[-1]["action"] in ("publish", "hold", "reject")
    pets = [v for v in got[:-2] if v["site"] == "pets.example"]
    assert pets and all(v["action"] in ("hold", "reject") for v in pets)
    assert all(0.0 <= v["score"] <= 1.0 and isinstance(v["reasons"], list) for v in got[:-2])

    for job, needle in ((not_a_list, "comments must be a list"), (not_plain, "only str, int, float or None")):
        assert job.get_status(refresh=True) == "failed"
        assert needle in job.latest_result().exc_string


def test_missing_model_path_is_a_clear_error(fresh_jobs, monkeypatch):
    monkeypatch.delenv("SEAWALL_MODEL_PATH", raising=False)
    with pytest.raises(fresh_jobs.SeawallError, match="set SEAWALL_MODEL_PATH"):
        fresh_jobs.score_batch([{"id": "a", "text": "hello"}])


@pytest.mark.parametrize(
    "comments,needle",
    [({"id": "a"}, "must be a list"), ([["id", "a"]], "expected a plain dict"), ([{1: "a"}], "non-string key"),
     ([{"id": "a", "text": b"bytes"}], "bytes"), ([{"id": "a", "text": ["x"]}], "list")],
    ids=["a-dict", "a-pair-list", "int-key", "bytes-value", "list-value"],
)
def test_non_plain_arguments_are_refused_before_any_model_is_loaded(fresh_jobs, monkeypatch, comments, needle):
    monkeypatch.delenv("SEAWALL_MODEL_PATH", raising=False)
    with pytest.raises(fresh_jobs.JobArgumentError, match=needle):
        fresh_jobs.score_batch(comments)


def test_model_is_loaded_once_per_process(fresh_jobs, monkeypatch, model_file):
    monkeypatch.setenv("SEAWALL_MODEL_PATH", str(model_file))
    fresh_jobs.score_batch([{"id": "a", "text": "hello"}])
    first = fresh_jobs._PROCESS.model
    monkeypatch.setenv("SEAWALL_MODEL_PATH", "/nonexistent/elsewhere.bin")   # read once: later changes do not apply
    fresh_jobs.score_batch([{"id": "b", "text": "hello again"}])
    assert fresh_jobs._PROCESS.model is first
