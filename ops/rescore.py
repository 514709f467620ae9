"""Re-score the hold queue after a promotion.

Every comment still in ``held`` has no moderator decision (feedback removes
the id from ``held`` in the same MULTI that stores the label).  Each is scored
again by the new model from its cached text, and decided by the same router
as the stream worker; a verdict marked ``rescored=1`` (with its ``rule``, and
the ``version`` and ``digest`` of the cached text) goes to the verdicts stream, the cache records the new score, and the
comment leaves the hold queue when the new model publishes or rejects it.

Each partition's hold queue is walked in turn (``keys.parts``), and a
re-scored verdict goes to the comment's own partition's verdicts stream.
The write of one batch is a Lua script on one partition's keys that re-checks, id by id, that the
comment is still held: a label that arrived while the batch was being scored
wins, and that comment gets no re-scored verdict.  Comments whose cached text
has expired stay held for a moderator.
"""
from __future__ import annotations

import time

from model.actions import Action
from worker.commit import text_digest
from worker.routing import Router, score_and_decide
from worker.settings import Keys, PartKeys
from worker.validation import Comment
from worker.verdicts import Verdict

# KEYS: held, verdicts, text:{id}...
# ARGV: maxlen, then per comment: id, stays_held ('1' or '0', decided in Python), n, then the verdict's n
# field/value pairs (as Verdict.as_fields gives them).  The cache keeps the judgement fields of the new verdict.
_WRITE = """
local held, verdicts = KEYS[1], KEYS[2]
local maxlen = ARGV[1]
local judged = {score = true, action = true, rule = true, model = true, reasons = true}
local written, released = 0, 0
local a, i = 2, 0
while a <= #ARGV do
  local id, stays_held, n = ARGV[a], ARGV[a + 1], tonumber(ARGV[a + 2])
  local first = a + 3
  a = first + 2 * n
  i = i + 1
  if redis.call('ZSCORE', held, id) then
    local entry, cache = {'XADD', verdicts, 'MAXLEN', '~', maxlen, '*'}, {'HSET', KEYS[2 + i]}
    for k = first, a - 1, 2 do
      entry[#entry + 1] = ARGV[k]; entry[#entry + 1] = ARGV[k + 1]
      if judged[ARGV[k]] then cache[#cache + 1] = ARGV[k]; cache[#cache + 1] = ARGV[k + 1] end
    end
    redis.call(unpack(entry))
    if redis.call('EXISTS', KEYS[2 + i]) == 1 then redis.call(unpack(cache)) end
    if stays_held ~= '1' then
      redis.call('ZREM', held, id)
      released = released + 1
    end
    written = written + 1
  end
end
return {written, released}
"""


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def rescore_held(client, keys: Keys, model, *, batch: int = 500, settings=None, site_overrides=None,
                 verdicts_maxlen: int = 1_000_000) -> dict:
    """Re-score every held comment with ``model``; returns counts.

    ``settings`` are the routing settings (``Config.worker``; default:
    Seawall's defaults); ``site_overrides`` replaces their per-site table.
    """
    if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
        raise ValueError(f"rescore_held: bad batch={batch!r}")
    router = Router(thresholds=model.thresholds, held_out_ham=getattr(model, "held_out_ham_", None),
                    settings=settings, site_overrides=site_overrides)
    script = client.register_script(_WRITE)
    counts = {"held": 0, "rescored": 0, "released": 0, "no_text": 0, "model": model.version}
    t0 = time.perf_counter()
    for part in keys.parts:
        _rescore_partition(client, part, model, router, script, batch=batch, counts=counts,
                           verdicts_maxlen=verdicts_maxlen)
    counts["seconds"] = round(time.perf_counter() - t0, 3)
    counts["still_held"] = counts["rescored"] - counts["released"]
    return counts



def _rescore_partition(client, part: PartKeys, model, router, script, *, batch: int, counts: dict,
                       verdicts_maxlen: int) -> None:
    """Re-score one partition's hold queue; each batch's write touches only this partition's keys."""
    ids = [_s(m) for m in client.zrange(part.held, 0, -1)]
    counts["held"] += len(ids)
    for start in range(0, len(ids), batch):
        chunk = ids[start:start + batch]
        lookup = client.pipeline(transaction=False)
        for comment_id in chunk:
            lookup.hmget(part.text(comment_id), ["text", "site", "stream_id", "version", "digest"])
        found, marks = [], []
        for comment_id, (text, site, stream_id, version, digest) in zip(chunk, lookup.execute()):
            if text is None:
                counts["no_text"] += 1
                continue
            text = _s(text)
            found.append(Comment(_s(stream_id or b""), comment_id, text, _s(site or b"")))
            marks.append({"version": _s(version or b"1"), "digest": _s(digest) if digest else text_digest(text),
                          "rescored": "1"})
        if not found:
            continue
        scores, decisions, reasons = score_and_decide(model, router, [c.text for c in found], [c.site for c in found])
        args = [verdicts_maxlen]
        for comment, score, why, d, mark in zip(found, scores, reasons, decisions, marks):
            fields = Verdict.of(comment, score, d, why).as_fields(model=str(model.version), **mark)
            args += [comment.id, "1" if d.action == Action.HOLD else "0", len(fields)]
            for pair in fields.items():
                args += pair
        written, released = script(keys=[part.held, part.verdicts] + [part.text(c.id) for c in found], args=args)
        counts["rescored"] += int(written)
        counts["released"] += int(released)


RESCORE_MODES = ("now", "queue", "off")


def rescore_after_switch(mode: str, client, config, version: str) -> dict:
    """Re-score the hold queue after the active model became ``version``; returns what happened.

    ``now`` re-scores in this process.  ``queue`` hands the re-score to an RQ
    worker on ``retrain.queue`` when one listens, and re-scores here when none
    does: a job nobody runs would leave the held comments on the old model's
    verdicts without a word.  ``off`` does nothing.  The result says which
    happened (``rescore_mode``: ``now``, ``queue`` or ``off``) with, when it
    ran here, ``rescore`` (the counts of :func:`rescore_held`) or, when it was
    queued, ``rescore_job`` and ``rq_workers``.  ``rq_workers`` is 0 when
    ``queue`` found no worker and ran the re-score here; ``rq_unavailable``
    is ``cluster`` when the deployment is a Redis Cluster without
    ``[redis] rq_url`` (RQ has no cluster support), and it ran here too.
    """
    if mode not in RESCORE_MODES:
        raise ValueError(f"rescore_after_switch: mode must be one of {RESCORE_MODES}, got {mode!r}")
    if mode == "off":
        return {"rescore_mode": "off"}
    out: dict = {}
    if mode == "queue":
        from ops.config import ConfigError
        from ops.jobs import enqueue_rescore, listening_workers, rq_client

        try:
            jobs = rq_client(config, client)
        except ConfigError:
            # A cluster without [redis] rq_url has no RQ: the model has switched already, so re-score here
            # rather than fail after the switch (the message says why).
            jobs = None
            out["rq_unavailable"] = "cluster"
        workers = listening_workers(jobs, config.retrain.queue) if jobs is not None else 0
        out["rq_workers"] = workers
        if workers:
            return dict(out, rescore_mode="queue", rescore_job=enqueue_rescore(jobs, config, version).id)
    from ops.registry import Registry

    model = Registry(client=client, keys=config.keys).load(version)
    out["rescore"] = rescore_held(client, config.keys, model, batch=config.retrain.rescore_batch,
                                  settings=config.worker, verdicts_maxlen=config.worker.verdicts_maxlen)
    return dict(out, rescore_mode="now")


def describe_rescore(result: dict, *, queue: str) -> str:
    """One line for a person: what :func:`rescore_after_switch` did and how many comments it re-scored."""
    mode = result.get("rescore_mode")
    if mode == "off":
        return "held comments not re-scored (--rescore off)"
    if mode == "queue":
        workers = result.get("rq_workers", 0)
        return (f"hold-queue re-score queued as RQ job {result.get('rescore_job')} on queue {queue!r} "
                f"({workers} RQ worker{'s' if workers != 1 else ''} listening)")
    if mode != "now":
        return "held comments not re-scored"
    done = result.get("rescore") or {}
    where = (f"no RQ worker listens on queue {queue!r}, so the re-score ran here: "
             if result.get("rq_workers") == 0 else "")
    if result.get("rq_unavailable") == "cluster":
        where = ("RQ cannot keep jobs on a Redis Cluster and [redis] rq_url is not set, so the re-score ran here: ")
    if not done.get("held"):
        return where + "no held comments to re-score"
    rescored = done.get("rescored", 0)
    text = (f"{where}re-scored {rescored} held comment{'s' if rescored != 1 else ''}: {done.get('released', 0)} "
            f"published or rejected by the new model, {done.get('still_held', 0)} still held")
    if done.get("no_text"):
        text += f", {done['no_text']} without cached text left for a moderator"
    return text
