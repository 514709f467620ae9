"""RQ cron configuration: the nightly retrain.

Run exactly one scheduler per deployment, and at least one worker for the
queue (``retrain.queue``, default ``seawall``), both with the same ``SEAWALL_*``
environment as the rest of Seawall::

    export RQ_REDIS_URL="$SEAWALL_REDIS_URL"   # RQ's own variable: no password in the process list
    rq cron ops.schedule
    rq worker --serializer json seawall

The cron string is ``retrain.cron`` (``SEAWALL_RETRAIN_CRON``), default
``0 3 * * *``, in UTC.  ``rq cron`` imports this module once at start-up, so
this is where that process reads its configuration.  RQ 3 matches cron fields
against the process's local time; this module sets the scheduler process's
time zone to UTC so that the string means UTC on any host.  It also makes the
scheduler enqueue with JSON, like every other Seawall job (:func:`use_json_jobs`).
"""
from __future__ import annotations

import os
import time

from rq import cron
from rq.queue import Queue

from ops.config import load_config
from ops.jobs import retrain_job
from worker.jobs import JOB_SERIALIZER


def use_utc() -> None:
    os.environ["TZ"] = "UTC"
    time.tzset()


class JSONQueue(Queue):
    """An RQ queue that always serializes with Seawall's job serializer (JSON)."""

    def __init__(self, *args, **kwargs):
        kwargs["serializer"] = JOB_SERIALIZER
        super().__init__(*args, **kwargs)


def use_json_jobs() -> None:
    """Make this scheduler process enqueue its jobs as JSON.

    RQ 3's cron scheduler enqueues through ``rq.cron.Queue`` with RQ's default
    serializer, pickle, and has no option for another one.  Seawall's ``rq
    worker`` runs with ``--serializer json``: it could not read a pickled job,
    and a worker that reads pickle would run whatever code a forged record
    under ``rq:job:*`` holds.  So, in the scheduler process only (``rq cron``
    imports this module as its configuration), the queue class the cron jobs
    are enqueued through is :class:`JSONQueue`.  tests/test_schedule.py reads
    the enqueued record back from Redis and fails if RQ stops honouring this.
    """
    if not (isinstance(getattr(cron, "Queue", None), type) and issubclass(cron.Queue, Queue)):
        raise RuntimeError("ops.schedule: this RQ version's cron module has no Queue class to replace; "
                           "pin rq to a 3.x release Seawall was tested with")
    cron.Queue = JSONQueue


def register_jobs(config=None) -> dict:
    """Register the nightly retrain with RQ's cron registry; returns the registration.

    On a Redis Cluster (``redis.cluster``) RQ needs a single Redis of its own
    (``redis.rq_url``); without one this refuses to start and says so.
    """
    config = config or load_config()
    if config.redis.cluster and not config.redis.rq_url:
        from ops.config import ConfigError
        from ops.jobs import RQ_ON_CLUSTER

        raise ConfigError(RQ_ON_CLUSTER)
    return cron.register(
        retrain_job,
        queue_name=config.retrain.queue,
        cron=config.retrain.cron,
        job_timeout=config.retrain.job_timeout_s,
        name="seawall-nightly-retrain",
    )


use_utc()
use_json_jobs()
register_jobs()
