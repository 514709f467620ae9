"""Start-up: the short commands load only the libraries they use.

Wall time is measured by ``seawall bench startup`` (never asserted here); what
a test can pin down is the cause of a slow start, the imports.  Each check
runs the command in a fresh interpreter and reads ``sys.modules`` at exit.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from ops.cli import main

ROOT = Path(__file__).resolve().parent.parent
HEAVY = ("sklearn", "scipy", "numpy", "redis", "rq", "prometheus_client", "rich")

_PROBE = """
import json, sys
from ops.cli import main
try:
    code = main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
heavy = sorted(name for name in {heavy!r} if name in sys.modules)
print(json.dumps({{"code": code, "heavy": heavy}}), file=sys.stderr)
"""


def loaded(*argv: str) -> dict:
    """Run ``seawall ARGV`` in a fresh interpreter; its exit code and the heavy libraries it loaded."""
    proc = subprocess.run([sys.executable, "-c", _PROBE.format(heavy=HEAVY), *argv], cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    return json.loads(proc.stderr.strip().splitlines()[-1])


@pytest.mark.parametrize("argv", [["--help"], ["serve", "--help"], ["bench", "--help"], ["models", "--help"]],
                         ids=["help", "serve-help", "bench-help", "models-help"])
def test_help_loads_no_heavy_library(argv):
    result = loaded(*argv)
    assert result == {"code": 0, "heavy": []}


@pytest.mark.redis_server
def test_feedback_and_watch_load_neither_scikit_learn_nor_scipy(redis_server):
    feedback = loaded("feedback", "c-1", "ham", "--text", "Is the ferry running?", "--redis", redis_server.url)
    assert feedback["code"] == 0 and feedback["heavy"] == ["redis"]
    watch = loaded("watch", "--once", "--redis", redis_server.url)
    assert watch["code"] == 0
    assert not {"sklearn", "scipy", "rq", "prometheus_client", "rich"} & set(watch["heavy"]), watch  # --once is plain


def test_runtime_quality_figures_do_not_import_scikit_learn():
    code = ("import sys; from model.evaluation import evaluate; evaluate([0, 1, 0, 1], [0.1, 0.9, 0.4, 0.3]);"
            "print('sklearn' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert out.stdout.strip() == "False", out.stderr


def test_redis_errors_are_still_one_line_when_redis_was_imported_late(capsys):
    # The CLI maps redis errors to one line without importing redis up front.
    assert main(["watch", "--once", "--redis", "redis://127.0.0.1:1/0"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("seawall watch: error:") and "Traceback" not in err


@pytest.mark.redis_server
def test_bench_startup_prints_medians_beside_the_interpreter_floor(redis_server, capsys):
    assert main(["bench", "startup", "--rounds", "1", "--redis", redis_server.url, "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["rounds"] == 1 and rows["python -c pass median_s"] > 0
    for name in ("help", "feedback", "watch --once"):
        assert rows[f"seawall: {name} median_s"] > rows["python -c pass median_s"]
    assert rows["seawall: help imports"] == "-"
    assert "sklearn" not in rows["seawall: feedback imports"]


def test_train_names_the_calibration_default_without_importing_the_model(capsys):
    from model.calibration import DEFAULT_METHOD, METHODS
    from ops.commands.train import DEFAULT_CALIBRATION, _CalibrationMethods

    assert DEFAULT_CALIBRATION == DEFAULT_METHOD and tuple(_CalibrationMethods()) == METHODS
    with pytest.raises(SystemExit):
        main(["train", "x.jsonl", "--out", "model.npz", "--calibration", "guesswork"])
    assert "invalid choice: 'guesswork'" in capsys.readouterr().err


def test_the_serving_path_never_imports_the_lab():
    # ops/lab/ holds invented data and the demo; a worker, its monitor and the console run without it.
    code = ("import sys; import ops.serving, ops.monitor, ops.commands.serve, ops.console.app, ops.retrain, worker.jobs;"
            "print(sorted(m for m in sys.modules if m == 'ops.lab' or m.startswith('ops.lab.')))")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert out.stdout.strip() == "[]", out.stderr
