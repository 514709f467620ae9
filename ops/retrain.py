"""The gated retrain: labels in, two candidates out, the better one promoted only if it is not worse.

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
   from an untrimmed source or backed by one, so all of them judge.  The
   older labels pass the same guard (as one batch), so what an earlier
   retrain set aside does not come back through the replay or the scratch fit;
5. two candidates:

   a. the warm start: a copy of the active model trained further with
      ``learn_many`` on the new labels + a replay sample of older labels + the
      replay sample of the original training data stored in the registry (at
      most ``replay_ratio`` replay rows per new label), for ``epochs`` passes;
   b. the scratch fit (``scratch``): a new model with the active model's
      parameters (``get_params()``), fitted on every guarded label outside the
      holdout plus the whole stored replay sample;

   each recalibrates its thresholds on holdout + canary;
6. gate: every candidate and the active model are scored on the same rows of
   the recent holdout and, separately, of the canary set (trusted data a label
   flood cannot touch).  A candidate is *not worse* on a set when the one-sided
   ``gate_confidence`` lower confidence bound of (candidate - active) is at
   least ``-auc_tolerance`` for ROC-AUC (DeLong's test for two correlated ROC
   curves) and at least ``-recall_tolerance`` for recall at ``gate_fpr`` (a
   stratified paired bootstrap); see :mod:`model.comparison`.  A candidate must
   be not worse on both sets.  If both are, the scratch fit is promoted only
   when the holdout shows it better than the warm start (its DeLong lower
   bound above 0), else the warm start, the smaller change.  The thresholds do
   not enter the gate: both figures are threshold-free, so calibrating on the
   same rows does not bias it.  When the canary set is part of the first
   model's training data (``models push --replay`` with the training data),
   the active model has seen its rows and the comparison there favours it and
   the warm start; it can refuse a good scratch fit, never pass a worse one;
7. promote the chosen candidate atomically (only if the active model is still
   the parent), store a JSON report with both candidates' figures, emit a
   ``retrain`` event (the registry emits ``promote``).
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
from model.comparison import bootstrap_recall_difference, delong_difference
from model.evaluation import evaluate, recall_at_fpr
from model.minhash import MinHasher, band_hashes, exact_jaccard
from ops.labelling import feedback_settings
from ops.registry import Registry, load_model
from ops.settings import RetrainSettings
from worker.events import add_event
from worker.feedback import FeedbackConsumer
from worker.labels import label_value, scan_labels
from worker.settings import FeedbackSettings, Keys, WorkerSettings
from worker.streams import stream_id_order

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
    return keys.shared("retrain", "lock")


def reports_key(keys: Keys) -> str:
    return keys.shared("retrain", "reports")


# -- pure steps ---------------------------------------------------------------------

def label_rows(entries) -> list[LabelRow]:
    """``(stream_id, LabelRecord)`` -> rows, the latest label of an id winning, in stream order (pure)."""
    latest: dict[str, LabelRow] = {}
    for sid, rec in entries:
        if not rec.usable:
            continue
        latest.pop(rec.id, None)  # re-insert so that dict order is the latest label's order
        latest[rec.id] = LabelRow(sid, rec.id, rec.text, label_value(rec.label), rec.moderator or UNATTRIBUTED)
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


def guard_labels(rows: list[LabelRow], entries, settings: RetrainSettings,
                 rng: random.Random) -> tuple[list[LabelRow], dict]:
    """The poisoning guard over one batch of labels: the cap, then corroboration (pure).

    ``entries`` are the batch's raw label records (witnesses include labels a
    later one of the same id replaced).  Returns the kept rows and, per
    source, ``given`` and ``kept``; a source the cap trimmed also has
    ``over_cap``, ``set_aside`` and ``contradicted``.
    """
    capped, by_source = cap_moderators(rows, settings.max_moderator_share, rng)
    dropped = {m: c["given"] - c["kept"] for m, c in by_source.items() if c["given"] > c["kept"]}
    if not dropped:
        return capped, by_source
    # A source the cap had to trim is suspect: what it kept trains and judges only
    # where another moderator backs it (see the module docstring, step 3b).
    witnesses = label_rows([(sid, rec) for sid, rec in entries
                            if (rec.moderator or UNATTRIBUTED) not in dropped])
    kept, guard = corroborate(capped, witnesses, set(dropped), similarity=settings.corroboration_similarity)
    for m, n in dropped.items():
        aside = guard[m]["set_aside"]
        by_source[m].update(over_cap=n, set_aside=aside, contradicted=guard[m]["contradicted"],
                            kept=by_source[m]["kept"] - aside)
    return kept, by_source


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


#: The two candidates, in the order the report lists them (a tie in the choice goes to the first).
CANDIDATES = ("warm_start", "scratch")
_NAMES = {"warm_start": "the warm start", "scratch": "the scratch fit"}


def judgeable(labels) -> bool:
    """Whether a set can be compared on: the paired tests need two spam and two ham rows at least (pure)."""
    spam = sum(labels)
    return min(spam, len(labels) - spam) >= 2


def recent_set_padding(holdout_labels, canary_labels) -> int | None:
    """The class (0 ham, 1 spam) the recent set borrows from the canary set, if it must (pure).

    Moderators mostly label what the worker held, so a night's holdout may be
    all spam.  ROC-AUC needs both classes: such a holdout is judged together
    with the canary set's rows of the class it lacks.  ``None`` when the
    holdout needs nothing or the canary set cannot supply it.
    """
    if judgeable(holdout_labels):
        return None
    spam = sum(holdout_labels)
    missing = 0 if spam >= 2 else 1 if len(holdout_labels) - spam >= 2 else None
    if missing is None:
        return None
    supply = sum(1 for y in canary_labels if y == missing)
    return missing if supply >= 2 else None


def gate_rule(settings: RetrainSettings) -> str:
    """What "not worse" means, in one sentence for the report (pure)."""
    return (f"a candidate is not worse than the active model on a set when the one-sided "
            f"{settings.gate_confidence:.0%} lower confidence bound of (candidate - active) is >= "
            f"-{settings.auc_tolerance:g} for ROC-AUC (DeLong's paired test) and >= -{settings.recall_tolerance:g} "
            f"for recall at {settings.gate_fpr:g} FPR (stratified paired bootstrap, {settings.gate_rounds} rounds); "
            "it must be so on the recent holdout and on the canary set")


def compare_to_active(labels, active_scores, candidate_scores, settings: RetrainSettings) -> dict:
    """Paired comparison of one candidate with the active model on one set of rows (pure)."""
    auc = delong_difference(labels, candidate_scores, active_scores, confidence=settings.gate_confidence)
    recall = bootstrap_recall_difference(labels, candidate_scores, active_scores, fpr=settings.gate_fpr,
                                         rounds=settings.gate_rounds, confidence=settings.gate_confidence,
                                         seed=settings.seed)
    return {"roc_auc": auc.to_dict(), "recall_at_gate_fpr": recall.to_dict(),
            "not_worse": auc.not_worse(settings.auc_tolerance) and recall.not_worse(settings.recall_tolerance)}


def judge_set(name: str, set_name: str, comparison: dict, settings: RetrainSettings) -> str:
    """One line saying how a candidate compares with the active model on one set, and why (pure)."""
    auc, rec = comparison["roc_auc"], comparison["recall_at_gate_fpr"]
    figures = (f"ROC-AUC {auc['reference']:.4f} -> {auc['candidate']:.4f} ({auc['difference']:+.4f}, lower bound "
               f"{auc['lower']:+.4f}), recall at {settings.gate_fpr:g} FPR {rec['reference']:.4f} -> "
               f"{rec['candidate']:.4f} ({rec['difference']:+.4f}, lower bound {rec['lower']:+.4f})")
    if comparison["not_worse"]:
        return f"{set_name}: {_NAMES[name]} is not worse than the active model: {figures}"
    failed = []
    if auc["lower"] < -settings.auc_tolerance - 1e-12:
        failed.append(f"ROC-AUC bound below -{settings.auc_tolerance:g} (retrain.auc_tolerance)")
    if rec["lower"] < -settings.recall_tolerance - 1e-12:
        failed.append(f"recall bound below -{settings.recall_tolerance:g} (retrain.recall_tolerance)")
    return (f"{set_name}: {_NAMES[name]} may be below the active model beyond the tolerance "
            f"({'; '.join(failed)}): {figures}")


def choose_candidate(candidates: dict, scratch_vs_warm: dict | None) -> tuple[str | None, str]:
    """The candidate to promote and why (pure).

    ``candidates`` maps a name of :data:`CANDIDATES` to its gate entry
    (``{"not_worse": bool, ...}``, or ``{"not_built": why}``);
    ``scratch_vs_warm`` is the paired ROC-AUC comparison (a
    :class:`model.comparison.PairedDifference` dict) of the scratch fit with
    the warm start on the recent holdout.  Only candidates not worse than the
    active model on every judged set are eligible.  When both are, the
    scratch fit wins only if the holdout shows it better than the warm start
    (its lower confidence bound above 0); otherwise the warm start, the
    smaller change, is promoted.  The canary set does not decide between
    them: the active model, and so the warm start, has usually seen its rows.
    """
    built = [n for n in CANDIDATES if n in candidates and "not_built" not in candidates[n]]
    eligible = [n for n in built if candidates[n].get("not_worse")]
    if not built:
        return None, "refused: no candidate could be built"
    if not eligible:
        return None, ("refused: " + " and ".join(_NAMES[n] for n in built)
                      + (" may be" if len(built) == 1 else " may both be")
                      + " below the active model beyond the tolerance")
    if len(eligible) == 1:
        (best,) = eligible
        others = [n for n in CANDIDATES if n in candidates and n != best]
        why = f"chose {_NAMES[best]}, the only candidate not worse than the active model"
        return best, why + "".join(
            f"; {_NAMES[n]} " + ("could not be built" if n not in built else "may be below it") for n in others)
    d = scratch_vs_warm
    figures = (f"holdout ROC-AUC {d['candidate']:.4f} against {d['reference']:.4f} "
               f"({d['difference']:+.4f}, lower bound {d['lower']:+.4f})")
    if d["lower"] > 0:
        return "scratch", ("chose the scratch fit: both candidates are not worse, and it is better than the warm "
                           f"start: {figures}")
    return "warm_start", ("chose the warm start: both candidates are not worse, and the holdout does not show "
                          f"the scratch fit better, so the smaller change wins: {figures}")


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
    summary = {k: report.get(k) for k in ("decision", "promoted", "active", "candidate", "chosen", "reasons", "error")
               if k in report}
    summary["labels_new"] = report.get("labels", {}).get("new", 0)
    add_event(client, keys.events, "retrain", summary, ts=clock(), pipeline=pipe)
    if pipeline is None:
        pipe.execute()


def last_reports(client, keys: Keys, n: int = 1) -> list[dict]:
    return [json.loads(x) for x in client.lrange(reports_key(keys), 0, n - 1)]


def retrain(client, keys: Keys, settings: RetrainSettings, *, clock=time.time, on_promoted=None,
            feedback: FeedbackSettings | None = None) -> dict:
    """Run one gated retrain now; returns the report (also stored in Redis).

    ``feedback`` is what drains the feedback stream first (built by
    :func:`ops.labelling.feedback_settings` from the Config; default: from
    ``settings`` and the default worker settings).

    ``on_promoted(version)`` runs after a successful promotion (the hold-queue
    re-score is enqueued there).  Raises :class:`RetrainBusy` when another
    retrain holds the lock, RegistryError when there is no active model.
    """
    with RetrainLock(client=client, keys=keys, ttl_s=settings.lock_ttl_s):
        report = _now_report(clock)
        t0 = time.perf_counter()
        try:
            if feedback is None:
                feedback = feedback_settings(settings, WorkerSettings())
            _retrain_locked(client, keys, settings, report, clock=clock, feedback=feedback)
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


def _retrain_locked(client, keys: Keys, settings: RetrainSettings, report: dict, *, clock,
                    feedback: FeedbackSettings) -> None:
    registry = Registry(client=client, keys=keys, clock=clock)
    drained = FeedbackConsumer(
        client=client, keys=keys, settings=feedback, consumer=f"retrain-{socket.gethostname()}-{os.getpid()}",
        clock=clock,
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
    after = stream_id_order(cursor)
    new_entries = [(sid, rec) for sid, rec in everything if stream_id_order(sid) > after]
    old_entries = [(sid, rec) for sid, rec in everything if stream_id_order(sid) <= after]
    new_rows = label_rows(new_entries)
    new_ids = {r.id for r in new_rows}
    old_rows = [r for r in label_rows(old_entries) if r.id not in new_ids]
    labels = report["labels"] = {"drained": drained, "new": len(new_rows), "older": len(old_rows),
                                 "cursor_from": cursor}
    if len(new_rows) < settings.min_new_labels:
        report["reasons"].append(f"{len(new_rows)} new labels since the last promotion; "
                                 f"retrain.min_new_labels is {settings.min_new_labels}")
        return
    new_cursor = max((sid for sid, _ in new_entries), key=stream_id_order)
    labels["cursor_to"] = new_cursor

    rng = random.Random(settings.seed)
    capped, by_source = guard_labels(new_rows, new_entries, settings, rng)
    labels["moderators"] = by_source
    labels["kept_after_cap"] = len(new_rows) - sum(c.get("over_cap", 0) for c in by_source.values())
    trimmed = sorted(m for m, c in by_source.items() if "over_cap" in c)
    for m in trimmed:
        src = by_source[m]
        aside, contradicted = src["set_aside"], src["contradicted"]
        report["reasons"].append(
            f"poisoning guard: {m} supplied {src['given']} of {len(new_rows)} new labels "
            f"(cap {settings.max_moderator_share:.0%}, retrain.max_moderator_share): dropped {src['over_cap']} "
            f"over the cap, set aside {aside} that no other moderator backed ({contradicted} of them "
            f"contradicted another moderator's label of the same or a near-identical comment, "
            f"{aside - contradicted} had no such label; the active model's agreement does not count), "
            f"kept {src['kept']}")
    labels["set_aside"] = sum(by_source[m]["set_aside"] for m in trimmed)
    labels["kept_after_guard"] = len(capped)
    # Older labels were judged in their own retrain, but what the guard set aside then is still in the
    # store; the same guard over all of them keeps it out of the replay and out of the scratch fit.
    older_kept, older_sources = guard_labels(old_rows, old_entries, settings, random.Random(f"older-{settings.seed}"))
    labels["older_kept"] = len(older_kept)
    if len(older_kept) < len(old_rows):
        report["reasons"].append(
            f"poisoning guard on the older labels: {len(old_rows) - len(older_kept)} of {len(old_rows)} neither "
            "replay nor train the scratch fit (" + ", ".join(
                f"{m}: {c['over_cap']} over the cap, {c['set_aside']} set aside"
                for m, c in sorted(older_sources.items()) if "over_cap" in c) + ")")

    holdout = [r for r in capped if in_holdout(r.id, settings.holdout_share)]
    train_new = [r for r in capped if not in_holdout(r.id, settings.holdout_share)]
    older_pool = [r for r in older_kept if not in_holdout(r.id, settings.holdout_share)]
    original = registry.replay()
    n_old, n_orig = replay_sizes(len(train_new), len(older_pool), len(original), settings)
    replay_old = rng.sample(older_pool, n_old)
    replay_orig = rng.sample(original, n_orig)
    canary = registry.canary()
    labels.update({"holdout": len(holdout), "trained_new": len(train_new), "older_trainable": len(older_pool),
                   "replay_labels": len(replay_old), "replay_original": len(replay_orig), "canary": len(canary)})

    train = [(r.text, r.y) for r in train_new + replay_old] + list(replay_orig)
    rng.shuffle(train)
    if not train_new:
        report["reasons"].append("every new label fell in the holdout or was dropped; nothing new to train on")
        return

    # Every label left is from an untrimmed source or backed by one (step 3b), so all judge.
    labels["holdout_judging"] = len(holdout)
    holdout_y = [r.y for r in holdout]
    padded = recent_set_padding(holdout_y, [y for _, y in canary])
    if len(holdout) < settings.min_holdout or (not judgeable(holdout_y) and padded is None):
        report["decision"] = "refused"
        report["reasons"].append(
            f"the recent holdout has {len(holdout)} rows ({sum(holdout_y)} spam); the gate needs >= "
            f"retrain.min_holdout={settings.min_holdout} with at least two of each class (or one class and a "
            "canary set holding the other); the labels stay new for the next retrain, or raise "
            "retrain.holdout_share")
        return
    if padded is not None:
        missing = "ham" if padded == 0 else "spam"
        report["reasons"].append(
            f"the recent holdout holds no {missing} (moderators mostly label what was held): it is judged "
            f"together with the canary set's {missing}, so it still shows whether the new comments are ranked "
            f"against trusted {missing}")

    if settings.require_canary and not judgeable([y for _, y in canary]):
        # The recent holdout only shows recent comments: a warm start that forgot older spam can look
        # better on it (on the public mail corpus, 0.9996 against 0.9989 there, 0.9948 against 0.9964 on
        # later mail). Without trusted older rows the gate cannot tell, so it keeps the active model.
        report["decision"] = "refused"
        report["reasons"].append(
            "no canary set with both classes in the registry, so nothing shows what a candidate forgot of older "
            "comments; push one (`seawall models push MODEL --replay DATA` or `--canary CANARY.jsonl`), or set "
            "retrain.require_canary = false to judge on the recent holdout alone")
        return

    active = load_model(active_bytes)
    models, entries = {}, {}
    models["warm_start"], entries["warm_start"] = _warm_start(active_bytes, train, settings)
    if settings.scratch and not judgeable([y for _, y in canary]):
        # The holdout only shows recent comments; what a new model forgot of older ones only the
        # canary set can show (a scratch fit on a few recent labels looked perfect on the holdout).
        entries["scratch"] = {"not_built": "no canary set with both classes to show what it forgot of older "
                                           "comments; push one with `seawall models push ... --replay` or --canary"}
    elif settings.scratch:
        scratch_rows = [(r.text, r.y) for r in train_new + older_pool] + list(original)
        random.Random(settings.seed).shuffle(scratch_rows)
        models["scratch"], entries["scratch"] = _scratch_fit(active, scratch_rows)
    models = {name: m for name, m in models.items() if m is not None}
    report["candidates"] = entries
    report["train_seconds"] = round(sum(e.get("train_seconds", 0.0) for e in entries.values()), 3)
    for name, entry in entries.items():
        if "not_built" in entry:
            report["reasons"].append(f"{_NAMES[name]} not built: {entry['not_built']}")

    t_gate = time.perf_counter()
    chosen, why = _gate(active, models, entries, holdout, canary, settings, report)
    report["gate_seconds"] = round(time.perf_counter() - t_gate, 3)
    report["chosen"] = chosen
    report["reasons"].append(why)
    if chosen is None:
        report["decision"] = "refused"
        return
    version = registry.push(models[chosen].to_bytes(), source="retrain", parent=active_version,
                            labels_cursor=new_cursor)
    registry.promote(version, expect_active=active_version, actor="retrain", reason=f"gate passed: {why}")
    report["thresholds"] = entries[chosen].get("thresholds")
    report["candidate"] = version
    report["decision"] = "promoted"
    report["promoted"] = True


def _warm_start(active_bytes: bytes, train: list, settings: RetrainSettings):
    """Candidate 1: a copy of the active model trained further on the new labels + replay."""
    model = load_model(active_bytes)
    t0 = time.perf_counter()
    model.learn_many([t for t, _ in train], [y for _, y in train], epochs=settings.epochs or None)
    return model, {"train_rows": len(train), "train_seconds": round(time.perf_counter() - t0, 3)}


def _scratch_fit(active, rows: list):
    """Candidate 2: a new model with the active model's parameters, fitted on ``rows`` alone.

    The parameters go through ``get_params()``, so a parameter added to the
    model later is carried over without a change here.
    """
    t0 = time.perf_counter()
    try:
        model = type(active)._from_params(active.get_params())
        model.fit([t for t, _ in rows], [y for _, y in rows])
    except DataError as exc:
        return None, {"not_built": f"the fit failed: {exc}", "train_rows": len(rows)}
    return model, {"train_rows": len(rows), "train_seconds": round(time.perf_counter() - t0, 3)}


def _gate(active, models: dict, entries: dict, holdout: list[LabelRow], canary: list, settings: RetrainSettings,
          report: dict) -> tuple[str | None, str]:
    """Recalibrate the candidates, compare each with the active model on the holdout and the canary set,
    and choose; fills ``report["gate"]`` and the candidates' entries."""
    # Canary rows are the tail of the gate rows: score every row once per model.
    gate_rows = [(r.text, r.y) for r in holdout] + list(canary)
    texts, y_all = [t for t, _ in gate_rows], np.array([y for _, y in gate_rows], dtype=np.int64)
    recent = np.arange(len(holdout))
    missing = recent_set_padding(y_all[recent], y_all[len(holdout):])
    if missing is not None:
        recent = np.concatenate([recent, len(holdout) + np.flatnonzero(y_all[len(holdout):] == missing)])
    sets = {"holdout": recent}
    if judgeable(y_all[len(holdout):]):
        sets["canary"] = np.arange(len(holdout), len(gate_rows))
    else:
        report["reasons"].append("no canary set with both classes: the gate judges the recent holdout only; "
                                 "push one with `seawall models push ... --replay` or --canary")
    scores = {"active": active.predict_proba_many(texts)}
    for name, model in models.items():
        try:
            thresholds = model.calibrate(texts, y_all, reject_fpr=settings.reject_fpr, hold_fpr=settings.hold_fpr)
            entries[name]["thresholds"] = thresholds.to_dict()
        except DataError as exc:
            report["reasons"].append(f"{_NAMES[name]}: thresholds kept from the active model: {exc}")
        entries[name]["version"] = model.version
        scores[name] = model.predict_proba_many(texts)
    gate = report["gate"] = {"rule": gate_rule(settings), "confidence": settings.gate_confidence,
                             "fpr": settings.gate_fpr, "auc_tolerance": settings.auc_tolerance,
                             "recall_tolerance": settings.recall_tolerance, "rounds": settings.gate_rounds,
                             "sets": {}}
    for set_name, rows in sets.items():
        y = y_all[rows]
        figures = gate["sets"][set_name] = {"rows": int(len(y)), "spam": int(y.sum())}
        for name, s in scores.items():
            figures[name] = ranking_figures(y, s[rows], settings.gate_fpr)
            if name != "active":
                comparison = compare_to_active(y, scores["active"][rows], s[rows], settings)
                entries[name].setdefault("sets", {})[set_name] = comparison
                report["reasons"].append(judge_set(name, set_name, comparison, settings))
    for name in models:
        entries[name]["not_worse"] = all(c["not_worse"] for c in entries[name]["sets"].values())
    if len(models) == 2:
        rows = sets["holdout"]
        gate["scratch_vs_warm_start"] = delong_difference(
            y_all[rows], scores["scratch"][rows], scores["warm_start"][rows],
            confidence=settings.gate_confidence).to_dict()
    return choose_candidate(entries, gate.get("scratch_vs_warm_start"))
