"""``seawall bench retrain``: the time of one warm-start update, against a fresh fit.

The data are invented (ops/scenario.py): the first model is trained on the
forum's pre-stream training set; the update learns 10,000 short labelled
comments from the stream (with the campaign in it) plus a replay sample of
the original training data for ``retrain.epochs`` passes, then recalibrates
its thresholds, exactly as a retrain does.  The reference in the same run is a from-scratch ``fit`` on
the original data plus the same 10,000 comments.  Both run on one core
(BLAS threads limited to 1).  Target: the update in <= 5 s.

A full ``retrain()`` (drain 10,000 feedback entries, read the store, train,
gate, promote) on an in-process fakeredis is timed once as well.
"""
from __future__ import annotations

import itertools
import time

from ops.bench import interleaved_medians, peak_rss_mb, report

TARGET_S = 5.0


def register(sub) -> None:
    parser = sub.add_parser("retrain", help="one warm-start update on 10,000 labelled comments vs a fresh fit")
    parser.add_argument("--n", type=int, default=10_000, help="labelled comments in the update")
    parser.add_argument("--replay", type=int, default=2_000, help="replay rows of the original training data")
    parser.add_argument("--repeats", type=int, default=3, help="timed runs per figure (the median is printed)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def _data(n: int, replay_n: int):
    import random

    from ops.scenario import Scenario

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


def measure(n: int, replay_n: int, repeats: int) -> dict:
    import dataclasses

    import fakeredis

    from model.classifier import EmbeddingClassifier
    from ops.config import load_config
    from ops.registry import Registry, split_replay
    from ops.retrain import retrain
    from worker.settings import Keys

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

    times = interleaved_medians({"update": lambda _: one_update(), "scratch": lambda _: from_scratch()},
                                repeats=repeats, warmup=0)
    update_s, scratch_s = times["update"], times["scratch"]

    client = fakeredis.FakeRedis()
    keys = Keys()
    registry = Registry(client=client, keys=keys)
    replay_rows, canary = split_replay(original, replay_max=replay_n, canary_size=300)
    registry.promote(registry.push(active))
    registry.set_examples(replay=replay_rows, canary=canary)
    pipe = client.pipeline(transaction=False)
    for i, (text, label) in enumerate(update):
        pipe.xadd(keys.feedback, {"id": f"bench-{i}", "label": "spam" if label else "ham", "text": text,
                                  "moderator": f"mod-{i % 4}"})
    pipe.execute()
    t0 = time.perf_counter()
    outcome = retrain(client, keys, settings)
    full_s = time.perf_counter() - t0

    return {
        "comments": n,
        "replay_rows": len(replay),
        "update_epochs": settings.epochs,
        "update_median_s": round(update_s, 3),
        "fresh_fit_median_s": round(scratch_s, 3),
        "update_over_fresh_fit": round(update_s / scratch_s, 3),
        "update_target_s": TARGET_S,
        "update_within_target": update_s <= TARGET_S,
        "full_retrain_fakeredis_s": round(full_s, 3),
        "full_retrain_train_s": outcome.get("train_seconds"),
        "full_retrain_decision": outcome["decision"],
        "peak_rss_mb": round(peak_rss_mb(), 1),
    }
