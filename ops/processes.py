"""Run N copies of a command as child processes, forward SIGTERM/SIGINT, restart crashes.

``seawall serve --processes N`` uses this: each child is a full one-process
``seawall serve`` with its own consumer name (``<name>-<i>``), so a child
that is restarted finds its own pending entries again.  The parent only
supervises: it never touches Redis.
"""
from __future__ import annotations

import logging
import signal
import subprocess
import time
from collections.abc import Callable, Sequence

from model.params import integer, positive, real, set_params

log = logging.getLogger("seawall.processes")

_PARAMS = {"n": integer(1, 1024), "restart_delay_s": real(0.0, 3600.0), "stop_timeout_s": positive()}


class ProcessGroup:
    """Children built by ``argv_for(i)`` for i in range(n).

    Parameters
    ----------
    n : how many children.
    argv_for : the command line of child ``i``.
    restart_delay_s : wait before restarting a child that died on its own.
    stop_timeout_s : how long a stopping child may take before it is killed.
    """

    def __init__(self, *, n: int, argv_for: Callable[[int], Sequence[str]], restart_delay_s: float = 1.0,
                 stop_timeout_s: float = 30.0):
        set_params(self, _PARAMS, locals())
        self.argv_for = argv_for
        self._stopping = False
        self._children: dict[int, subprocess.Popen] = {}

    def stop(self, *_signal_args) -> None:
        self._stopping = True

    def _start(self, i: int) -> None:
        self._children[i] = subprocess.Popen(list(self.argv_for(i)))
        log.info("started worker process %d (pid %d)", i, self._children[i].pid)

    def run(self) -> int:
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, self.stop)
        for i in range(self.n):
            self._start(i)
        restart_at: dict[int, float] = {}
        while not self._stopping:
            time.sleep(0.1)
            for i, proc in list(self._children.items()):
                if i in restart_at:
                    if time.monotonic() >= restart_at[i] and not self._stopping:
                        del restart_at[i]
                        self._start(i)
                    continue
                code = proc.poll()
                if code is not None and not self._stopping:
                    log.warning("worker process %d (pid %d) exited with %d; restarting in %.1fs",
                                i, proc.pid, code, self.restart_delay_s)
                    restart_at[i] = time.monotonic() + self.restart_delay_s
        return self._stop_children()

    def _stop_children(self) -> int:
        for proc in self._children.values():
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        worst = 0
        deadline = time.monotonic() + self.stop_timeout_s
        for i, proc in self._children.items():
            try:
                code = proc.wait(timeout=max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                log.error("worker process %d (pid %d) did not stop in %.0fs; killing it", i, proc.pid, self.stop_timeout_s)
                proc.kill()
                code = proc.wait()
            worst = max(worst, abs(code))
        return worst
