"""``seawall bench WHAT``: benchmarks that print medians and ratios.

Each benchmark lives in ``ops/bench/<what>.py`` and exposes ``register(subparsers)``
like a command.  Benchmarks measure a reference in the same run and print
ratios; they are commands, never timed tests.
"""
from __future__ import annotations

import importlib

BENCHES = ("model", "score", "stream", "retrain", "soak", "campaigns", "calibration", "startup", "console",
           "cluster")


def register(sub) -> None:
    parser = sub.add_parser("bench", help="benchmarks: medians and ratios against a reference in the same run")
    inner = parser.add_subparsers(dest="bench", metavar="WHAT", required=True)
    for name in BENCHES:
        importlib.import_module(f"ops.bench.{name}").register(inner)
