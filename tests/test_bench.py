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
    assert 0.5 < rows["seawall_test_roc_auc"] <= 1.0
