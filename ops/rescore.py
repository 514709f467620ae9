"""Re-score the hold queue after a promotion.

Every comment still in ``held`` has no moderator decision (feedback removes
the id from ``held`` in the same MULTI that stores the label).  Each is scored
again by the new model from its cached text; a verdict marked ``rescored=1``
goes to the verdicts stream, the cache records the new score, and the
comment leaves the hold queue when the new model publishes or rejects it.

The write of one batch is a Lua script that re-checks, id by id, that the
comment is still held: a label that arrived while the batch was being scored
wins, and that comment gets no re-scored verdict.  Comments whose cached text
has expired stay held for a moderator.
"""
from __future__ import annotations

import json
import time

from worker.routing import Router
from worker.settings import Keys

# KEYS: held, verdicts, text:{id}...   ARGV: maxlen, then 7 values per comment.
_WRITE = """
local held, verdicts = KEYS[1], KEYS[2]
local maxlen = ARGV[1]
local written, released = 0, 0
local n = (#ARGV - 1) / 7
for i = 0, n - 1 do
  local a = 2 + i * 7
  local id, score, action, model, reasons, site, stream_id =
    ARGV[a], ARGV[a+1], ARGV[a+2], ARGV[a+3], ARGV[a+4], ARGV[a+5], ARGV[a+6]
  if redis.call('ZSCORE', held, id) then
    redis.call('XADD', verdicts, 'MAXLEN', '~', maxlen, '*', 'id', id, 'score', score, 'action', action,
               'model', model, 'reasons', reasons, 'site', site, 'stream_id', stream_id, 'rescored', '1')
    if redis.call('EXISTS', KEYS[3 + i]) == 1 then
      redis.call('HSET', KEYS[3 + i], 'score', score, 'action', action, 'model', model, 'reasons', reasons)
    end
    if action ~= 'hold' then
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


def rescore_held(client, keys: Keys, model, *, batch: int = 500, site_overrides=None,
                 verdicts_maxlen: int = 1_000_000) -> dict:
    """Re-score every held comment with ``model``; returns counts."""
    if isinstance(batch, bool) or not isinstance(batch, int) or batch < 1:
        raise ValueError(f"rescore_held: bad batch={batch!r}")
    router = Router(thresholds=model.thresholds, site_overrides=site_overrides or {})
    script = client.register_script(_WRITE)
    counts = {"held": 0, "rescored": 0, "released": 0, "no_text": 0, "model": model.version}
    t0 = time.perf_counter()
    ids = [_s(m) for m in client.zrange(keys.held, 0, -1)]
    counts["held"] = len(ids)
    for start in range(0, len(ids), batch):
        chunk = ids[start:start + batch]
        lookup = client.pipeline(transaction=False)
        for comment_id in chunk:
            lookup.hmget(keys.text(comment_id), ["text", "site", "stream_id"])
        found = []
        for comment_id, (text, site, stream_id) in zip(chunk, lookup.execute()):
            if text is None:
                counts["no_text"] += 1
                continue
            found.append((comment_id, _s(text), _s(site or b""), _s(stream_id or b"")))
        if not found:
            continue
        scores, reasons = model.score_many([f[1] for f in found], top_k=5)
        actions = router.route_many([float(s) for s in scores], [f[2] for f in found])
        args = [verdicts_maxlen]
        for (comment_id, _text, site, stream_id), score, why, action in zip(found, scores, reasons, actions):
            args += [comment_id, f"{float(score):.4f}", action, model.version,
                     json.dumps([[t, round(float(c), 4)] for t, c in why]), site, stream_id]
        written, released = script(keys=[keys.held, keys.verdicts] + [keys.text(f[0]) for f in found], args=args)
        counts["rescored"] += int(written)
        counts["released"] += int(released)
    counts["seconds"] = round(time.perf_counter() - t0, 3)
    counts["still_held"] = counts["rescored"] - counts["released"]
    return counts

