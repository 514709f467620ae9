"""The README's "Your own Redis in five commands", run line by line against a real redis-server.

The commands are read out of README.md, so the section and this test cannot
drift: a command renamed, an option dropped or an output changed fails here.
``seawall`` lines run the installed entry point, ``redis-cli`` lines the real
client (pointed at the test's server with ``-p``), and a line ending in ``&``
runs in the background as it would in a shell.  Before reading the verdicts
the test waits for the worker to write them, as a person would wait a moment.
The whole session is printed (``pytest -s`` shows it).
"""
from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from kit import stop_all, wait_until
from servers import free_port, require
from worker.settings import Keys

ROOT = Path(__file__).resolve().parent.parent
HEADING = "## Your own Redis in five commands"
KEYS = Keys()

pytestmark = pytest.mark.redis_server


def walkthrough_commands(readme: str) -> list[str]:
    """The command lines of the first ``sh`` block under the walkthrough's heading (pure)."""
    section = readme.split(HEADING, 1)[1]
    block = re.search(r"```sh\n(.*?)```", section, re.S).group(1)
    return [line.strip() for line in block.splitlines() if line.strip() and not line.strip().startswith("#")]


def test_the_readme_block_is_the_walkthrough_the_issue_describes():
    commands = walkthrough_commands((ROOT / "README.md").read_text(encoding="utf-8"))
    verbs = [" ".join(shlex.split(c)[:2]) for c in commands]
    assert verbs == ["seawall sample", "seawall train", "seawall models", "seawall serve", "redis-cli XADD",
                     "redis-cli XRANGE", "seawall feedback", "seawall sample", "seawall labels", "seawall retrain",
                     "seawall watch"]
    assert "model.npz" in commands[1] and "model.npz" in commands[2]


class Shell:
    """Runs README lines the way a shell would, in one working directory, against one Redis."""

    def __init__(self, *, cwd: Path, port: int, metrics_port: int):
        self.cwd = cwd
        self.port = port
        self.env = {k: v for k, v in __import__("os").environ.items() if not k.startswith("SEAWALL_")}
        self.env.update(SEAWALL_REDIS_URL=f"redis://127.0.0.1:{port}/0", SEAWALL_METRICS_PORT=str(metrics_port))
        self.background: list = []
        self.record: list[str] = []
        seawall = Path(sys.executable).with_name("seawall")
        self.seawall = [str(seawall)] if seawall.exists() else [sys.executable, "-m", "ops.cli"]

    def argv(self, line: str) -> list[str]:
        words = shlex.split(line.rstrip("&"), comments=True)
        if words[0] == "seawall":
            return self.seawall + words[1:]
        if words[0] == "redis-cli":
            return [shutil.which("redis-cli"), "-p", str(self.port), *words[1:]]
        raise AssertionError(f"the walkthrough runs only seawall and redis-cli, not {words[0]!r}")

    def run(self, line: str) -> str:
        self.record.append(f"$ {line}")
        if line.endswith("&"):
            log = open(self.cwd / f"background-{len(self.background)}.log", "wb")
            proc = subprocess.Popen(self.argv(line), cwd=self.cwd, env=self.env, stdout=log, stderr=subprocess.STDOUT)
            self.background.append(_Background(proc, log))
            return ""
        done = subprocess.run(self.argv(line), cwd=self.cwd, env=self.env, capture_output=True, text=True,
                              timeout=600)
        self.record.append(done.stdout.rstrip())
        assert done.returncode == 0, f"{line!r} exited {done.returncode}:\n{done.stdout}\n{done.stderr}"
        return done.stdout


class _Background:
    """A background command, stopped like a worker at the end (``stop_all``)."""

    def __init__(self, proc, log):
        self.proc = proc
        self.log = log

    def stop(self, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            self.proc.terminate()
        code = self.proc.wait(timeout=timeout)
        self.log.close()
        return code


def test_your_own_redis_in_five_commands(redis_server, tmp_path):
    require(shutil.which("redis-cli") is not None, "redis-cli not on PATH")
    client = redis_server.client()
    shell = Shell(cwd=tmp_path, port=redis_server.port, metrics_port=free_port())
    outputs = {}
    try:
        for line in walkthrough_commands((ROOT / "README.md").read_text(encoding="utf-8")):
            if line.startswith("redis-cli XRANGE seawall:verdicts"):
                sent = {f[b"id"] for _i, f in client.xrange(KEYS.comments)}
                wait_until(lambda: sent <= {f[b"id"] for _i, f in client.xrange(KEYS.verdicts)}, timeout=120,
                           what="the worker's verdicts for the comments sent")
            outputs[" ".join(shlex.split(line)[:2])] = shell.run(line)
        codes = stop_all(shell.background)
    finally:
        stop_all([b for b in shell.background if b.proc.poll() is None])
        print("\n".join(shell.record))
    assert codes == [0]  # the worker stops cleanly on SIGTERM

    assert "it is active (was none)" in outputs["seawall models"]
    verdict = outputs["redis-cli XRANGE"].split()
    assert verdict[verdict.index("id") + 1] == "c-1"
    assert verdict[verdict.index("action") + 1] == "reject"   # an obvious spam is rejected by the first model
    assert outputs["seawall feedback"].rstrip().endswith("c-1 -> spam")
    assert outputs["seawall labels"].startswith("labels import: 600 labels")
    retrain = outputs["seawall retrain"]
    assert retrain.startswith("retrain: promoted "), retrain
    assert "re-scored" in retrain or "no held comments" in retrain
    assert "retrain   promoted" in outputs["seawall watch"]
    assert (tmp_path / "model.npz").is_file() and (tmp_path / "sample.jsonl").is_file()


def _help_texts(parser) -> list[str]:
    """Every help text of ``parser`` and its subcommands (argparse's own formatting)."""
    import argparse

    texts = [parser.format_help()]
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub in action.choices.values():
                texts += _help_texts(sub)
    return texts


def test_one_model_file_name_throughout_the_readme_and_the_help():
    from ops.cli import build_parser

    other_names = re.compile(r"\b[\w-]+\.(bin|model|pkl|joblib)\b")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    helps = "\n".join(_help_texts(build_parser()))
    assert other_names.findall(readme) == [] and other_names.findall(helps) == []
    assert "model.npz" in readme
