"""The stream worker: read a batch, score it in one model call, route, commit.

One loop iteration (:meth:`StreamConsumer.step`):

1. every ``claim_every_s``, take over entries idle longer than
   ``claim_idle_ms`` on other consumers (XAUTOCLAIM) and process them;
2. read up to ``batch`` entries (XREADGROUP COUNT/BLOCK) - first this
   consumer's own pending entries (left by a crash or a lost connection),
   then new ones (``>``);
3. validate each entry; bad ones become dead letters with their reason, and
   entries delivered more than ``max_deliveries`` times become ``poison``;
4. score all valid comments in ONE ``score_many`` call, decide each by the
   effective cutoffs of its site (:class:`worker.routing.Router`), let the
   batch policies adjust the decisions, and make sure the reasons of held and
   rejected comments list their spam-ward tokens first;
5. commit the whole batch in one Lua script call (see :mod:`worker.commit`).

:meth:`StreamConsumer.run` repeats this until :meth:`stop` is called (the
signal handler of ``seawall serve`` does), finishing the batch in hand.  A
lost connection is logged and retried with capped exponential backoff; the
batch in hand stays pending in Redis and is read again from this consumer's
pending list, so nothing the server kept is lost.
"""
from __future__ import annotations

import logging
import os
import socket
import time
from collections.abc import Sequence
from dataclasses import dataclass, field

from concurrent.futures import ThreadPoolExecutor

import redis

from worker.commit import WRITTEN, BatchCommitter, Limits as CommitLimits
from worker.deadletters import DeadLetterLog
from worker.loader import ModelSource
from worker.observer import NullObserver, WorkerObserver
from worker.policies import BatchPolicy, apply_policies
from worker.routing import Router, explain_decisions
from worker.settings import Keys, WorkerSettings
from worker.streams import Entry, parse_xautoclaim, parse_xinfo_group, parse_xpending_range, parse_xreadgroup, stream_id_ms
from worker.validation import Comment, DeadLetter, Limits as InputLimits, comment_dead_letter, dead_letter, validate
from worker.verdicts import Verdict

log = logging.getLogger("seawall.worker")

# Upper bound on XAUTOCLAIM rounds per reclaim pass, so that fresh entries are never starved.
MAX_CLAIM_ROUNDS = 20
# Tokens in each verdict's reasons.
TOP_K = 5


def default_consumer_name() -> str:
    return f"{socket.gethostname()}-{os.getpid()}"


@dataclass
class BatchResult:
    """What one processed batch came to (for tests and the bench)."""

    read: int = 0
    written: int = 0
    duplicates: int = 0
    dead: dict = field(default_factory=dict)


class StreamConsumer:
    """One consumer of the ``comments`` stream inside the ``workers`` group.

    Parameters
    ----------
    client : a redis-py client from :func:`worker.connection.connect` (raw stream replies).
    keys : key names (``Config.keys``).
    settings : ``Config.worker``.
    model_source : where the model comes from; polled for hot reloads.
    consumer : consumer name; empty means ``settings.consumer`` or ``<hostname>-<pid>``.
    observer : receives batch, verdict, dead-letter, model, lag and reconnect reports.
    policies : batch policies run after routing and before the commit.
    """

    def __init__(
        self,
        *,
        client,
        keys: Keys,
        settings: WorkerSettings,
        model_source: ModelSource,
        consumer: str = "",
        observer: WorkerObserver | None = None,
        policies: Sequence[BatchPolicy] = (),
        clock=time.time,
    ):
        self.client = client
        self.keys = keys
        self.settings = settings
        self.model_source = model_source
        self.consumer = consumer or settings.consumer or default_consumer_name()
        self.observer = observer if observer is not None else NullObserver()
        self.policies = tuple(policies)
        self.clock = clock
        self._input_limits = InputLimits.from_settings(settings)
        self._committer = BatchCommitter(keys=keys, limits=CommitLimits.from_settings(settings))
        self._stream = keys.comments.encode()
        self._model = None
        self._router = None
        self._stopping = False
        self._ready = False
        self._backlog_from: bytes | None = b"0"
        self._next_claim = 0.0
        self._next_reload = 0.0
        self._next_lag = 0.0
        self._reports_verdicts = not isinstance(self.observer, NullObserver)
        self._executor: ThreadPoolExecutor | None = None
        self._inflight = None
        self._deadletter_log = DeadLetterLog(logger=log, source=keys.comments, deadletter=keys.deadletter)

    # -- life cycle ---------------------------------------------------------------------------

    def stop(self) -> None:
        """Ask the loop to stop after the batch in hand (safe to call from a signal handler)."""
        self._stopping = True

    @property
    def stopping(self) -> bool:
        return self._stopping

    @property
    def model(self):
        return self._model

    def prepare(self) -> None:
        """Load the model, create the group if missing, and go back to this consumer's own backlog."""
        if self._model is None:
            self._install(self.model_source.current())
        self.ensure_group()
        self._backlog_from = b"0"
        self._ready = True

    def ensure_group(self) -> None:
        """XGROUP CREATE ... 0 MKSTREAM: entries sent before the first worker started are scored too."""
        try:
            self.client.xgroup_create(self.keys.comments, self.keys.group, id="0", mkstream=True)
            log.info("created consumer group %s on %s", self.keys.group, self.keys.comments)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    def run(self) -> int:
        """Process batches until :meth:`stop`; returns the exit code (0).

        With ``settings.overlap_commit`` a batch is committed on a second
        connection while the next one is read and scored; commits still happen
        one at a time and in order, and the last one is waited for before
        returning.
        """
        log.info("consumer %s reading %s as group %s", self.consumer, self.keys.comments, self.keys.group)
        if self.settings.overlap_commit:
            self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="seawall-commit")
        try:
            self._loop()
        finally:
            self._abandon_inflight()
            if self._executor is not None:
                self._executor.shutdown(wait=True)
                self._executor = None
        log.info("consumer %s stopped", self.consumer)
        return 0

    def _loop(self) -> None:
        failures = 0
        while not self._stopping:
            try:
                if not self._ready:
                    self.prepare()
                self.step(overlap=True)
            except (redis.ConnectionError, redis.TimeoutError) as exc:
                self._abandon_inflight()
                failures += 1
                self._ready = False
                delay = self.backoff(failures)
                what = ("Redis refused the credentials; check the user and password in the URL"
                        if isinstance(exc, redis.AuthenticationError) else "lost connection to Redis")
                log.warning("%s (%s: %s); retrying in %.2fs (attempt %d)",
                            what, type(exc).__name__, exc, delay, failures)
                self._sleep(delay)
                continue
            except redis.ResponseError as exc:
                self._abandon_inflight()
                self._ready = False
                if "NOGROUP" in str(exc):
                    # The server came back without the group (no persistence): make it again.
                    log.warning("consumer group %s is gone; creating it again", self.keys.group)
                    continue
                # OOM, BUSY, a key of the wrong type...: the batch stays pending; back off and retry.
                failures += 1
                delay = self.backoff(failures)
                log.error("Redis refused a command (%s); the batch stays pending; retrying in %.2fs (attempt %d)",
                          exc, delay, failures)
                self._sleep(delay)
                continue
            if failures:
                log.info("reconnected to Redis after %d failed attempt(s)", failures)
                self.observer.on_reconnect()
                failures = 0

    def backoff(self, failures: int) -> float:
        s = self.settings
        return min(s.backoff_cap_s, s.backoff_base_s * s.backoff_factor ** max(0, failures - 1))

    def _sleep(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while not self._stopping:
            left = deadline - time.monotonic()
            if left <= 0:
                return
            time.sleep(min(left, 0.05))

    # -- one iteration ------------------------------------------------------------------------

    def step(self, *, overlap: bool = False) -> BatchResult:
        """Reload if due, reclaim if due, then read and process one batch."""
        self._deadletter_log.flush()
        now = time.monotonic()
        if now >= self._next_reload:
            self._next_reload = now + self.settings.reload_poll_s
            self.reload()
        if now >= self._next_claim:
            self._next_claim = now + self.settings.claim_every_s
            self.reclaim()
        if self._reports_verdicts and now >= self._next_lag:
            self._next_lag = now + self.settings.lag_every_s
            self.report_lag()
        if self._backlog_from is not None:
            entries = self.read(self._backlog_from, block=False)
            if entries:
                self._backlog_from = entries[-1].stream_id
                return self.process(entries, deliveries=self.deliveries([e.stream_id for e in entries]),
                                    overlap=overlap)
            self._backlog_from = None
        entries = self.read(b">", block=True)
        return self.process(entries, overlap=overlap)

    def read(self, start: bytes, *, block: bool) -> list[Entry]:
        args = ["XREADGROUP", "GROUP", self.keys.group, self.consumer, "COUNT", self.settings.batch]
        if block:
            args += ["BLOCK", self.settings.block_ms]
        args += ["STREAMS", self.keys.comments, start]
        return parse_xreadgroup(self.client.execute_command(*args), self._stream)

    def deliveries(self, stream_ids: Sequence[bytes]) -> dict[bytes, int]:
        """Delivery counts of pending entries (XPENDING, one row per id, one round trip)."""
        if not stream_ids:
            return {}
        pipe = self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.execute_command("XPENDING", self.keys.comments, self.keys.group, sid, sid, 1)
        counts = {}
        for reply in pipe.execute():
            for row in parse_xpending_range(reply):
                counts[row.stream_id] = row.deliveries
        return counts

    def reclaim(self) -> BatchResult:
        """Take over entries idle longer than ``claim_idle_ms`` and process them."""
        self.settle()
        total = BatchResult()
        cursor = b"0-0"
        for _ in range(MAX_CLAIM_ROUNDS):
            reply = self.client.execute_command(
                "XAUTOCLAIM", self.keys.comments, self.keys.group, self.consumer,
                self.settings.claim_idle_ms, cursor, "COUNT", self.settings.batch,
            )
            claimed = parse_xautoclaim(reply)
            if claimed.deleted:
                self._dead_letter_trimmed(claimed.deleted)
            if claimed.entries:
                log.info("took over %d idle entries", len(claimed.entries))
                ids = [e.stream_id for e in claimed.entries]
                result = self.process(claimed.entries, deliveries=self.deliveries(ids))
                total.read += result.read
                total.written += result.written
                total.duplicates += result.duplicates
                for reason, n in result.dead.items():
                    total.dead[reason] = total.dead.get(reason, 0) + n
            cursor = claimed.cursor
            if cursor in (b"0-0", b"0") or self._stopping:
                break
        return total

    def _dead_letter_trimmed(self, stream_ids: Sequence[bytes], pipeline=None) -> None:
        # XAUTOCLAIM already dropped these from the pending list, and only this
        # consumer saw them go, so no XACK guard is needed (or possible).
        pipe = pipeline if pipeline is not None else self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.xadd(
                self.keys.deadletter,
                {"reason": "trimmed", "detail": "the entry was deleted from the stream before it was scored",
                 "stream_id": sid, "source": self.keys.comments},
                maxlen=self.settings.deadletter_maxlen, approximate=True,
            )
        if pipeline is None:
            pipe.execute()
        for _ in stream_ids:
            self.observer.on_deadletter("trimmed")
        self._deadletter_log.add("trimmed", "the entry was deleted from the stream before it was scored",
                                 count=len(stream_ids))

    def reload(self) -> None:
        model = self.model_source.poll()
        if model is not None:
            self._install(model)

    def _install(self, model) -> None:
        router = Router.for_model(model, self.settings)
        self._model, self._router = model, router
        cutoffs = router.cutoffs("")
        log.info("serving model %s (hold %.4f, reject %.4f)", model.version, cutoffs.hold, cutoffs.reject)
        for warning in router.warnings():
            log.warning("model %s: %s", model.version, warning)
        self.observer.on_model(str(model.version), float(getattr(model, "created_at", 0.0) or 0.0))

    def report_lag(self) -> None:
        reply = self.client.execute_command("XINFO GROUPS", self.keys.comments)
        info = parse_xinfo_group(reply, self.keys.group)
        self.observer.on_lag(info["lag"], info["pending"])

    # -- one batch ------------------------------------------------------------------------------

    def process(self, entries: Sequence[Entry], *, deliveries: dict[bytes, int] | None = None,
                overlap: bool = False) -> BatchResult:
        """Validate, score, route and commit ``entries``; never raises on bad input.

        With ``overlap`` (used by :meth:`run`), the commit goes to the commit
        thread and this returns once the batch is scored; the counts of the
        returned result are filled in when the commit settles (see :meth:`settle`).
        """
        result = BatchResult(read=len(entries))
        if not entries:
            return result
        t0 = time.perf_counter()
        limits = self._input_limits
        max_deliveries = self.settings.max_deliveries
        comments: list[Comment] = []
        dead: list[DeadLetter] = []
        for entry in entries:
            checked = validate(entry, limits)
            count = deliveries.get(entry.stream_id, 1) if deliveries else 1
            if count > max_deliveries:
                checked = dead_letter(entry, "poison", f"delivered {count} times, limit {max_deliveries}", limits)
            (comments if isinstance(checked, Comment) else dead).append(checked)

        scored, failed = self._score(comments)
        dead.extend(failed)
        model = self._model
        now = self.clock()
        batch = (scored, dead, model, now, result, t0, len(entries))
        if overlap and self._executor is not None:
            self.settle()  # commits stay in order: one in flight at a time
            self._inflight = (self._executor.submit(self._commit, scored, dead, model, now), batch)
            return result
        return self._finish(self._commit(scored, dead, model, now), *batch)

    def _commit(self, scored, dead, model, now) -> list[int]:
        return self._committer.commit(self.client, scored, dead, model=str(model.version), now=now,
                                      consumer=self.consumer)

    def settle(self) -> BatchResult | None:
        """Wait for the commit in flight, if any, and report it; its errors are raised here."""
        if self._inflight is None:
            return None
        future, batch = self._inflight
        self._inflight = None
        return self._finish(future.result(), *batch)

    def _abandon_inflight(self) -> None:
        # After a failure elsewhere: let the commit in flight end; if it failed too, its
        # entries are still pending and are read again from this consumer's backlog.
        try:
            self.settle()
        except (redis.RedisError, OSError) as exc:
            log.warning("the batch being committed did not commit (%s); it stays pending", exc)

    def _finish(self, codes, scored, dead, model, now, result: BatchResult, t0: float, size: int) -> BatchResult:
        n = len(scored)
        written = [s for s, code in zip(scored, codes[:n]) if code == WRITTEN]
        result.written = len(written)
        result.duplicates = n - len(written)
        for d, code in zip(dead, codes[n:]):
            if code == WRITTEN:
                result.dead[d.reason] = result.dead.get(d.reason, 0) + 1
                self.observer.on_deadletter(d.reason)
                self._deadletter_log.add(d.reason, d.detail)
        if self._reports_verdicts and written:
            now_ms = now * 1000.0
            self.observer.on_verdicts([
                {"id": s.comment.id, "site": s.comment.site, "action": s.action, "score": float(s.score),
                 "model": str(model.version), "stream_id": s.comment.stream_id,
                 "latency_s": max(0.0, (now_ms - stream_id_ms(s.comment.stream_id)) / 1000.0)}
                for s in written
            ])
        if result.duplicates:
            log.info("skipped %d comment(s) that already had a verdict", result.duplicates)
        self.observer.on_batch(size, time.perf_counter() - t0)
        return result

    def _score(self, comments: list[Comment]) -> tuple[list[Verdict], list[DeadLetter]]:
        """One ``score_many`` call for the batch; if it fails, find the comments it fails on."""
        if not comments:
            return [], []
        model = self._model
        # A spam wave repeats itself word for word: score each distinct text once.
        slots: dict[str, int] = {}
        index = [slots.setdefault(c.text, len(slots)) for c in comments]
        cutoffs = self._router.hold_cutoffs([c.site for c in comments])
        if len(slots) < len(comments):
            # One text on sites with different hold cutoffs is ranked for the highest of them;
            # a comment held below it is explained again in _route.
            highest = [1.0] * len(slots)
            seen = [False] * len(slots)
            for slot, cutoff in zip(index, cutoffs):
                highest[slot] = cutoff if not seen[slot] else max(highest[slot], cutoff)
                seen[slot] = True
            cutoffs = highest
        try:
            scores, reasons = model.score_many(list(slots), top_k=TOP_K, spamward_from=cutoffs)
            scores = [float(s) for s in scores]
            if len(scores) != len(slots) or len(reasons) != len(slots):
                raise ValueError(f"score_many returned {len(scores)} scores for {len(slots)} texts")
        except Exception:  # a model bug on some input must not stop the stream: isolate it below
            log.exception("score_many failed on a batch of %d; scoring one by one", len(comments))
            return self._score_each(comments)
        if len(slots) < len(comments):
            scores = [scores[i] for i in index]
            reasons = [reasons[i] for i in index]
            cutoffs = [cutoffs[i] for i in index]
        return self._route(comments, scores, reasons, cutoffs)

    def _score_each(self, comments: list[Comment]) -> tuple[list[Verdict], list[DeadLetter]]:
        good, scores, reasons, cutoffs, dead = [], [], [], [], []
        for c in comments:
            try:
                cutoff = self._router.hold_cutoffs([c.site])
                s, r = self._model.score_many([c.text], top_k=TOP_K, spamward_from=cutoff)
                good.append(c)
                scores.append(float(s[0]))
                reasons.append(r[0])
                cutoffs.append(cutoff[0])
            except Exception as exc:  # noqa: BLE001 - reported as a dead letter, never swallowed
                dead.append(comment_dead_letter(c, "score_error", f"{type(exc).__name__} in the model",
                                                self._input_limits))
        scored, bad = self._route(good, scores, reasons, cutoffs)
        return scored, dead + bad

    def _route(self, comments, scores, reasons, ranked_from) -> tuple[list[Verdict], list[DeadLetter]]:
        """Decide, let the policies adjust, and explain each final action (``ranked_from``: the
        cutoff each comment's reasons were ranked for; see :func:`worker.routing.explain_decisions`)."""
        dead = []
        if not all(0.0 <= s <= 1.0 for s in scores):  # NaN fails both comparisons
            keep = [i for i, s in enumerate(scores) if 0.0 <= s <= 1.0]
            dead = [comment_dead_letter(comments[i], "score_error", "the model gave a score outside [0, 1]",
                                        self._input_limits)
                    for i in range(len(scores)) if not 0.0 <= scores[i] <= 1.0]
            comments = [comments[i] for i in keep]
            scores = [scores[i] for i in keep]
            reasons = [reasons[i] for i in keep]
            ranked_from = [ranked_from[i] for i in keep]
        decisions = self._router.decide_many(scores, [c.site for c in comments])
        if self.policies:
            decisions = apply_policies(self.policies, self.client, comments, scores, decisions)
        try:
            reasons = explain_decisions(self._model, [c.text for c in comments], scores, decisions, list(reasons),
                                        ranked_from, top_k=TOP_K)
        except Exception:  # noqa: BLE001 - the scores stand; only the order of the reasons is lost
            log.exception("explaining held comments again failed; their reasons keep the model's order")
        scored = [Verdict.of(c, s, d, r) for c, s, d, r in zip(comments, scores, decisions, reasons)]
        return scored, dead

