"""The gated retrain: labels in, a candidate out, promoted only if it is not worse.

One retrain, in order:

1. take the lock (``retrain:lock``, SET NX with a TTL; a second retrain fails
   with :class:`RetrainBusy`), and drain the feedback stream so that no
   label sent before the start is missed;
2. read the labelled store: *new* labels are those after the active model's
   ``labels_cursor`` (the last label its own retrain saw; ``0-0`` for a pushed
   model), the rest are *older*; the latest label of an id wins;
3. poisoning guard, in two parts:

   a. the cap: no single moderator supplies more than
      ``max_moderator_share`` of the new labels (labels without a moderator
      count as one source); the excess is dropped at random (seeded);
   b. corroboration: a source the cap had to trim is suspect, and the labels
      it kept train and judge only where another moderator backs them: an
      untrimmed source labelled the same comment, or a near-identical one
      (word 3-shingle Jaccard >= ``corroboration_similarity``), the same way,
      and more of those labels agree than disagree.  The rest are set aside
      and counted in the report.  The active model's own verdict is *not*
      corroboration: a flood flipping a new campaign to "ham" agrees with a
      model that still publishes the campaign, and those labels alone are
      what would teach "campaign = ham" (on the flood of
      tests/test_faults_feedback.py, 72 of the 400 labels the cap kept were
      such, and training on them alone took the ROC-AUC on later comments
      from 0.908 to 0.397).  Sources under the cap are untouched, so a wave
      several honest moderators correct is still learned;
4. holdout: a stable share of ids (by SHA-1 of the id, so an id is always on
   the same side) is never trained on; with 3b every label left is either
   from an untrimmed source or backed by one, so all of them judge;
5. candidate: a copy of the active model, warm-started with ``learn_many``
   on the new labels + a replay sample of older labels + the replay sample of
   the original training data stored in the registry (at most
   ``replay_ratio`` replay rows per new label), for ``epochs`` passes;
   thresholds recalibrated on holdout + canary;
6. gate: candidate and active are scored on the same holdout (new holdout
   labels + the registry's canary set) and, separately, on the canary set
   alone (trusted data a label flood cannot touch).  Promote only if on each
   set ROC-AUC and recall at ``gate_fpr`` are not worse than the active
   model's by more than the tolerances.  The thresholds do not enter the gate:
   both figures are threshold-free, so calibrating on the same rows does not
   bias it;
7. promote atomically (only if the active model is still the parent), store
   a JSON report, emit a ``retrain`` event (the registry emits ``promote``).
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
import random
import socket
import time
import uuid
from collections import Counter
from dataclasses import dataclass

import numpy as np

from model.errors import DataError, SeawallError
from model.evaluation import evaluate, recall_at_fpr
from model.minhash import MinHasher, band_hashes, exact_jaccard
from ops.registry import Registry, load_model
from ops.settings import RetrainSettings
from worker.feedback import FeedbackConsumer, scan_labels
from worker.settings import Keys

log = logging.getLogger(__name__)

UNATTRIBUTED = "(unattributed)"

_RELEASE = """
if redis.call('get', KEYS[1]) == ARGV[1] then return redis.call('del', KEYS[1]) end
return 0
"""


class RetrainBusy(SeawallError):
    """Another retrain holds the lock."""


@dataclass(frozen=True)
class LabelRow:
    stream_id: str
    id: str
    text: str
    y: int
    moderator: str


def lock_key(keys: Keys) -> str:
    return keys.key("retrain", "lock")


def reports_key(keys: Keys) -> str:
    return keys.key("retrain", "reports")


# -- pure steps ---------------------------------------------------------------------

def stream_id_after(a: str, b: str) -> bool:
    """``a > b`` for Redis stream ids ``ms-seq``."""
    ams, _, aseq = a.partition("-")
    bms, _, bseq = b.partition("-")
    return (int(ams), int(aseq or 0)) > (int(bms), int(bseq or 0))


def label_rows(entries) -> list[LabelRow]:
    """Label records -> rows, the latest label of an id winning, in stream order (pure)."""
    latest: dict[str, LabelRow] = {}
    for sid, rec in entries:
        label = rec.get("label")
        text = rec.get("text", "")
        if label not in ("spam", "ham") or not rec.get("id") or not text.strip():
            continue
        latest.pop(rec["id"], None)  # re-insert so that dict order is the latest label's order
        latest[rec["id"]] = LabelRow(sid, rec["id"], text, 1 if label == "spam" else 0,
                                     rec.get("moderator", "") or UNATTRIBUTED)
    return list(latest.values())


def in_holdout(comment_id: str, share: float) -> bool:
    """Stable assignment of an id to the gate's holdout (pure)."""
    digest = hashlib.sha1(comment_id.encode("utf-8", "surrogatepass")).digest()
    return int.from_bytes(digest[:4], "big") / 2**32 < share


def moderator_cap(counts: dict[str, int], share: float) -> int | None:
    """Largest per-source count c with every source's min(n, c) <= share of the total (pure).

    ``None`` means no cap is needed.  With one source only and ``share < 1``
    the cap is 0: a single moderator cannot make up more than ``share``.
    """
    if share >= 1.0 or not counts:
        return None
    top = max(counts.values())

    def fits(c: int) -> bool:
        total = sum(min(n, c) for n in counts.values())
        return c <= share * total + 1e-9

    if fits(top):
        return None
    lo, hi = 0, top  # fits(lo) holds, fits(hi) does not
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if fits(mid):
            lo = mid
        else:
            hi = mid
    return lo


def cap_moderators(rows: list[LabelRow], share: float, rng: random.Random) -> tuple[list[LabelRow], dict]:
    """Apply the poisoning guard; returns the kept rows and per-source given/kept counts (pure)."""
    counts = Counter(r.moderator for r in rows)
    cap = moderator_cap(dict(counts), share)
    if cap is None:
        return rows, {m: {"given": n, "kept": n} for m, n in counts.items()}
    keep_ids: set[str] = set()
    for source in counts:
        mine = [r.id for r in rows if r.moderator == source]
        if len(mine) > cap:
            mine = rng.sample(mine, cap)
        keep_ids.update(mine)
    kept = [r for r in rows if r.id in keep_ids]
    kept_counts = Counter(r.moderator for r in kept)
    return kept, {m: {"given": n, "kept": kept_counts.get(m, 0)} for m, n in counts.items()}


# Near-identical comments for corroboration: exact Jaccard of word 3-shingle sets,
# candidates found by MinHash LSH.  128 permutations in 32 bands of 4 rows: a pair
# at Jaccard 0.6 shares a band key with probability 0.99, one at 0.1 with 0.003
# (1 - (1 - J**4)**32).  On the invented forum, campaign pairs are at 0.62-1.0 and
# ordinary comment pairs below 0.52 (measured over 3,000 random pairs each).
_SHINGLE = 3
_NUM_PERM = 128
_BANDS = 32
_SIGNATURE_CHUNK = 256   # texts per signatures() call: bounds its (num_perm x shingles) scratch array
_MAX_CANDIDATES = 200    # pool texts checked per query: bounds the work when thousands of copies share a bucket
_MAX_WITNESSES = 25      # near-identical labels counted per query


def near_duplicates(queries: list[str], pool: list[str], similarity: float) -> list[list[int]]:
    """For each query text, indices of pool texts whose word 3-shingle Jaccard is >= ``similarity`` (pure).

    At most ``_MAX_WITNESSES`` matches per query, from at most ``_MAX_CANDIDATES``
    LSH candidates, in pool order.  Texts without a word match nothing.
    """
    if not queries or not pool:
        return [[] for _ in queries]
    hasher = MinHasher(num_perm=_NUM_PERM, shingle=_SHINGLE)

    def band_keys_of(texts: list[str]) -> np.ndarray:
        return np.concatenate([band_hashes(hasher.signatures(texts[i:i + _SIGNATURE_CHUNK]), _BANDS)
                               for i in range(0, len(texts), _SIGNATURE_CHUNK)])

    pool_shingles = [hasher.shingles(t) for t in pool]
    buckets: dict[int, list[int]] = {}
    for j, keys in enumerate(band_keys_of(pool).tolist()):
        if pool_shingles[j]:
            for key in keys:
                buckets.setdefault(key, []).append(j)
    out = []
    for text, keys in zip(queries, band_keys_of(queries).tolist()):
        mine = hasher.shingles(text)
        found: list[int] = []
        if mine:
            candidates = sorted({j for key in keys for j in buckets.get(key, ())})[:_MAX_CANDIDATES]
            found = [j for j in candidates if exact_jaccard(mine, pool_shingles[j]) >= similarity][:_MAX_WITNESSES]
        out.append(found)
    return out


def corroborate(rows: list[LabelRow], witnesses: list[LabelRow], suspects: set[str], *,
                similarity: float) -> tuple[list[LabelRow], dict]:
    """Keep a suspect source's labels only where other moderators back them (pure).

    ``rows`` are the labels left after the cap; ``suspects`` the sources it
    trimmed; ``witnesses`` the new labels of every other source (including any
    a suspect's later label of the same id replaced).  A suspect's label is
    kept when, among the witnesses' labels of the same id or of a
    near-identical text (:func:`near_duplicates`), more agree with it than
    disagree; otherwise it is set aside.  Labels of other sources are kept
    as they are.  Returns the kept rows (order kept) and, per suspect source,
    ``{"set_aside": n, "contradicted": m}``: ``m`` of the ``n`` had witnesses
    against them (at least as many as for them), the rest had none at all.
    """
    counts = {m: {"set_aside": 0, "contradicted": 0} for m in suspects}
    suspect_rows = [r for r in rows if r.moderator in suspects]
    if not suspect_rows:
        return list(rows), counts
    pool = [w for w in witnesses if w.moderator not in suspects]
    by_id: dict[str, list[int]] = {}
    for j, w in enumerate(pool):
        by_id.setdefault(w.id, []).append(j)
    near = near_duplicates([r.text for r in suspect_rows], [w.text for w in pool], similarity)
    set_aside: set[str] = set()
    for r, found in zip(suspect_rows, near):
        backing = set(found) | set(by_id.get(r.id, ()))
        agree = sum(1 for j in backing if pool[j].y == r.y)
        if agree > len(backing) - agree:
            continue
        set_aside.add(r.id)
        counts[r.moderator]["set_aside"] += 1
        if len(backing) - agree > 0:
            counts[r.moderator]["contradicted"] += 1
    return [r for r in rows if r.id not in set_aside], counts  # ids are unique: the latest label of an id won


def replay_sizes(n_new: int, n_older: int, n_original: int, settings: RetrainSettings) -> tuple[int, int]:
    """How many older labels and original rows to replay beside ``n_new`` new labels (pure).

    The replay is at most ``replay_ratio`` rows per new label, so that old
    data remind the model without drowning what it should learn; when both
    kinds are available each gets half of that budget, and what one cannot
    use goes to the other.
    """
    budget = int(settings.replay_ratio * n_new)
    older = min(settings.replay_labels, n_older)
    original = min(settings.replay_original, n_original)
    if older + original <= budget:
        return older, original
    half = budget // 2
    take_old = min(older, max(half, budget - original))
    return take_old, min(original, budget - take_old)


def ranking_figures(labels, scores, fpr: float) -> dict:
    out = evaluate(labels, scores)
    out["recall_at_gate_fpr"] = recall_at_fpr(np.asarray(labels), np.asarray(scores), fpr)
    return out


def gate_decision(sets: dict, *, auc_tolerance: float, recall_tolerance: float) -> tuple[bool, list[str]]:
    """Promote only if on every evaluated set the candidate is not worse beyond the tolerances (pure)."""
    reasons = []
    ok = True
    for name, pair in sets.items():
        a, c = pair["active"], pair["candidate"]
        d_auc = c["roc_auc"] - a["roc_auc"]
        d_rec = c["recall_at_gate_fpr"] - a["recall_at_gate_fpr"]
        if d_auc < -auc_tolerance:
            ok = False
            reasons.append(f"{name}: ROC-AUC {c['roc_auc']:.4f} is {-d_auc:.4f} below the active model's "
                           f"{a['roc_auc']:.4f} (tolerance {auc_tolerance})")
        if d_rec < -recall_tolerance:
            ok = False
            reasons.append(f"{name}: recall at the gate FPR {c['recall_at_gate_fpr']:.4f} is {-d_rec:.4f} below "
                           f"the active model's {a['recall_at_gate_fpr']:.4f} (tolerance {recall_tolerance})")
        if d_auc >= -auc_tolerance and d_rec >= -recall_tolerance:
            reasons.append(f"{name}: ROC-AUC {a['roc_auc']:.4f} -> {c['roc_auc']:.4f}, recall at the gate FPR "
                           f"{a['recall_at_gate_fpr']:.4f} -> {c['recall_at_gate_fpr']:.4f}: within tolerance")
    return ok, reasons


# -- the lock -------------------------------------------------------------------------

class RetrainLock:
    """``SET NX`` lock with a TTL; released only by its holder (compare-and-delete)."""

    def __init__(self, *, client, keys: Keys, ttl_s: int):
        self.client = client
        self.key = lock_key(keys)
        self.ttl_s = ttl_s
        since = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())  # shown to the next retrain: readable, UTC
        self.token = f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}:{since}"

    def __enter__(self):
        if not self.client.set(self.key, self.token, nx=True, ex=self.ttl_s):
            holder = self.client.get(self.key)
            ttl = self.client.ttl(self.key)
            holder = holder.decode() if isinstance(holder, bytes) else holder
            raise RetrainBusy(f"retrain: another retrain is running (lock held by {holder}, expires in {ttl}s); "
                              "wait for it to finish, or for the lock TTL if it crashed")
        return self

    def __exit__(self, *exc):
        self.client.eval(_RELEASE, 1, self.key, self.token)
        return False


# -- the retrain ------------------------------------------------------------------------

def _now_report(clock) -> dict:
    return {"started_at": round(clock(), 3), "decision": "skipped", "promoted": False, "reasons": []}


def store_report(client, keys: Keys, report: dict, *, kept: int, clock=time.time, pipeline=None) -> None:
    """Store the JSON report (newest first, bounded) and emit the ``retrain`` event."""
    pipe = pipeline if pipeline is not None else client.pipeline(transaction=True)
    pipe.lpush(reports_key(keys), json.dumps(report, sort_keys=True))
    pipe.ltrim(reports_key(keys), 0, kept - 1)
    summary = {k: report.get(k) for k in ("decision", "promoted", "active", "candidate", "reasons", "error")
               if k in report}
    summary["labels_new"] = report.get("labels", {}).get("new", 0)
    pipe.xadd(keys.events, {"type": "retrain", "ts": f"{clock():.3f}",
                            "data": json.dumps(summary, sort_keys=True, separators=(",", ":"))},
              maxlen=100_000, approximate=True)
    if pipeline is None:
        pipe.execute()


def last_reports(client, keys: Keys, n: int = 1) -> list[dict]:
    return [json.loads(x) for x in client.lrange(reports_key(keys), 0, n - 1)]


def retrain(client, keys: Keys, settings: RetrainSettings, *, clock=time.time, on_promoted=None) -> dict:
    """Run one gated retrain now; returns the report (also stored in Redis).

    ``on_promoted(version)`` runs after a successful promotion (the hold-queue
    re-score is enqueued there).  Raises :class:`RetrainBusy` when another
    retrain holds the lock, RegistryError when there is no active model.
    """
    with RetrainLock(client=client, keys=keys, ttl_s=settings.lock_ttl_s):
        report = _now_report(clock)
        t0 = time.perf_counter()
        try:
            _retrain_locked(client, keys, settings, report, clock=clock)
        except Exception as exc:
            # Recorded (report and event say "failed" and why), then raised to the caller.
            report.update(decision="failed", promoted=False, error=f"{type(exc).__name__}: {exc}")
            raise
        finally:
            report["seconds"] = round(time.perf_counter() - t0, 3)
            report["finished_at"] = round(clock(), 3)
            store_report(client, keys, report, kept=settings.reports_kept, clock=clock)
    if report["promoted"] and on_promoted is not None:
        on_promoted(report["candidate"])
    return report


def _retrain_locked(client, keys: Keys, settings: RetrainSettings, report: dict, *, clock) -> None:
    registry = Registry(client=client, keys=keys, clock=clock)
    drained = FeedbackConsumer(
        client=client, keys=keys, group=settings.feedback_group,
        consumer=f"retrain-{socket.gethostname()}-{os.getpid()}", batch=settings.feedback_batch,
        text_max_bytes=settings.feedback_text_max_bytes, labels_max=settings.labels_max,
        claim_idle_ms=settings.feedback_claim_idle_ms, clock=clock,
    ).drain()

    active_version = registry.active()
    if active_version is None:
        from ops.registry import RegistryError

        raise RegistryError("retrain: no active model to start from; bootstrap with "
                            "`seawall models push MODEL_FILE --replay DATA.jsonl` and `seawall models promote VERSION`")
    active_bytes = registry.checked_blob(active_version)
    cursor = registry.meta(active_version).get("labels_cursor", "0-0") or "0-0"
    report["active"] = active_version

    everything = list(scan_labels(client, keys))
    new_entries = [(sid, rec) for sid, rec in everything if stream_id_after(sid, cursor)]
    old_entries = [(sid, rec) for sid, rec in everything if not stream_id_after(sid, cursor)]
    new_rows = label_rows(new_entries)
    new_ids = {r.id for r in new_rows}
    old_rows = [r for r in label_rows(old_entries) if r.id not in new_ids]
    labels = report["labels"] = {"drained": drained, "new": len(new_rows), "older": len(old_rows),
                                 "cursor_from": cursor}
    if len(new_rows) < settings.min_new_labels:
        report["reasons"].append(f"{len(new_rows)} new labels since the last promotion; "
                                 f"retrain.min_new_labels is {settings.min_new_labels}")
        return
    new_cursor = max((sid for sid, _ in new_entries), key=lambda s: tuple(int(x) for x in s.split("-")))
    labels["cursor_to"] = new_cursor

    rng = random.Random(settings.seed)
    capped, by_source = cap_moderators(new_rows, settings.max_moderator_share, rng)
    labels["moderators"] = by_source
    labels["kept_after_cap"] = len(capped)
    dropped = {m: c["given"] - c["kept"] for m, c in by_source.items() if c["given"] > c["kept"]}
    # A source the cap had to trim is suspect: what it kept trains and judges only
    # where another moderator backs it (see the module docstring, step 3b).
    trimmed = set(dropped)
    if trimmed:
        witnesses = label_rows([(sid, rec) for sid, rec in new_entries
                                if (rec.get("moderator", "") or UNATTRIBUTED) not in trimmed])
        capped, guard = corroborate(capped, witnesses, trimmed, similarity=settings.corroboration_similarity)
        for m in sorted(trimmed):
            src = by_source[m]
            aside, contradicted = guard[m]["set_aside"], guard[m]["contradicted"]
            src.update(over_cap=dropped[m], set_aside=aside, contradicted=contradicted,
                       kept=src["kept"] - aside)
            report["reasons"].append(
                f"poisoning guard: {m} supplied {src['given']} of {len(new_rows)} new labels "
                f"(cap {settings.max_moderator_share:.0%}, retrain.max_moderator_share): dropped {dropped[m]} "
                f"over the cap, set aside {aside} that no other moderator backed ({contradicted} of them "
                f"contradicted another moderator's label of the same or a near-identical comment, "
                f"{aside - contradicted} had no such label; the active model's agreement does not count), "
                f"kept {src['kept']}")
    labels["set_aside"] = sum(by_source[m].get("set_aside", 0) for m in trimmed)
    labels["kept_after_guard"] = len(capped)

    holdout = [r for r in capped if in_holdout(r.id, settings.holdout_share)]
    train_new = [r for r in capped if not in_holdout(r.id, settings.holdout_share)]
    older_pool = [r for r in old_rows if not in_holdout(r.id, settings.holdout_share)]
    original = registry.replay()
    n_old, n_orig = replay_sizes(len(train_new), len(older_pool), len(original), settings)
    replay_old = rng.sample(older_pool, n_old)
    replay_orig = rng.sample(original, n_orig)
    canary = registry.canary()
    labels.update({"holdout": len(holdout), "trained_new": len(train_new), "replay_labels": len(replay_old),
                   "replay_original": len(replay_orig), "canary": len(canary)})

    train = [(r.text, r.y) for r in train_new + replay_old] + list(replay_orig)
    rng.shuffle(train)
    if not train_new:
        report["reasons"].append("every new label fell in the holdout or was dropped; nothing new to train on")
        return

    # Every label left is from an untrimmed source or backed by one (step 3b), so all judge.
    judged = holdout
    labels["holdout_judging"] = len(judged)
    gate_rows = [(r.text, r.y) for r in judged] + list(canary)
    gate_y = [y for _, y in gate_rows]
    if len(gate_rows) < settings.min_holdout or len(set(gate_y)) < 2:
        report["decision"] = "refused"
        report["reasons"].append(f"holdout + canary has {len(gate_rows)} rows ({sum(gate_y)} spam); the gate needs "
                                 f">= retrain.min_holdout={settings.min_holdout} with both classes; "
                                 "push a canary set (`seawall models push ... --replay`) or wait for more labels")
        return

    candidate = load_model(active_bytes)
    t_fit = time.perf_counter()
    candidate.learn_many([t for t, _ in train], [y for _, y in train], epochs=settings.epochs or None)
    report["train_seconds"] = round(time.perf_counter() - t_fit, 3)
    try:
        thresholds = candidate.calibrate([t for t, _ in gate_rows], gate_y,
                                         reject_fpr=settings.reject_fpr, hold_fpr=settings.hold_fpr)
        report["thresholds"] = {"hold": float(thresholds.hold), "reject": float(thresholds.reject)}
    except DataError as exc:
        report["reasons"].append(f"thresholds kept from the active model: {exc}")
    active = load_model(active_bytes)

    # Canary rows are the tail of the gate rows: score every row once per model.
    gate_texts = [t for t, _ in gate_rows]
    active_scores = active.predict_proba_many(gate_texts)
    candidate_scores = candidate.predict_proba_many(gate_texts)
    sets = {"holdout+canary": {
        "active": ranking_figures(gate_y, active_scores, settings.gate_fpr),
        "candidate": ranking_figures(gate_y, candidate_scores, settings.gate_fpr),
    }}
    canary_y = [y for _, y in canary]
    if len(set(canary_y)) == 2:
        tail = len(canary)
        sets["canary"] = {
            "active": ranking_figures(canary_y, active_scores[-tail:], settings.gate_fpr),
            "candidate": ranking_figures(canary_y, candidate_scores[-tail:], settings.gate_fpr),
        }
    ok, reasons = gate_decision(sets, auc_tolerance=settings.auc_tolerance, recall_tolerance=settings.recall_tolerance)
    report["gate"] = {"fpr": settings.gate_fpr, "auc_tolerance": settings.auc_tolerance,
                      "recall_tolerance": settings.recall_tolerance, "sets": sets}
    report["reasons"].extend(reasons)
    data = candidate.to_bytes()
    report["candidate"] = candidate.version
    if not ok:
        report["decision"] = "refused"
        return
    version = registry.push(data, source="retrain", parent=active_version, labels_cursor=new_cursor)
    registry.promote(version, expect_active=active_version, actor="retrain",
                     reason="gate passed: " + "; ".join(reasons))
    report["candidate"] = version
    report["decision"] = "promoted"
    report["promoted"] = True
