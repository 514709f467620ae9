"""RQ job functions of the control plane: the retrain and the hold-queue re-score.

Jobs take only plain values (a version string, a config file path) and read
the rest of the configuration when they run, like any Seawall process:
``SEAWALL_*`` environment variables and ``SEAWALL_CONFIG``.  So the ``rq
worker`` that runs them is configured exactly like ``seawall serve``; no
Redis URL or password is ever stored inside a job record.
"""
from __future__ import annotations

from ops.config import load_config
from ops.connection import connect
from worker.jobs import JobArgumentError

RESCORE_FUNC = "ops.jobs.rescore_job"


def enqueue_rescore(client, config, version: str):
    """Queue the hold-queue re-score for ``version`` on ``retrain.queue``; returns the RQ job."""
    from rq import Queue

    queue = Queue(config.retrain.queue, connection=client)
    return queue.enqueue(RESCORE_FUNC, kwargs={"version": version}, job_timeout=config.retrain.job_timeout_s,
                         description=f"re-score the hold queue with model {version}")


def plain_arguments(operation: str, **values) -> None:
    """Refuse a job whose arguments are not plain strings (or None) before it does anything.

    RQ would run a job with any picklable object in it; ours take a version
    and a config path only, so anything else means a caller built the job
    wrongly (or someone planted it), and it fails with a message instead.
    """
    for name, value in values.items():
        if value is not None and type(value) is not str:
            raise JobArgumentError(f"{operation}: {name} must be a plain string or None, got a "
                                   f"{type(value).__name__}; enqueue Seawall jobs with plain values only")


def retrain_job(config_file: str | None = None) -> dict:
    """The scheduled retrain (same code as ``seawall retrain``); returns the report's summary."""
    from ops.retrain import retrain

    plain_arguments("retrain job", config_file=config_file)
    config = load_config(config_file=config_file)
    client = connect(config)
    report = retrain(client, config.keys, config.retrain,
                     on_promoted=lambda version: enqueue_rescore(client, config, version))
    return {k: report.get(k) for k in ("decision", "promoted", "active", "candidate", "chosen", "reasons", "seconds")}


def rescore_job(version: str | None = None, config_file: str | None = None) -> dict:
    """Re-score the held comments with ``version`` (default: the active model) if it is still active."""
    from ops.registry import Registry
    from ops.rescore import rescore_held

    plain_arguments("re-score job", version=version, config_file=config_file)
    config = load_config(config_file=config_file)
    client = connect(config)
    registry = Registry(client=client, keys=config.keys)
    active = registry.active()
    if version is not None and active != version:
        return {"skipped": f"model {version} is no longer active (active is {active})"}
    return rescore_held(client, config.keys, registry.load(active), batch=config.retrain.rescore_batch,
                        settings=config.worker,
                        verdicts_maxlen=config.worker.verdicts_maxlen)
