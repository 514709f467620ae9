"""RQ cron configuration: the nightly retrain.

Run exactly one scheduler per deployment, and at least one worker for the
queue (``retrain.queue``, default ``seawall``), both with the same ``SEAWALL_*``
environment as the rest of Seawall::

    export RQ_REDIS_URL="$SEAWALL_REDIS_URL"   # RQ's own variable: no password in the process list
    rq cron ops.schedule
    rq worker seawall

The cron string is ``retrain.cron`` (``SEAWALL_RETRAIN_CRON``), default
``0 3 * * *``, in UTC.  ``rq cron`` imports this module once at start-up, so
this is where that process reads its configuration.  RQ 3 matches cron fields
against the process's local time; this module sets the scheduler process's
time zone to UTC so that the string means UTC on any host.
"""
from __future__ import annotations

import os
import time

from rq import cron

from ops.config import load_config
from ops.jobs import retrain_job


def use_utc() -> None:
    os.environ["TZ"] = "UTC"
    time.tzset()


def register_jobs(config=None) -> dict:
    """Register the nightly retrain with RQ's cron registry; returns the registration."""
    config = config or load_config()
    return cron.register(
        retrain_job,
        queue_name=config.retrain.queue,
        cron=config.retrain.cron,
        job_timeout=config.retrain.job_timeout_s,
        name="seawall-nightly-retrain",
    )


use_utc()
register_jobs()
