"""``seawall bench score``: ``seawall score --json`` on stdin against a scikit-learn script.

Both sides are separate processes reading the same JSON Lines file of
invented forum comments (ops/lab/scenario.py; 50,000 by default, about 160
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
run, so a slow spell of a shared machine hits both.  Each run is timed twice:
by the wall clock and by the CPU time the process used (user + system, from
the kernel's accounting of the finished child), with numpy and BLAS held to
one thread.  The CPU figures are the ones to trust on a busy machine, where
waiting for a core inflates wall times at random; ``ratio`` uses them, and
``wall_ratio`` the wall clock.
"""
from __future__ import annotations

import json
import os
import resource
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

    from ops.lab.scenario import Scenario

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


#: One thread for numpy's BLAS and OpenMP in both children: per-core figures.
_ONE_THREAD = {name: "1" for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}


def _timed(command: list[str], stdin: Path, stdout: Path) -> tuple[float, float]:
    """Wall seconds and CPU seconds (user + system) of one run of ``command``."""
    env = {**os.environ, **_ONE_THREAD}
    with open(stdin, "rb") as fin, open(stdout, "wb") as fout:
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        subprocess.run(command, stdin=fin, stdout=fout, check=True, env=env)
        wall = time.perf_counter() - t0
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def _rates(n: int, startup: dict, total: dict) -> dict:
    """Comments per second once started, or None when the start-up took as long as the run."""
    start = {name: statistics.median(v) for name, v in startup.items()}
    whole = {name: statistics.median(v) for name, v in total.items()}
    rate = {name: (n - 1) / (whole[name] - start[name]) if whole[name] > start[name] else None for name in total}
    # unrounded: a small ratio rounded to two decimals is off by several per cent
    ratio = rate["seawall"] / rate["reference"] if rate["seawall"] and rate["reference"] else None
    return {"start": start, "whole": whole, "rate": rate, "ratio": ratio}


def measure(n: int, repeats: int) -> dict:
    with tempfile.TemporaryDirectory(prefix="seawall-bench-score-") as tmp:
        folder = Path(tmp)
        commands = _prepare(folder, n)
        runs = {kind: {clock: {name: [] for name in commands} for clock in ("wall", "cpu")}
                for kind in ("startup", "total")}
        for _ in range(repeats):
            for name, command in commands.items():
                for kind, stdin in (("startup", "one.jsonl"), ("total", "comments.jsonl")):
                    wall, cpu = _timed(command, folder / stdin, folder / f"{name}.out")
                    runs[kind]["wall"][name].append(wall)
                    runs[kind]["cpu"][name].append(cpu)
        lines = {name: sum(1 for _ in open(folder / f"{name}.out", "rb")) for name in commands}
    if lines["seawall"] != n or lines["reference"] != n:
        raise RuntimeError(f"bench score: expected {n} output lines, got {lines}")
    cpu = _rates(n, runs["startup"]["cpu"], runs["total"]["cpu"])
    wall = _rates(n, runs["startup"]["wall"], runs["total"]["wall"])

    def rounded(value, digits):
        return None if value is None else round(value, digits)

    return {
        "comments": n,
        "repeats": repeats,
        "seawall_startup_cpu_s": round(cpu["start"]["seawall"], 3),
        "reference_startup_cpu_s": round(cpu["start"]["reference"], 3),
        "seawall_total_cpu_s": round(cpu["whole"]["seawall"], 3),
        "reference_total_cpu_s": round(cpu["whole"]["reference"], 3),
        "seawall_per_cpu_s": cpu["rate"]["seawall"],
        "reference_per_cpu_s": cpu["rate"]["reference"],
        "ratio": cpu["ratio"],
        "ratio_with_startup": round(cpu["whole"]["reference"] / cpu["whole"]["seawall"], 2),
        "seawall_per_wall_s": rounded(wall["rate"]["seawall"], 1),
        "reference_per_wall_s": rounded(wall["rate"]["reference"], 1),
        "wall_ratio": wall["ratio"],
        "seawall_startup_wall_s": round(wall["start"]["seawall"], 3),
        "reference_startup_wall_s": round(wall["start"]["reference"], 3),
        "seawall_cpu_runs_s": [round(v, 3) for v in runs["total"]["cpu"]["seawall"]],
        "reference_cpu_runs_s": [round(v, 3) for v in runs["total"]["cpu"]["reference"]],
    }


def run(args) -> int:
    if args.comments < 1 or args.repeats < 1:
        from model.errors import DataError

        raise DataError("bench score: --comments and --repeats must be >= 1")
    report("seawall bench score (start-up subtracted; ratio = Seawall rate / reference rate, CPU time)",
           measure(args.comments, args.repeats), as_json=args.json)
    return 0
