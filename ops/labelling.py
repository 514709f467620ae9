"""The feedback consumer as a background thread of ``seawall serve``.

Every serve process also reads the feedback stream, as consumer
``<worker consumer>-feedback`` of the ``retrain.feedback_group`` group, so
moderators' labels reach the labelled store within a second while comments are
being scored.  It has its own Redis client (its blocking read must not share
the comment consumer's connection).  ``retrain.feedback_in_serve = false``
turns it off, e.g. when a separate process handles feedback.
"""
from __future__ import annotations

import logging
import threading

from ops.config import Config
from ops.settings import FEEDBACK_FIELDS, RetrainSettings
from worker.connection import connect
from worker.feedback import FeedbackConsumer
from worker.settings import FeedbackSettings, WorkerSettings

log = logging.getLogger(__name__)


def feedback_settings(retrain: RetrainSettings, worker: WorkerSettings) -> FeedbackSettings:
    """The feedback consumer's settings, from ``[retrain]`` and the worker's dead-letter cap: the one place they are built.

    ``seawall serve``'s feedback thread and the retrain's drain both use them.
    """
    return FeedbackSettings(deadletter_maxlen=worker.deadletter_maxlen,
                            **{name: getattr(retrain, field) for name, field in FEEDBACK_FIELDS.items()})


def build_feedback_consumer(config: Config, *, consumer: str = "", client=None, observer=None,
                            clock=None) -> FeedbackConsumer:
    settings = feedback_settings(config.retrain, config.worker)
    if client is None:
        client = connect(config.redis_url, tls_ca=config.redis_tls_ca, tls_cert=config.redis_tls_cert,
                         tls_key=config.redis_tls_key, socket_timeout=config.worker.socket_timeout_s
                         + settings.block_ms / 1000.0, client_name="seawall-feedback", cluster=config.redis.cluster)
    extra = {"clock": clock} if clock is not None else {}
    return FeedbackConsumer(client=client, keys=config.keys, settings=settings, consumer=consumer, observer=observer,
                            **extra)


class FeedbackThread:
    """Runs a :class:`FeedbackConsumer` in a daemon thread until :meth:`stop`."""

    def __init__(self, *, consumer: FeedbackConsumer):
        self.consumer = consumer
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="seawall-feedback", daemon=True)

    def _run(self) -> None:
        log.info("feedback consumer %s reading %s", self.consumer.consumer, self.consumer.keys.feedback)
        self.consumer.run(self._stop)

    def start(self) -> "FeedbackThread":
        self._thread.start()
        return self

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._thread.join(timeout)

    @property
    def alive(self) -> bool:
        return self._thread.is_alive()


def start_feedback(config: Config, *, worker_consumer: str, observer=None) -> FeedbackThread | None:
    """Start the feedback thread for a serve process (None when turned off).

    ``observer`` (the worker's) counts feedback dead letters by reason.
    """
    if not config.retrain.feedback_in_serve:
        return None
    consumer = build_feedback_consumer(config, consumer=f"{worker_consumer}-feedback", observer=observer)
    return FeedbackThread(consumer=consumer).start()
