"""``seawall bench startup``: how long a short command takes from exec to exit.

Each timed run is a fresh ``python -m ops.cli ...`` process, as a moderator's
script or a shell would start ``seawall``: ``--help``, ``feedback ID spam
--text ...`` and ``watch --once`` against a throw-away redis-server (or
``--redis URL``).  The reference in the same run is the interpreter alone
(``python -c pass``): what no change to Seawall can remove.  ``--compare DIR``
times the same commands from another source tree (an older checkout, say)
in the same rounds, so the two sets of figures share every slow spell of
the machine.  Every round runs every command of every tree once, in turn;
the figures are medians over the rounds.

Targets on a quiet machine: ``--help`` under 0.5 s, ``feedback`` and ``watch
--once`` under 1 s.  The command also lists which heavy libraries each
command imported (from ``python -X importtime``), since they are most of the
time.
"""
from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from ops.bench import report

# Heavy library -> a module whose import shows it was really loaded (scikit-learn
# puts a stand-in ``rich`` module in place when rich is not installed).
HEAVY = {"sklearn": "sklearn", "scipy": "scipy", "numpy": "numpy", "rq": "rq",
         "prometheus_client": "prometheus_client", "redis": "redis", "rich": "rich.console"}
TARGETS_S = {"help": 0.5, "feedback": 1.0, "watch --once": 1.0}
OWN_TREE = Path(__file__).resolve().parents[2]


def register(sub) -> None:
    parser = sub.add_parser("startup", help="wall time of --help, feedback and watch --once in fresh processes")
    parser.add_argument("--rounds", type=int, default=10, help="timed rounds (the median is printed; default 10)")
    parser.add_argument("--redis", metavar="URL", help="Redis to use (default: start a redis-server on a free port)")
    parser.add_argument("--compare", metavar="DIR", default=None,
                        help="another Seawall source tree to time side by side (e.g. an older checkout)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def commands(url: str) -> dict[str, list[str]]:
    """The timed commands, by name (arguments after ``python -m ops.cli``)."""
    return {
        "help": ["--help"],
        "feedback": ["feedback", "bench-c-1", "ham", "--text", "Is the ferry running on Sunday?",
                     "--moderator", "bench", "--redis", url],
        "watch --once": ["watch", "--once", "--redis", url],
    }


def _env(tree: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env["PYTHONPATH"] = str(tree)
    return env


def _time_once(argv: list[str], env: dict, cwd: str) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(argv, env=env, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        from model.errors import SeawallError

        raise SeawallError(f"bench startup: {' '.join(argv[1:4])} ... exited {proc.returncode}: "
                           f"{proc.stderr.decode(errors='replace')[-300:]}")
    return seconds


def heavy_imports(tree: Path, args: list[str], cwd: str) -> list[str]:
    """The heavy top-level packages one run of ``args`` imports (``python -X importtime``)."""
    proc = subprocess.run([sys.executable, "-X", "importtime", "-m", "ops.cli", *args], env=_env(tree), cwd=cwd,
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    seen = {line.rsplit("|", 1)[-1].strip() for line in proc.stderr.splitlines() if line.startswith("import time:")}
    return [name for name, marker in HEAVY.items() if marker in seen]


def measure(url: str, *, rounds: int, compare: Path | None = None) -> dict:
    trees = {"seawall": OWN_TREE}
    if compare is not None:
        trees["compare"] = compare
    cmds = commands(url)
    times: dict[str, list[float]] = {"python -c pass": []}
    times.update({f"{tree}: {name}": [] for tree in trees for name in cmds})
    with tempfile.TemporaryDirectory(prefix="seawall-bench-startup-") as cwd:
        for round_ in range(rounds + 1):  # round 0 warms the file cache and is not counted
            runs = [("python -c pass", [sys.executable, "-c", "pass"], _env(OWN_TREE))]
            runs += [(f"{tree}: {name}", [sys.executable, "-m", "ops.cli", *args], _env(path))
                     for tree, path in trees.items() for name, args in cmds.items()]
            for label, argv, env in runs:
                seconds = _time_once(argv, env, cwd)
                if round_:
                    times[label].append(seconds)
        imports = {f"{tree}: {name}": heavy_imports(path, args, cwd)
                   for tree, path in trees.items() for name, args in cmds.items()}
    rows: dict = {"rounds": rounds}
    for label, values in times.items():
        rows[f"{label} median_s"] = round(statistics.median(values), 3)
        rows[f"{label} spread_s"] = f"{min(values):.3f}-{max(values):.3f}"
    for name in cmds:
        ours = rows[f"seawall: {name} median_s"]
        rows[f"seawall: {name} target_s"] = TARGETS_S[name]
        if compare is not None:
            theirs = rows[f"compare: {name} median_s"]
            rows[f"compare/seawall: {name}"] = round(theirs / ours, 2) if ours else None
    for label, names in imports.items():
        rows[f"{label} imports"] = ", ".join(names) or "-"
    return rows


def run(args) -> int:
    from model.errors import SeawallError

    if args.rounds < 1:
        raise SeawallError("bench startup: --rounds must be >= 1")
    compare = None
    if args.compare:
        compare = Path(args.compare).resolve()
        if not (compare / "ops" / "cli.py").is_file():
            raise SeawallError(f"bench startup: {compare} is not a Seawall source tree (no ops/cli.py)")
    if args.redis:
        rows = measure(args.redis, rounds=args.rounds, compare=compare)
    else:
        from ops.bench.servers import LocalRedis

        with LocalRedis() as url:
            rows = measure(url, rounds=args.rounds, compare=compare)
    report("seawall bench startup (fresh processes; medians over the rounds)", rows, as_json=args.json)
    return 0
