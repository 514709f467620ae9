"""What many tests share: a settable clock, waiting for progress, ``seawall serve``
subprocesses, and RQ workers that read Seawall's JSON jobs.

Waiting
-------
A test on a loaded 2-core machine must not fail because the machine is slow,
only because the system under test is stuck.  :func:`wait_for_progress`
waits as long as a counter keeps moving and fails only when it has stood
still for ``stall_s`` seconds; :func:`wait_until` is for a single event
(a log line, a port), with a generous timeout and a message saying what
never happened.

Workers
-------
:class:`Worker` is one ``python -m ops.cli serve`` subprocess (the code path
of the ``seawall`` entry point) talking to a redis-server the test started on
loopback.  Its settings come from ``SEAWALL_*`` environment variables, as an
operator would set them; :data:`FAST_ENV` makes faults show up fast: small
batches, short blocking reads, a short claim idle time and short backoff caps.
"""
from __future__ import annotations

import itertools
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import rq

ROOT = Path(__file__).resolve().parent.parent

# Fast-failing settings for workers under test (each one is a documented Seawall setting).
FAST_ENV = {
    "SEAWALL_WORKER_BATCH": "64",
    "SEAWALL_WORKER_BLOCK_MS": "100",
    "SEAWALL_WORKER_CLAIM_IDLE_MS": "800",
    "SEAWALL_WORKER_CLAIM_EVERY_S": "0.2",
    "SEAWALL_WORKER_BACKOFF_BASE_S": "0.05",
    "SEAWALL_WORKER_BACKOFF_CAP_S": "0.5",
    "SEAWALL_WORKER_RELOAD_POLL_S": "0.1",
    "SEAWALL_WORKER_SOCKET_TIMEOUT_S": "2",
    "SEAWALL_WORKER_LAG_EVERY_S": "0.5",
    "SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "0",
    "SEAWALL_RETRAIN_BACKOFF_CAP_S": "0.5",
    "SEAWALL_RETRAIN_REGISTRY_POLL_S": "0.2",
    "SEAWALL_METRICS_PORT": "0",
    "SEAWALL_LOG_LEVEL": "INFO",
}


class Clock:
    """A clock for code that takes ``clock=``: it says ``t`` until the test moves it."""

    def __init__(self, t: float = 1_800_000_000.0):
        self.t = t

    def __call__(self) -> float:
        return self.t


# -- waiting --------------------------------------------------------------------------------

def wait_until(condition, *, timeout: float, interval: float = 0.05, what: str | None = None):
    """Poll ``condition()`` until it is truthy or ``timeout`` seconds pass; returns its last value.

    With ``what``, a timeout raises ``AssertionError("timed out after ...s waiting for <what>")``
    instead of returning the falsy value.
    """
    deadline = time.monotonic() + timeout
    while True:
        result = condition()
        if result or time.monotonic() >= deadline:
            break
        time.sleep(interval)
    if not result and what is not None:
        raise AssertionError(f"timed out after {timeout}s waiting for {what}")
    return result


def wait_for_progress(done, progress, *, stall_s: float, what: str, interval: float = 0.1,
                      limit_s: float = 1800.0) -> None:
    """Wait until ``done()`` is true while ``progress()`` keeps changing.

    Fails (AssertionError naming ``what`` and the last progress value) when
    ``progress()`` has not changed for ``stall_s`` seconds: the system is
    stuck.  A slow machine that is still working gets the time it needs, up
    to ``limit_s`` in all, so the loop stays bounded.
    """
    started = last_change = time.monotonic()
    last = progress()
    while not done():
        now = time.monotonic()
        value = progress()
        if value != last:
            last, last_change = value, now
        elif now - last_change > stall_s:
            raise AssertionError(f"no progress for {stall_s}s waiting for {what} (progress stuck at {last!r})")
        if now - started > limit_s:
            raise AssertionError(f"still waiting for {what} after {limit_s}s (progress at {last!r})")
        time.sleep(interval)


# -- seawall serve subprocesses ---------------------------------------------------------------

def clean_env(extra: dict | None = None, *, base: dict | None = None) -> dict:
    """A child's environment: ours minus any SEAWALL_* setting, plus ``base`` (:data:`FAST_ENV`) and ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env.update(FAST_ENV if base is None else base)
    env.update(extra or {})
    return env


_LOG_NUMBERS = itertools.count(1)


class Worker:
    """One ``seawall serve`` subprocess; each start's output goes to its own file in ``log_dir``.

    Parameters
    ----------
    url : Redis URL.
    name : consumer name (``--consumer``).
    log_dir : where the ``<name>.<n>.log`` files go.
    model_path : ``--model`` file; ``None`` serves the registry's active model.
    env : extra environment on top of ``base_env``.
    args : extra ``seawall serve`` arguments.
    base_env : the settings under ``env`` (default :data:`FAST_ENV`).
    """

    def __init__(self, *, url: str, name: str, log_dir: Path, model_path=None, env: dict | None = None,
                 args=(), base_env: dict | None = None):
        self.url = url
        self.name = name
        self.log_dir = Path(log_dir)
        self.model_path = model_path
        self.env = clean_env(env, base=base_env)
        self.args = list(args)
        self.proc: subprocess.Popen | None = None
        self.starts = 0
        self.logs: list[Path] = []

    def argv(self) -> list[str]:
        argv = [sys.executable, "-m", "ops.cli", "serve", "--redis", self.url, "--consumer", self.name]
        if self.model_path is not None:
            argv += ["--model", str(self.model_path)]
        return argv + self.args

    def start(self, name: str | None = None) -> "Worker":
        if name is not None:
            self.name = name
        self.starts += 1
        path = self.log_dir / f"{self.name}.{next(_LOG_NUMBERS)}.log"
        self.logs.append(path)
        with open(path, "wb") as log:
            self.proc = subprocess.Popen(self.argv(), stdout=log, stderr=subprocess.STDOUT, env=self.env, cwd=ROOT)
        return self

    @property
    def pid(self) -> int:
        return self.proc.pid

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def signal(self, sig: int) -> None:
        self.proc.send_signal(sig)

    def kill(self) -> int:
        """SIGKILL and reap; returns the exit status (-9)."""
        self.proc.send_signal(signal.SIGKILL)
        return self.proc.wait(timeout=10)

    def stop(self, timeout: float = 20.0) -> int:
        """SIGTERM (finish the batch in hand) and wait; returns the exit status."""
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                return self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
                raise
        return self.proc.returncode

    def started(self) -> bool:
        """The latest start has reached its read loop (signal handlers are installed by then)."""
        return bool(self.logs) and self.logs[-1].exists() and \
            f"consumer {self.name} reading" in self.logs[-1].read_text(errors="replace")

    def output(self) -> str:
        return "\n".join(p.read_text(errors="replace") for p in self.logs if p.exists())


def terminate(proc: subprocess.Popen, *, timeout: float = 20.0) -> int:
    """SIGTERM a child process and reap it; SIGKILL when it has not stopped within ``timeout``. Its exit status."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            return proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
    return proc.wait(timeout=10)


def stop_all(workers) -> list[int]:
    """Stop every worker that is still running (teardown helper); returns their exit codes."""
    codes = []
    for w in workers:
        if w.proc is not None:
            if w.proc.poll() is None:
                w.proc.send_signal(signal.SIGCONT)  # a stalled worker must be able to see SIGTERM
            codes.append(w.stop())
    return codes


# -- RQ -------------------------------------------------------------------------------------------

class _NoCommandChannel:
    """A burst run has no use for RQ's command channel (pub/sub): with RQ 3.0 and redis-py 8,
    closing it can wait out the channel's 60 s read timeout at exit."""

    def subscribe(self):
        pass

    def unsubscribe(self):
        pass


class BurstWorker(_NoCommandChannel, rq.Worker):
    """RQ's default worker (a forked work horse per job) for ``rq worker --burst`` in tests."""


class InProcessBurstWorker(_NoCommandChannel, rq.SimpleWorker):
    """RQ's worker that runs jobs in its own process, for :func:`run_rq_burst`."""


def rq_worker_argv(url: str, queue: str, *extra: str) -> list[str]:
    """``rq worker --burst`` as Seawall's units run it (reading JSON jobs only), with :class:`BurstWorker`."""
    from worker.jobs import JOB_SERIALIZER

    return [sys.executable, "-m", "rq.cli", "worker", "--burst", "--serializer", JOB_SERIALIZER, "--url", url,
            "--path", str(Path(__file__).resolve().parent), "--worker-class", "kit.BurstWorker", *extra, queue]


def run_rq_burst(connection, queue: str = "seawall") -> bool:
    """Run every job queued on ``queue`` in this process, as ``rq worker --serializer json --burst`` would."""
    from ops.jobs import job_queue
    from worker.jobs import JOB_SERIALIZER

    return InProcessBurstWorker([job_queue(connection, queue)], connection=connection,
                                serializer=JOB_SERIALIZER).work(burst=True)
