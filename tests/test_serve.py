"""`seawall serve`: every setting in --help, a clear error without a model, --processes N."""
from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

from kit import wait_for_progress
from worker_models import tiny_model
from ops.bench.stream import invented_comments
from ops.cli import build_parser, main
from ops.config import iter_settings
from worker.settings import Keys

KEYS = Keys()


def test_help_lists_every_setting(capsys):
    with pytest.raises(SystemExit):
        build_parser().parse_args(["serve", "--help"])
    shown = capsys.readouterr().out
    for flag in ("--redis", "--model", "--consumer", "--batch", "--block-ms", "--processes", "--config"):
        assert flag in shown
    for name, _tp, _default, _help in iter_settings():
        assert name in shown, name


@pytest.mark.redis_server
def test_no_model_anywhere_is_one_line_and_exit_2(redis_server, capsys, monkeypatch):
    for var in [v for v in os.environ if v.startswith("SEAWALL_")]:
        monkeypatch.delenv(var)
    assert main(["serve", "--redis", redis_server.url]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("seawall serve: error: ") and "model" in err[-1]


@pytest.mark.slow
@pytest.mark.redis_server
def test_processes_runs_named_consumers_and_forwards_sigterm(redis_server, tmp_path):
    client = redis_server.client()
    model, _version = tiny_model(1)
    pipe = client.pipeline(transaction=False)
    for i, (text, _label) in enumerate(invented_comments(600, seed=8)):
        pipe.xadd(KEYS.comments, {"id": f"c{i}", "text": text})
    pipe.execute()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env.update({"SEAWALL_WAVES_ENABLED": "0", "SEAWALL_METRICS_PORT": "0"})
    proc = subprocess.Popen([sys.executable, "-m", "ops.cli", "serve", "--redis", redis_server.url, "--model",
                             str(model), "--consumer", "edge", "--processes", "2", "--block-ms", "50"],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        def consumers():
            if client.exists(KEYS.comments) and client.xinfo_groups(KEYS.comments):
                return {c["name"] for c in client.xinfo_consumers(KEYS.comments, KEYS.group)}
            return set()

        wait_for_progress(lambda: consumers() == {b"edge-0", b"edge-1"} and client.xlen(KEYS.verdicts) == 600,
                          lambda: (len(consumers()), client.xlen(KEYS.verdicts)), stall_s=60, interval=0.05,
                          what="both children reading and every verdict (progress: consumers, verdicts)")
        names = consumers()
        assert names == {b"edge-0", b"edge-1"}
        assert client.xlen(KEYS.verdicts) == 600
        proc.send_signal(signal.SIGTERM)
        _out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0
    assert err.count("consumer edge-0 stopped") == 1 and err.count("consumer edge-1 stopped") == 1
    assert client.xpending(KEYS.comments, KEYS.group)["pending"] == 0


def test_logging_keeps_the_amqp_client_quiet_even_at_debug():
    # pika logs each connection step at INFO and frames at DEBUG; a frame's body is a comment, never logged.
    import logging

    from ops.serving import configure_logging

    root, pika = logging.getLogger(), logging.getLogger("pika")
    saved = (root.handlers[:], root.level, pika.level)
    configure_logging("DEBUG")
    try:
        assert logging.getLogger().level == logging.DEBUG
        assert pika.getEffectiveLevel() == logging.WARNING
    finally:
        root.handlers[:] = saved[0]
        root.setLevel(saved[1])
        pika.setLevel(saved[2])
