"""RQ job functions of the control plane: the retrain and the hold-queue re-score.

Jobs take only plain values (a version string, a config file path) and read
the rest of the configuration when they run, like any Seawall process:
``SEAWALL_*`` environment variables and ``SEAWALL_CONFIG``.  So the ``rq
worker`` that runs them is configured exactly like ``seawall serve``; no
Redis URL or password is ever stored inside a job record.

Every job Seawall enqueues is serialized with RQ's JSON serializer
(:data:`worker.jobs.JOB_SERIALIZER`), so a job record in Redis is data, never
code: the ``rq worker`` runs with ``--serializer json`` and cannot unpickle
anything someone wrote under ``rq:job:*``.
"""
from __future__ import annotations

from ops.config import load_config
from ops.connection import connect
from worker.jobs import JOB_SERIALIZER, JobArgumentError

RESCORE_FUNC = "ops.jobs.rescore_job"


RQ_ON_CLUSTER = ("RQ has no Redis Cluster support, and this deployment's Redis is a cluster ([redis] cluster = "
                 "true): set [redis] rq_url (SEAWALL_REDIS_RQ_URL) to a single Redis for the job queue, and point "
                 "rq cron and rq worker at the same one (RQ_REDIS_URL); or run the retrain from the systemd timer "
                 "(deploy/systemd/seawall-retrain.timer) and re-score with --rescore now")


def rq_client(config, client=None):
    """The Redis RQ keeps Seawall's jobs in: ``redis.rq_url`` when set, else the deployment's own.

    A Redis Cluster cannot hold RQ's queues (RQ's commands span keys of
    different slots): with ``redis.cluster`` and no ``rq_url`` this raises a
    :class:`ops.config.ConfigError` that says what to do.
    """
    from ops.config import ConfigError

    if config.redis.rq_url:
        from worker.connection import connect as worker_connect

        return worker_connect(config.redis.rq_url, tls_ca=config.redis_tls_ca, tls_cert=config.redis_tls_cert,
                              tls_key=config.redis_tls_key, raw_streams=False, client_name="seawall-rq")
    if config.redis.cluster:
        raise ConfigError(RQ_ON_CLUSTER)
    return client if client is not None else connect(config)


def job_queue(client, name: str):
    """The RQ queue ``name``, serializing with JSON like every job Seawall enqueues."""
    from rq import Queue

    from redis.cluster import RedisCluster

    if isinstance(client, RedisCluster):
        from ops.config import ConfigError

        raise ConfigError(RQ_ON_CLUSTER)
    return Queue(name, connection=client, serializer=JOB_SERIALIZER)


def listening_workers(client, name: str) -> int:
    """How many live RQ workers listen on queue ``name`` (a dead one drops out when its key expires)."""
    from rq import Worker

    return len(Worker.all(queue=job_queue(client, name)))


def enqueue_rescore(client, config, version: str):
    """Queue the hold-queue re-score for ``version`` on ``retrain.queue``; returns the RQ job."""
    return job_queue(client, config.retrain.queue).enqueue(
        RESCORE_FUNC, kwargs={"version": version}, job_timeout=config.retrain.job_timeout_s,
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
    """The scheduled retrain (same code as ``seawall retrain``); returns the report's summary.

    A promotion's hold-queue re-score runs in this job, right after it: the
    job already runs on an RQ worker, and a second job would only wait for one.
    """
    from ops.rescore import rescore_after_switch
    from ops.labelling import feedback_settings
    from ops.retrain import retrain

    plain_arguments("retrain job", config_file=config_file)
    config = load_config(config_file=config_file)
    client = connect(config)
    after = {}
    report = retrain(client, config.keys, config.retrain, feedback=feedback_settings(config.retrain, config.worker),
                     on_promoted=lambda version: after.update(rescore_after_switch("now", client, config, version)))
    summary = {k: report.get(k) for k in ("decision", "promoted", "active", "candidate", "chosen", "reasons",
                                          "seconds")}
    summary.update(after)
    return summary


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
