"""The nightly retrain on RQ 3's cron scheduler, run by a real ``rq worker``."""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from datetime import timezone
from pathlib import Path

import fakeredis
import pytest
from rq.cron import CronScheduler

from kit import rq_worker_argv, wait_until
from ops.retrain import last_reports
from retrain_kit import KEYS, send_feedback, stream
from test_retrain import bootstrap

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def keep_time_zone():
    """ops.schedule sets the scheduler process's time zone to UTC; undo it for the test process."""
    before = os.environ.get("TZ")
    yield
    if before is None:
        os.environ.pop("TZ", None)
    else:
        os.environ["TZ"] = before
    time.tzset()


def load_schedule(connection) -> CronScheduler:
    scheduler = CronScheduler(connection=connection, name="test")
    scheduler.load_config_from_file("ops.schedule")  # what `rq cron ops.schedule` does
    return scheduler


def test_schedule_registers_the_nightly_retrain_at_three_utc(keep_time_zone, monkeypatch):
    monkeypatch.setenv("TZ", "America/New_York")  # a host far from UTC
    time.tzset()
    (job,) = load_schedule(fakeredis.FakeRedis())._cron_jobs
    assert job.func_name == "ops.jobs.retrain_job" and job.cron == "0 3 * * *"
    assert job.queue_name == "seawall" and job.job_options["job_timeout"] == 3600
    assert job.args == () and job.kwargs == {}  # plain values only: nothing to pickle
    nxt = job.next_enqueue_time.astimezone(timezone.utc)
    assert (nxt.hour, nxt.minute) == (3, 0)


def test_schedule_takes_its_cron_string_and_queue_from_the_config(keep_time_zone, monkeypatch):
    monkeypatch.setenv("SEAWALL_RETRAIN_CRON", "30 1 * * 0")
    monkeypatch.setenv("SEAWALL_RETRAIN_QUEUE", "nightly")
    (job,) = load_schedule(fakeredis.FakeRedis())._cron_jobs
    assert job.cron == "30 1 * * 0" and job.queue_name == "nightly"
    nxt = job.next_enqueue_time.astimezone(timezone.utc)
    assert (nxt.weekday(), nxt.hour, nxt.minute) == (6, 1, 30)


@pytest.mark.redis_server
@pytest.mark.slow
def test_a_real_rq_worker_runs_the_scheduled_retrain_and_the_rescore(redis_server, redis_client, keep_time_zone):
    r = redis_client
    registry, first = bootstrap(r)
    comments = stream()
    send_feedback(r, comments[:2500])
    held = comments[2500:2800]
    for c in held:
        r.hset(KEYS.text(c.id), mapping={"text": c.text, "site": c.site, "stream_id": "1-0"})
        r.zadd(KEYS.held, {c.id: 1.0})

    (cron_job,) = load_schedule(r)._cron_jobs
    job = cron_job.enqueue(r)  # exactly what the scheduler does at 03:00
    env = dict(os.environ, SEAWALL_REDIS_URL=redis_server.url)
    env.pop("SEAWALL_CONFIG", None)
    proc = subprocess.run(rq_worker_argv(redis_server.url, "seawall", "--name", "test-rq"),
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=150)
    assert proc.returncode == 0, proc.stderr[-3000:]

    job.refresh()
    assert job.get_status() == "finished", proc.stderr[-3000:]
    assert job.return_value()["decision"] == "promoted"
    assert job.return_value()["rescore"]["rescored"] == len(held)
    report = last_reports(r, KEYS)[0]
    assert report["decision"] == "promoted" and registry.active() == report["candidate"] != first

    # The retrain job re-scored the hold queue right after the promotion.
    verdicts = [f for _i, f in r.xrange(KEYS.verdicts)]
    assert len(verdicts) == len(held)
    assert {v[b"rescored"] for v in verdicts} == {b"1"}
    assert {v[b"model"] for v in verdicts} == {report["candidate"].encode()}
    assert r.zcard(KEYS.held) < len(held)
    kinds = [f[b"type"] for _i, f in r.xrange(KEYS.events)]
    assert kinds[-2:] == [b"promote", b"retrain"]
    assert json.loads(r.xrange(KEYS.events)[-1][1][b"data"])["promoted"] is True


def test_systemd_timer_is_the_same_nightly_schedule_and_runs_a_real_command():
    import shlex

    from ops.cli import build_parser
    from ops.settings import RetrainSettings

    systemd = ROOT / "deploy" / "systemd"
    timer = (systemd / "seawall-retrain.timer").read_text()
    service = (systemd / "seawall-retrain.service").read_text()
    assert "OnCalendar=*-*-* 03:00:00 UTC" in timer and RetrainSettings().cron == "0 3 * * *"
    assert "Unit=seawall-retrain.service" in timer and "Persistent=true" in timer
    (line,) = [ln for ln in service.splitlines() if ln.startswith("ExecStart=")]
    argv = shlex.split(line.removeprefix("ExecStart="))
    args = build_parser().parse_args(argv[1:])
    assert args.command == "retrain" and args.rescore == "now"
    assert "EnvironmentFile=/etc/seawall/seawall.env" in service and "Type=oneshot" in service


def test_bench_retrain_runs_and_reports_its_ratio(capsys):
    from ops.cli import main

    assert main(["bench", "retrain", "--n", "300", "--replay", "100", "--repeats", "1", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["comments"] == 300 and rows["update_epochs"] == 3 and rows["runs"] == 1
    assert rows["update_over_fresh_fit"] == pytest.approx(rows["update_median_s"] / rows["fresh_fit_median_s"], rel=0.05)
    assert rows["both_over_warm_start_only"] == pytest.approx(
        rows["retrain_both_candidates_median_s"] / rows["retrain_warm_start_only_median_s"], rel=0.05)
    assert rows["scratch_fit_train_median_s"] > 0 and rows["scratch_fit_rows"] > 0 and rows["gate_median_s"] > 0
    assert rows["decision"] in ("promoted", "refused")


@pytest.mark.redis_server
def test_rq_cron_command_starts_with_the_schedule_module(redis_server, redis_client):
    import signal

    env = dict(os.environ, RQ_REDIS_URL=redis_server.url, TZ="America/New_York")
    env.pop("SEAWALL_CONFIG", None)
    proc = subprocess.Popen([sys.executable, "-m", "rq.cli", "cron", "ops.schedule"], cwd=ROOT, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        schedulers = wait_until(lambda: CronScheduler.all(redis_client), timeout=60, interval=0.1)
    finally:
        proc.send_signal(signal.SIGTERM)
        err = proc.communicate(timeout=20)[1]
    assert schedulers, err[-2000:]
    (job,) = schedulers[0].get_jobs()
    assert job.func_name == "ops.jobs.retrain_job" and job.cron == "0 3 * * *" and job.queue_name == "seawall"
    nxt = job.next_enqueue_time.astimezone(timezone.utc)
    assert (nxt.hour, nxt.minute) == (3, 0)  # UTC, although the process started in New York time
