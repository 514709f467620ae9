"""``seawall bench retrain``: one gated retrain with both candidates, against the warm start alone.

The data are invented (ops/lab/scenario.py): the first model is trained on the
forum's pre-stream training set; 10,000 short labelled comments from the
stream (with the campaign in it) go through the feedback stream of an
in-process fakeredis, and one whole ``retrain()`` runs: drain, guard, the
warm start and the scratch fit, recalibration, the paired gate, promotion.
The reference in the same run is the same retrain with ``retrain.scratch =
false`` (the warm start alone, as the retrain was before it had a second
candidate); the two take turns, each on a fresh fakeredis, and the medians
are printed with their ratio and spread.  The bare model calls are timed too:
the warm-start update with recalibration, and a from-scratch fit on the
original data plus the same comments.  Everything runs on one core (BLAS
threads limited to 1).  Target: the retrain with both candidates in <= 60 s.
"""
from __future__ import annotations

import itertools
import statistics
import time

from ops.bench import interleaved_medians, peak_rss_mb, report

TARGET_S = 60.0


def register(sub) -> None:
    parser = sub.add_parser("retrain", help="one gated retrain on 10,000 labelled comments, both candidates "
                                            "vs the warm start alone")
    parser.add_argument("--n", type=int, default=10_000, help="labelled comments in the update")
    parser.add_argument("--replay", type=int, default=2_000, help="replay rows of the original training data")
    parser.add_argument("--repeats", type=int, default=3, help="timed runs per figure (the median is printed)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def _data(n: int, replay_n: int):
    import random

    from ops.lab.scenario import Scenario

    scenario = Scenario(seed=11, wave_start_s=600.0, duration_s=48 * 3600.0)
    original = [(c.text, c.label) for c in scenario.training_set(3000)]
    update = [(c.text, c.label) for c in itertools.islice(scenario.stream(), n)]
    replay = random.Random(0).sample(original, min(replay_n, len(original)))
    return original, update, replay


def run(args) -> int:
    from threadpoolctl import threadpool_limits

    if args.n < 100 or args.replay < 0 or args.repeats < 1:
        from model.errors import DataError

        raise DataError("bench retrain: --n must be >= 100, --replay >= 0 and --repeats >= 1")
    with threadpool_limits(limits=1):
        rows = measure(args.n, args.replay, args.repeats)
    report("seawall bench retrain (one core)", rows, as_json=args.json)
    return 0


def _one_retrain(active: bytes, original, update, settings):
    """A whole retrain on a fresh fakeredis holding the bootstrapped model and the feedback; (seconds, report)."""
    import fakeredis

    from ops.registry import Registry, split_replay
    from ops.retrain import retrain
    from worker.labels import label_name
    from worker.settings import Keys

    client = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    keys = Keys()
    registry = Registry(client=client, keys=keys)
    replay_rows, canary = split_replay(original, replay_max=settings.replay_original, canary_size=300)
    registry.promote(registry.push(active))
    registry.set_examples(replay=replay_rows, canary=canary)
    pipe = client.pipeline(transaction=False)
    for i, (text, label) in enumerate(update):
        pipe.xadd(keys.feedback, {"id": f"bench-{i}", "label": label_name(label), "text": text,
                                  "moderator": f"mod-{i % 4}"})
    pipe.execute()
    t0 = time.perf_counter()
    outcome = retrain(client, keys, settings)
    return time.perf_counter() - t0, outcome


def measure(n: int, replay_n: int, repeats: int) -> dict:
    import dataclasses

    from model.classifier import EmbeddingClassifier
    from ops.config import load_config

    settings = dataclasses.replace(load_config(environ={}).retrain, replay_original=replay_n)
    original, update, replay = _data(n, replay_n)
    first = EmbeddingClassifier().fit([t for t, _ in original], [y for _, y in original])
    active = first.to_bytes()
    train = update + replay
    calib = update[: max(200, n // 5)]

    def one_update():
        model = EmbeddingClassifier.from_bytes(active)
        model.learn_many([t for t, _ in train], [y for _, y in train], epochs=settings.epochs or None)
        model.calibrate([t for t, _ in calib], [y for _, y in calib])
        return model

    def from_scratch():
        rows = original + update
        return EmbeddingClassifier().fit([t for t, _ in rows], [y for _, y in rows])

    bare = interleaved_medians({"update": lambda _: one_update(), "scratch": lambda _: from_scratch()},
                               repeats=repeats, warmup=0)

    # Whole retrains, taking turns so that a slow spell of the machine hits both alike.
    variants = {"both": dataclasses.replace(settings, scratch=True),
                "warm_only": dataclasses.replace(settings, scratch=False)}
    seconds: dict[str, list[float]] = {name: [] for name in variants}
    reports: dict[str, list[dict]] = {name: [] for name in variants}
    for _ in range(repeats):
        for name, variant in variants.items():
            elapsed, outcome = _one_retrain(active, original, update, variant)
            seconds[name].append(elapsed)
            reports[name].append(outcome)
    both, warm_only = statistics.median(seconds["both"]), statistics.median(seconds["warm_only"])
    last = reports["both"][-1]

    def part(name: str, key: str) -> float | None:
        values = [r.get("candidates", {}).get(name, {}).get(key) for r in reports["both"]]
        values = [v for v in values if v is not None]
        return round(statistics.median(values), 3) if values else None

    return {
        "comments": n,
        "replay_rows": len(replay),
        "update_epochs": settings.epochs,
        "runs": repeats,
        "retrain_both_candidates_median_s": round(both, 3),
        "retrain_warm_start_only_median_s": round(warm_only, 3),
        "both_over_warm_start_only": round(both / warm_only, 3),
        "retrain_both_candidates_range_s": [round(min(seconds["both"]), 3), round(max(seconds["both"]), 3)],
        "retrain_warm_start_only_range_s": [round(min(seconds["warm_only"]), 3), round(max(seconds["warm_only"]), 3)],
        "warm_start_train_median_s": part("warm_start", "train_seconds"),
        "scratch_fit_train_median_s": part("scratch", "train_seconds"),
        "scratch_fit_rows": last.get("candidates", {}).get("scratch", {}).get("train_rows"),
        "gate_median_s": round(statistics.median(r.get("gate_seconds", 0.0) for r in reports["both"]), 3),
        "target_s": TARGET_S,
        "within_target": both <= TARGET_S,
        "decision": last["decision"],
        "chosen": last.get("chosen"),
        "update_median_s": round(bare["update"], 3),
        "fresh_fit_median_s": round(bare["scratch"], 3),
        "update_over_fresh_fit": round(bare["update"] / bare["scratch"], 3),
        "peak_rss_mb": round(peak_rss_mb(), 1),
    }
