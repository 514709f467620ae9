"""Control-plane settings sections: retraining, metrics and wave detection.

Like the worker's sections these are frozen dataclasses whose fields carry a
``help`` text; ``ops.config`` fills them once at start-up.
"""
from __future__ import annotations

from dataclasses import dataclass

from worker.settings import FEEDBACK_BOUNDS, setting


@dataclass(frozen=True, kw_only=True)
class RetrainSettings:
    """How the scheduled retrain builds, gates and promotes a candidate."""

    cron: str = setting("0 3 * * *", "cron string (UTC) of the nightly retrain on RQ's cron scheduler")
    queue: str = setting("seawall", "RQ queue the retrain and hold-queue re-score jobs go to")
    job_timeout_s: int = setting(3600, "RQ job timeout of one retrain, in seconds")
    lock_ttl_s: int = setting(3600, "retrain lock TTL: a crashed retrain frees the lock after this many seconds")
    feedback_in_serve: bool = setting(True, "every `seawall serve` process also consumes the feedback stream")
    feedback_group: str = setting("labellers", "consumer group that turns the feedback stream into labels")
    feedback_batch: int = setting(256, "feedback entries read per XREADGROUP call")
    feedback_block_ms: int = setting(1000, "how long one feedback read blocks, in milliseconds")
    feedback_claim_idle_ms: int = setting(60000, "feedback pending this long on a dead consumer is claimed by a retrain's drain")
    feedback_text_max_bytes: int = setting(262144, "largest comment text (UTF-8 bytes) a label may carry")
    backoff_initial_s: float = setting(0.1, "first reconnect delay of the feedback consumer, in seconds")
    backoff_factor: float = setting(2.0, "reconnect delay growth factor")
    backoff_cap_s: float = setting(10.0, "longest reconnect delay, in seconds")
    labels_max: int = setting(200000, "labelled store bound: the oldest labels are trimmed beyond this many")
    min_new_labels: int = setting(20, "a retrain with fewer new labels than this does nothing")
    holdout_share: float = setting(0.2, "share of new labels (chosen by id hash) never trained on, used by the gate")
    min_holdout: int = setting(40, "the gate refuses to promote on a holdout smaller than this")
    replay_labels: int = setting(5000, "replay sample of older labels trained with each retrain")
    replay_original: int = setting(5000, "replay sample of the original training data kept in the registry")
    replay_ratio: float = setting(1.0, "at most this many replay rows (older labels + original data) per new label trained on")
    canary_size: int = setting(500, "canary rows carved from `models push --replay` data when no --canary file is given")
    max_moderator_share: float = setting(0.5, "no single moderator supplies more than this share of one retrain's new labels")
    corroboration_similarity: float = setting(0.6, "a source the cap trimmed trains and judges only with labels another moderator backs: same comment, or one whose word 3-shingle Jaccard similarity is at least this")
    epochs: int = setting(3, "passes of the warm-start update over its rows (0 = the model's own epochs); few, as the active model is already trained and no early stopping guards the update")
    seed: int = setting(0, "seed of the retrain's samples")
    require_canary: bool = setting(True, "promote only with a canary set of both classes in the registry: without one, nothing shows what a candidate forgot of older comments (false: judge the recent holdout alone)")
    scratch: bool = setting(True, "also fit a candidate from scratch (the active model's parameters) on the labelled store + replay; the gate promotes the better of it and the warm start")
    gate_fpr: float = setting(0.01, "false-positive rate at which the gate compares recall")
    gate_confidence: float = setting(0.95, "confidence of the gate's one-sided lower bounds on (candidate - active)")
    gate_rounds: int = setting(2000, "paired bootstrap rounds of the gate's recall comparison")
    auc_tolerance: float = setting(0.002, "promote only if the lower confidence bound of (candidate - active) ROC-AUC (DeLong) is >= -this, on the holdout and on the canary set")
    recall_tolerance: float = setting(0.03, "promote only if the lower confidence bound of (candidate - active) recall at gate_fpr (paired bootstrap) is >= -this, on each set")
    reject_fpr: float = setting(0.001, "target false-positive rate of the recalibrated reject threshold")
    hold_fpr: float = setting(0.02, "target false-positive rate of the recalibrated hold threshold")
    reports_kept: int = setting(50, "retrain reports kept in Redis")
    rescore_batch: int = setting(500, "held comments re-scored per model call after a promotion")
    registry_poll_s: float = setting(2.0, "workers check the active model this often when pub/sub is silent, in seconds")

    def __post_init__(self):
        for name, low, high in _RETRAIN_BOUNDS:
            value = getattr(self, name)
            if not low <= value <= high:
                raise ValueError(f"RetrainSettings: {name} must be in [{low}, {high}], got {value!r}")


# The [retrain] fields that are the feedback consumer's settings: FeedbackSettings field -> RetrainSettings field.
# Their bounds are worker.settings.FEEDBACK_BOUNDS (one table); ops.labelling.feedback_settings builds from these.
FEEDBACK_FIELDS = {
    "group": "feedback_group",
    "batch": "feedback_batch",
    "block_ms": "feedback_block_ms",
    "claim_idle_ms": "feedback_claim_idle_ms",
    "text_max_bytes": "feedback_text_max_bytes",
    "labels_max": "labels_max",
    "backoff_initial_s": "backoff_initial_s",
    "backoff_factor": "backoff_factor",
    "backoff_cap_s": "backoff_cap_s",
}

# (field, lowest, highest) of every numeric retrain setting; checked once at start-up.
_RETRAIN_BOUNDS = tuple((FEEDBACK_FIELDS[name], low, high) for name, low, high in FEEDBACK_BOUNDS
                        if name in FEEDBACK_FIELDS) + (
    ("job_timeout_s", 1, 7 * 86400),
    ("lock_ttl_s", 1, 7 * 86400),
    ("min_new_labels", 1, 10**8),
    ("holdout_share", 0.01, 0.9),
    ("min_holdout", 1, 10**8),
    ("replay_labels", 0, 10**7),
    ("replay_original", 0, 10**7),
    ("replay_ratio", 0.0, 100.0),
    ("canary_size", 0, 10**7),
    ("max_moderator_share", 0.01, 1.0),
    ("corroboration_similarity", 0.05, 1.0),
    ("epochs", 0, 1000),
    ("seed", 0, 2**32 - 1),
    ("gate_fpr", 0.0001, 0.5),
    ("gate_confidence", 0.5, 0.9999),
    ("gate_rounds", 100, 100000),
    ("auc_tolerance", 0.0, 1.0),
    ("recall_tolerance", 0.0, 1.0),
    ("reject_fpr", 0.00001, 0.5),
    ("hold_fpr", 0.00001, 0.5),
    ("reports_kept", 1, 10000),
    ("rescore_batch", 1, 100000),
    ("registry_poll_s", 0.05, 3600.0),
)


@dataclass(frozen=True, kw_only=True)
class MetricsSettings:
    """Where the Prometheus endpoint listens."""

    port: int = setting(9310, "metrics port (/metrics, /healthz, /readyz); 0 turns the endpoint off")
    host: str = setting("127.0.0.1", "metrics bind address; loopback unless you mean to expose it")
    sites: tuple[str, ...] = setting(
        (), "site names allowed as metric labels and wave sites; any other site is counted as `other`"
    )
    flagged_window_s: float = setting(300.0, "sliding window of the per-site flagged-ratio gauge, in seconds")
    poll_s: float = setting(5.0, "how often the ops loop runs the wave detector and refreshes shared gauges (waves, campaigns, retrains) from Redis")

    def __post_init__(self):
        _check_bounds(self, _METRICS_BOUNDS)
        if "other" in self.sites:
            raise ValueError("MetricsSettings: sites must not contain the reserved name 'other'")


@dataclass(frozen=True, kw_only=True)
class WaveSettings:
    """Flagged-rate wave detection and near-duplicate campaign detection."""

    enabled: bool = setting(True, "run the wave and campaign detectors")
    cusum_k: float = setting(0.5, "CUSUM reference value k, in standard deviations (0.5 is tuned to a 1-sigma shift)")
    cusum_h: float = setting(5.0, "CUSUM decision interval h, in standard deviations (5: one false alarm per ~930 quiet minutes per site)")
    baseline_alpha: float = setting(0.05, "EWMA weight that tracks a site's normal flagged rate outside waves (0.05: ~20-minute memory)")
    baseline_minutes: int = setting(30, "minutes of history that seed a site's normal flagged rate before it can alarm")
    min_rate: float = setting(0.01, "floor of the normal flagged rate, so a clean site's variance is never zero")
    min_comments: int = setting(20, "minutes with fewer comments than this for a site are skipped by the detector")
    end_quiet_minutes: int = setting(5, "consecutive in-control minutes that end a wave")
    campaigns: bool = setting(True, "run near-duplicate campaign detection in the comment path (costs Redis work per comment)")
    campaign_shingle: int = setting(3, "words per shingle of the near-duplicate MinHash")
    campaign_perm: int = setting(32, "MinHash permutations (signature length); each costs hashing time per comment")
    campaign_bands: int = setting(16, "LSH bands of permutations / bands rows each (16 x 2: texts above Jaccard ~0.35 usually share a bucket); each costs Redis work per comment")
    campaign_min_size: int = setting(10, "near-duplicates within the window that make a campaign (N)")
    campaign_min_authors: int = setting(3, "distinct authors among them (M); a comment with no author counts as its own")
    campaign_window_s: int = setting(600, "window T in seconds; LSH buckets expire after it")
    campaign_min_words: int = setting(6, "comments with fewer words are not checked for campaigns")
    campaign_hold: bool = setting(True, "hold members of an active campaign even when the model would publish them")
    campaign_baseline_days: int = setting(7, "days of history kept per near-duplicate family: its baseline rate")
    campaign_burst_ratio: float = setting(5.0, "a family is bursty when its count in the window is at least this many times what its history's average rate predicts")
    campaign_peak_ratio: float = setting(2.0, "... and at least this many times the busiest window of its history (campaigns' windows left out)")
    campaign_signals: str = setting("authors", "second signal a campaign needs: authors (its authors are new to the site), lean (its scores lean spam-ward), either or both")
    campaign_new_author_s: int = setting(3 * 86_400, "an author first seen on a site less than this long ago (seconds) is new to it")
    campaign_warmup_s: int = setting(86_400, "authors first seen in this long after the detector first saw their site are never new: it is learning who the regulars are")
    campaign_new_author_share: float = setting(0.5, "share of a family's authors that must be new for the new-author signal")
    campaign_lean_share: float = setting(0.5, "share of a family's comments that must score above the site's lean quantile for the score signal")
    campaign_lean_quantile: float = setting(0.9, "a score leans spam-ward above this quantile of the site's recent scores")

    def __post_init__(self):
        _check_bounds(self, _WAVE_BOUNDS)
        if self.campaign_signals not in ("either", "authors", "lean", "both"):
            raise ValueError(f"WaveSettings: campaign_signals must be either, authors, lean or both, got {self.campaign_signals!r}")
        if self.campaign_perm % self.campaign_bands:
            raise ValueError(f"WaveSettings: campaign_bands ({self.campaign_bands}) must divide campaign_perm ({self.campaign_perm})")


# (field, lowest, highest) of the numeric metrics and wave settings; checked once at start-up.
_METRICS_BOUNDS = (
    ("port", 0, 65535),
    ("flagged_window_s", 1.0, 86400.0),
    ("poll_s", 0.1, 3600.0),
)
_WAVE_BOUNDS = (
    ("cusum_k", 0.0, 10.0),
    ("cusum_h", 0.1, 100.0),
    ("baseline_alpha", 0.001, 1.0),
    ("baseline_minutes", 1, 10000),
    ("min_rate", 0.0001, 0.5),
    ("min_comments", 1, 10**9),
    ("end_quiet_minutes", 1, 10000),
    ("campaign_shingle", 1, 16),
    ("campaign_perm", 1, 4096),
    ("campaign_bands", 1, 4096),
    ("campaign_min_size", 2, 10**9),
    ("campaign_min_authors", 1, 10**9),
    ("campaign_window_s", 1, 7 * 86400),
    ("campaign_min_words", 1, 10000),
    ("campaign_baseline_days", 1, 365),
    ("campaign_burst_ratio", 1.0, 1e6),
    ("campaign_peak_ratio", 1.0, 1e6),
    ("campaign_new_author_s", 0, 10**9),
    ("campaign_warmup_s", 0, 10**9),
    ("campaign_new_author_share", 0.0, 1.0),
    ("campaign_lean_share", 0.0, 1.0),
    ("campaign_lean_quantile", 0.5, 0.999),
)


def _check_bounds(section, bounds) -> None:
    for name, low, high in bounds:
        value = getattr(section, name)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not low <= value <= high:
            raise ValueError(f"{type(section).__name__}: {name} must be in [{low}, {high}], got {value!r}")


@dataclass(frozen=True, kw_only=True)
class ConsoleSettings:
    """The moderators' console in the browser (`seawall console serve`)."""

    host: str = setting("127.0.0.1", "console bind address; loopback unless you put it behind a TLS proxy on purpose")
    port: int = setting(9320, "console port")
    allowed_hosts: tuple[str, ...] = setting(
        (), "extra Host header names the console answers to (e.g. the proxy's name); loopback names always work"
    )
    secure_cookies: bool = setting(False, "mark the session cookie Secure (set this when the console is served over https)")
    session_hours: float = setting(12.0, "a sign-in lasts this many hours")
    undo_s: float = setting(5.0, "seconds a moderator can undo a decision before it is final and sent to the site")
    page_size: int = setting(500, "held comments (or families) shown on one queue page")
    scan_max: int = setting(5000, "newest held comments read for filters and families; older ones are reached by paging")
    poll_s: float = setting(5.0, "how often open pages refresh their live figures, in seconds")
    signin_attempts: int = setting(10, "failed sign-ins for one account within 15 minutes before it is locked for the rest of them")

    def __post_init__(self):
        _check_bounds(self, _CONSOLE_BOUNDS)


_CONSOLE_BOUNDS = (
    ("port", 0, 65535),
    ("session_hours", 0.01, 24 * 30),
    ("undo_s", 0.0, 600.0),
    ("page_size", 1, 5000),
    ("scan_max", 1, 100_000),
    ("poll_s", 0.2, 3600.0),
    ("signin_attempts", 1, 10_000),
)
