"""``seawall bench score``: ``seawall score --json`` on stdin against a scikit-learn script.

Both sides are separate processes reading the same JSON Lines file of
invented forum comments (ops/scenario.py; 50,000 by default, about 160
characters each) on stdin and writing one JSON line per comment to a file:

- Seawall: ``seawall score --model M --json`` (score, action, top-5 reasons);
- the reference: ``python -m ops.bench.score_reference``, the script a user
  would write around the scikit-learn pipeline of ``seawall bench model``
  (Python's ``json`` per line, ``HashingVectorizer`` + ``SGDClassifier``
  in batches of 1,024, one JSON line with id and score each).

Both models are trained here on the scenario's training set.  Each side also
runs on a single comment: that is its start-up (interpreter, imports, model
load, and whatever is set up on first use), reported apart and subtracted
from the timed runs, so the rates and their ratio are for the comments alone
(``ratio_with_startup`` compares the whole runs).  The two take turns, run after
run, so a slow spell of a shared machine hits both.
"""
from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from ops.bench import report


def register(sub) -> None:
    parser = sub.add_parser("score", help="seawall score --json on stdin vs a scikit-learn script, comments/s")
    parser.add_argument("--comments", type=int, default=50_000, help="comments on stdin (default 50,000)")
    parser.add_argument("--repeats", type=int, default=5, help="timed runs per side (the median is printed)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def _data(n: int):
    import itertools

    from ops.scenario import Scenario

    scenario = Scenario(seed=11, wave_start_s=600.0, duration_s=48 * 3600.0)
    train = scenario.training_set(3000)
    stream = list(itertools.islice(scenario.stream(), n))
    return [c.text for c in train], [c.label for c in train], stream


def _prepare(folder: Path, n: int) -> dict:
    """Train both models, write their files and the input; return the commands."""
    import numpy as np

    from model.classifier import EmbeddingClassifier
    from ops.bench.model import _reference

    texts, labels, stream = _data(n)
    EmbeddingClassifier(seed=0).fit(texts, labels).save(folder / "seawall.npz")
    vectorizer, sgd = _reference()
    sgd.fit(vectorizer.transform(texts), labels)
    np.savez(folder / "reference.npz", coef=sgd.coef_, intercept=sgd.intercept_)
    with open(folder / "comments.jsonl", "w", encoding="utf-8") as fh:
        fh.writelines(json.dumps({"id": c.id, "text": c.text}) + "\n" for c in stream)
    with open(folder / "one.jsonl", "w", encoding="utf-8") as fh:
        fh.write(json.dumps({"id": "first", "text": stream[0].text}) + "\n")
    return {
        "seawall": [sys.executable, "-m", "ops.cli", "score", "--model", str(folder / "seawall.npz"), "--json"],
        "reference": [sys.executable, "-m", "ops.bench.score_reference", str(folder / "reference.npz")],
    }


def _timed(command: list[str], stdin: Path, stdout: Path) -> float:
    with open(stdin, "rb") as fin, open(stdout, "wb") as fout:
        t0 = time.perf_counter()
        subprocess.run(command, stdin=fin, stdout=fout, check=True)
        return time.perf_counter() - t0


def measure(n: int, repeats: int) -> dict:
    with tempfile.TemporaryDirectory(prefix="seawall-bench-score-") as tmp:
        folder = Path(tmp)
        commands = _prepare(folder, n)
        startup = {name: [] for name in commands}
        total = {name: [] for name in commands}
        for _ in range(repeats):
            for name, command in commands.items():
                startup[name].append(_timed(command, folder / "one.jsonl", folder / f"{name}.out"))
                total[name].append(_timed(command, folder / "comments.jsonl", folder / f"{name}.out"))
        lines = {name: sum(1 for _ in open(folder / f"{name}.out", "rb")) for name in commands}
    if lines["seawall"] != n or lines["reference"] != n:
        raise RuntimeError(f"bench score: expected {n} output lines, got {lines}")
    start = {name: statistics.median(v) for name, v in startup.items()}
    whole = {name: statistics.median(v) for name, v in total.items()}
    # With very few comments the start-up can take as long as the whole run: no rate then.
    rate = {name: (n - 1) / (whole[name] - start[name]) if whole[name] > start[name] else None for name in commands}
    return {
        "comments": n,
        "repeats": repeats,
        "seawall_startup_s": round(start["seawall"], 3),
        "reference_startup_s": round(start["reference"], 3),
        "seawall_total_s": round(whole["seawall"], 3),
        "reference_total_s": round(whole["reference"], 3),
        "seawall_per_s": rate["seawall"] and round(rate["seawall"], 1),
        "reference_per_s": rate["reference"] and round(rate["reference"], 1),
        "ratio": round(rate["seawall"] / rate["reference"], 2) if rate["seawall"] and rate["reference"] else None,
        "ratio_with_startup": round(whole["reference"] / whole["seawall"], 2),
        "seawall_runs_s": [round(v, 3) for v in total["seawall"]],
        "reference_runs_s": [round(v, 3) for v in total["reference"]],
    }


def run(args) -> int:
    if args.comments < 1 or args.repeats < 1:
        from model.errors import DataError

        raise DataError("bench score: --comments and --repeats must be >= 1")
    report("seawall bench score (start-up subtracted; ratio = Seawall rate / reference rate)",
           measure(args.comments, args.repeats), as_json=args.json)
    return 0
