"""RQ jobs, for apps that already run RQ: score a list of comments, get verdicts back.

Enqueue :func:`score_batch` by its dotted name with plain values only, on a
queue that serializes with JSON (:data:`JOB_SERIALIZER`), and run the ``rq
worker`` with ``--serializer json``::

    Queue("seawall", connection=Redis(), serializer="json").enqueue("worker.jobs.score_batch", [{"id": "c1", "text": "..."}])

The job's return value is one dict per comment, in order, decided exactly like
the stream worker (:class:`worker.routing.Router`: the deployment's targets
and floors, then each site's own), with the rule that decided.

Where the model comes from: the **rq worker's environment**.
``SEAWALL_MODEL_PATH`` names the model file; it is read once per process,
the model is cached, and the file is watched like ``seawall serve --model``
(a changed file is reloaded at most every ``RELOAD_POLL_S`` seconds, a
corrupt one refused).  The routing settings are the stream worker's, read
the way ``seawall serve`` reads them: ``SEAWALL_WORKER_HOLD_FPR``,
``..._REJECT_FPR``, ``..._HOLD_FLOOR``, ``..._REJECT_FLOOR`` and
``..._SITE_THRESHOLDS`` (JSON), over the ``[worker]`` table of the
``SEAWALL_CONFIG`` file (:func:`worker.routing.routing_settings_from_environment`).
An app embedding
Seawall differently (e.g. the registry) installs its own source once per
process with :func:`set_model_source`.  RQ's default worker forks a work
horse per job, so each job loads the model once; run
``rq worker --worker-class rq.worker.SimpleWorker`` to keep it loaded
between jobs.

Apart from the ``SEAWALL_*`` variables above, nothing here reads config:
the job has no access to the operator's Config.
"""
from __future__ import annotations

import dataclasses
import os
import threading
import time
from collections.abc import Mapping, Sequence

from model.errors import SeawallError
from worker.loader import FileModelSource, ModelSource
from worker.routing import Router, RoutingSettings, routing_settings_from_environment, score_and_decide
from worker.settings import WorkerSettings
from worker.streams import Entry
from worker.validation import Comment, Limits, validate
from worker.verdicts import Verdict

#: RQ's JSON serializer (its alias, as ``Queue(serializer=...)`` and ``rq worker --serializer`` take it).
#: Every job Seawall enqueues uses it, so a job record in Redis is data that cannot run code when read.
JOB_SERIALIZER = "json"
MODEL_PATH_ENV = "SEAWALL_MODEL_PATH"
RELOAD_POLL_S = 2.0
PLAIN_VALUES = (str, int, float)
MAX_COMMENTS = 10_000


class JobArgumentError(SeawallError, TypeError):
    """A job was enqueued with something other than a list of plain comment dicts."""


class _Process:
    """The per-process model state behind the jobs (one per rq work horse)."""

    def __init__(self):
        self.lock = threading.Lock()
        self.source: ModelSource | None = None
        self.settings: RoutingSettings | None = None
        self.next_poll = 0.0
        self.router = None
        self.model = None


_PROCESS = _Process()


def set_model_source(source: ModelSource, *, site_thresholds: Mapping | None = None,
                     settings: RoutingSettings | None = None) -> None:
    """Use ``source`` for this process's jobs instead of ``SEAWALL_MODEL_PATH``.

    ``settings`` are the routing settings (default: read from the environment
    like the job does); ``site_thresholds`` replaces their per-site table.
    """
    with _PROCESS.lock:
        _PROCESS.source = source
        _PROCESS.settings = settings
        if site_thresholds is not None:
            base = settings if settings is not None else _settings_from_environment()
            _PROCESS.settings = dataclasses.replace(base, site_thresholds=dict(site_thresholds))
        _PROCESS.model = None


def _settings_from_environment() -> RoutingSettings:
    try:
        return routing_settings_from_environment()
    except ValueError as exc:
        raise SeawallError(f"score_batch: {exc}; fix the rq worker's environment") from None


def _current():
    state = _PROCESS
    with state.lock:
        if state.source is None:
            path = os.environ.get(MODEL_PATH_ENV, "")
            if not path:
                raise SeawallError(
                    f"score_batch: no model; set {MODEL_PATH_ENV} to the model file in the rq worker's environment"
                )
            state.source = FileModelSource(path=path)
        if state.settings is None:
            state.settings = _settings_from_environment()
        now = time.monotonic()
        model = state.model
        if model is None:
            model = state.source.current()
        elif now >= state.next_poll:
            model = state.source.poll() or model
        if model is not state.model:
            try:
                state.router = Router.for_model(model, state.settings)
            except ValueError as exc:
                raise SeawallError(f"score_batch: {exc}; fix the routing settings") from None
            state.model = model
            state.next_poll = now + RELOAD_POLL_S
        return state.model, state.router


def _check_plain(comments) -> list[dict]:
    if isinstance(comments, (str, bytes, Mapping)) or not isinstance(comments, Sequence):
        raise JobArgumentError(
            f"score_batch: comments must be a list of dicts like {{'id': ..., 'text': ...}}, got {type(comments).__name__}"
        )
    if len(comments) > MAX_COMMENTS:
        raise JobArgumentError(f"score_batch: at most {MAX_COMMENTS} comments per job, got {len(comments)}; split the batch")
    for i, item in enumerate(comments):
        if type(item) is not dict:
            raise JobArgumentError(f"score_batch: comments[{i}] is a {type(item).__name__}, expected a plain dict")
        for key, value in item.items():
            if type(key) is not str:
                raise JobArgumentError(f"score_batch: comments[{i}] has a non-string key {key!r}")
            if value is not None and (type(value) not in PLAIN_VALUES):
                raise JobArgumentError(
                    f"score_batch: comments[{i}][{key!r}] is a {type(value).__name__}; only str, int, float or None"
                )
    return list(comments)


def score_batch(comments, *, top_k: int = 5) -> list[dict]:
    """Score ``comments`` (a list of ``{"id", "text", "site"?, "author"?, "ts"?}``) in one model call.

    Returns, in order, ``{"id", "score", "action", "rule", "model", "reasons", "site"}``
    per comment (score a float to 4 decimals, rule ``model`` or ``site``,
    reasons a list of ``[token, contribution]``), or ``{"id", "error", "detail"}`` for a comment
    the stream worker would dead-letter (same reasons: ``missing_text``,
    ``empty_text``, ``text_too_large``...).  Raises :class:`JobArgumentError`
    on anything but plain values.
    """
    items = _check_plain(comments)
    if isinstance(top_k, bool) or not isinstance(top_k, int) or top_k < 0:
        raise JobArgumentError(f"score_batch: top_k must be an integer >= 0, got {top_k!r}")
    model, router = _current()
    limits = Limits.from_settings(WorkerSettings())
    checked = []
    for i, item in enumerate(items):
        pairs = tuple((k.encode(), str(v).encode()) for k, v in item.items() if v is not None)
        checked.append(validate(Entry(f"rq-{i}".encode(), pairs), limits))
    good = [c for c in checked if isinstance(c, Comment)]
    verdicts: dict[int, dict] = {}
    if good:
        scores, decisions, reasons = score_and_decide(model, router, [c.text for c in good], [c.site for c in good],
                                                      top_k=top_k)
        for c, s, d, r in zip(good, scores, decisions, reasons):
            verdicts[id(c)] = Verdict.of(c, s, d, r).as_json(model=str(model.version))
    out = []
    for item, c in zip(items, checked):
        if isinstance(c, Comment):
            out.append(verdicts[id(c)])
        else:
            out.append({"id": None if item.get("id") is None else str(item["id"]), "error": c.reason,
                        "detail": c.detail})
    return out
