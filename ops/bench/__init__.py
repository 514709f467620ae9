"""Benchmarks behind ``seawall bench``; shared timing and reporting helpers."""
from __future__ import annotations

import json
import resource
import statistics
import sys
import time
from collections.abc import Callable


def interleaved_medians(fns: dict[str, Callable[[int], object]], *, repeats: int = 5, warmup: int = 1) -> dict[str, float]:
    """Median wall time of each ``fn(round)``, the functions taking turns in every round.

    Side by side in one loop, so a slow spell of a shared machine hits every
    contender alike and their ratio stays put even when absolute times drift.
    Warm-up rounds (numbered before the timed ones) are not counted.
    """
    times: dict[str, list[float]] = {name: [] for name in fns}
    for round_ in range(warmup + repeats):
        for name, fn in fns.items():
            t0 = time.perf_counter()
            fn(round_)
            if round_ >= warmup:
                times[name].append(time.perf_counter() - t0)
    return {name: statistics.median(values) for name, values in times.items()}


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far, in MiB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def report(title: str, rows: dict, *, as_json: bool) -> None:
    """Print a benchmark's figures as aligned text, or as one JSON object."""
    if as_json:
        json.dump(rows, sys.stdout, indent=2, sort_keys=True)
        sys.stdout.write("\n")
        return
    print(title)
    width = max(len(k) for k in rows)
    for k, v in rows.items():
        shown = f"{v:,.3f}" if isinstance(v, float) else str(v)
        print(f"  {k:<{width}}  {shown}")


def add_harness_arguments(parser, *, comments: int) -> None:
    """The options every worker-throughput benchmark takes (stream, campaigns)."""
    parser.add_argument("--redis", metavar="URL", help="Redis to use (default: start a redis-server on a free port)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--comments", type=int, default=comments, help="comments per throughput run")
    parser.add_argument("--batch", type=int, default=256, help="worker batch size")
    parser.add_argument("--block-ms", type=int, default=100, help="worker XREADGROUP block time")
