"""The benchmark commands' harness: side-by-side timing and a small end-to-end run."""
from __future__ import annotations

import json

import pytest

from ops.bench import interleaved_medians
from ops.cli import main


def test_interleaved_medians_take_turns_and_skip_warmup():
    calls = []
    medians = interleaved_medians({"a": lambda r: calls.append(("a", r)), "b": lambda r: calls.append(("b", r))},
                                  repeats=3, warmup=1)
    assert calls == [("a", 0), ("b", 0), ("a", 1), ("b", 1), ("a", 2), ("b", 2), ("a", 3), ("b", 3)]
    assert set(medians) == {"a", "b"} and all(v >= 0 for v in medians.values())


@pytest.mark.slow
def test_bench_model_runs_and_reports_ratios(capsys):
    assert main(["bench", "model", "--train", "2000", "--repeats", "2", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["train_comments"] == 2000 and 150 < rows["mean_comment_chars"] < 260
    rate_ratio = rows["seawall_batch1024_per_s"] / rows["reference_batch1024_per_s"]
    assert rows["ratio_batch1024"] == pytest.approx(rate_ratio, abs=0.01)
    assert rows["ratio_batch1"] > 0 and rows["artifact_bytes"] > 0
    assert rows["ratio_batch1_first"] == pytest.approx(
        rows["reference_batch1_first_us"] / rows["seawall_batch1_first_us"], rel=0.02)
    assert 0.5 < rows["seawall_test_roc_auc"] <= 1.0


def test_bench_score_runs_both_scripts_and_reports_rates(capsys):
    # Small and once: the harness, not the speed (benchmarks are never timed tests).
    assert main(["bench", "score", "--comments", "300", "--repeats", "1", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["comments"] == 300 and rows["repeats"] == 1
    assert rows["seawall_startup_cpu_s"] > 0 and rows["reference_startup_cpu_s"] > 0
    assert rows["seawall_total_cpu_s"] > 0 and rows["reference_total_cpu_s"] > 0
    if rows["ratio"] is not None:  # None when 300 comments finish within the start-up's noise
        assert rows["ratio"] == pytest.approx(rows["seawall_per_cpu_s"] / rows["reference_per_cpu_s"], rel=0.01)



def test_bench_comments_draw_ham_words_as_numpy_choice_would():
    # Ham words come from a cumulative-sum lookup instead of Generator.choice(p=...)
    # per word (numpy draws one uniform and searches the normalised cumulative
    # sum); the same seed must keep giving the same comments as choice does.
    import numpy as np

    from ops.bench.model import TARGET_CHARS, CommentMaker

    maker = CommentMaker(seed=4)
    ranks = np.arange(1, len(maker.ham_words) + 1)
    p = (1.0 / ranks**1.05) / np.sum(1.0 / ranks**1.05)
    maker.rng, rng = np.random.default_rng(9), np.random.default_rng(9)
    for _ in range(20):
        parts, size = [], 0
        while size < TARGET_CHARS:  # a ham comment, drawn the way numpy's choice draws
            r = rng.random()
            if r < 0.01:
                word = f"www.{maker.sites[rng.integers(len(maker.sites))]}"
            elif r < 0.02:
                word = maker.spam_words[rng.integers(len(maker.spam_words))]
            else:
                word = maker.ham_words[rng.choice(len(maker.ham_words), p=p)]
            parts.append(word)
            size += len(word) + 1
        assert maker.comment(False) == " ".join(parts)


def test_harness_abort_skips_dead_workers_and_stops_live_ones():
    """The clean-up after a failed run neither raises on a worker that already died nor leaves one running."""
    import sys
    import time

    from ops.bench.stream import Harness

    h = Harness(url="redis://127.0.0.1:1/0", prefix="bench-abort:", model_path="unused", batch=1, block_ms=1)
    dead = h.ctx.Process(target=sys.exit, args=(3,), daemon=True)
    live = h.ctx.Process(target=time.sleep, args=(60,), daemon=True)
    for proc in (dead, live):
        proc.start()
        h.procs.append(proc)
    dead.join(timeout=30)
    assert dead.exitcode == 3
    h.abort()
    assert h.procs == []
    assert not live.is_alive() and live.exitcode is not None
