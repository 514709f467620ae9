"""``seawall bench soak``: a steady stream with a 10x burst; backlog, lag and worker RSS over time.

One run, against its own ``redis-server`` on a free loopback port unless
``--redis`` is given (keys under a run-specific prefix):

* one real ``seawall serve`` process (the real model, its metrics endpoint on
  a free loopback port) consumes the comments;
* invented comments are offered at ``--rate`` per second for ``--seconds``
  (or ``--minutes``), with ``--burst-factor`` times that rate during
  ``--burst-seconds`` starting at ``--burst-at``;
* every ``--sample-s`` the bench records the group's lag and pending count
  (XINFO GROUPS, the server's view), the worker's own ``seawall_consumer_lag``
  gauge from /metrics, and the worker's resident set (VmRSS of /proc/<pid>);
* after the last comment it waits (bounded by ``--drain-timeout``) for the
  backlog to drain, then counts verdicts per id.

It prints the figures (medians of the samples, the lag peak and how long the
burst's backlog took to drain, lost and duplicated comments, RSS at the start
and the end of the run and their ratio) or one JSON object with ``--json``.
``--minutes 10`` is the RSS-flatness soak.  Bounded in time: the run length
plus the drain timeout plus the worker's start-up.
"""
from __future__ import annotations

import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections import Counter

from model.errors import SeawallError
from ops.bench import report
from ops.bench.servers import LocalRedis, free_port


def rss_mb(pid: int) -> float:
    """Resident set of ``pid`` now, in MiB (Linux /proc)."""
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def scrape_gauge(port: int, name: str) -> float | None:
    """One unlabelled gauge from the worker's /metrics, or None when it cannot be read."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2) as reply:
            for line in reply.read().decode().splitlines():
                if line.startswith(name + " "):
                    return float(line.split()[1])
    except OSError:
        return None
    return None


def group_state(client, stream: str, group: str) -> tuple[int, int]:
    """(lag, pending) of ``group`` on ``stream``; (0, 0) before the group exists."""
    import redis

    try:
        groups = client.xinfo_groups(stream)
    except redis.ResponseError:
        return 0, 0
    for g in groups:
        if g["name"] in (group, group.encode()):
            return int(g.get("lag") or 0), int(g.get("pending") or 0)
    return 0, 0


class Soak:
    """One soak run against ``url`` under ``prefix``."""

    def __init__(self, *, url: str, prefix: str, model_path: str, args):
        import redis

        self.url = url
        self.prefix = prefix
        self.model_path = model_path
        self.args = args
        self.client = redis.Redis.from_url(url)
        self.metrics_port = free_port()
        self.proc: subprocess.Popen | None = None
        self.samples: list[dict] = []

    def start_worker(self, log) -> None:
        env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
        env.update({"SEAWALL_KEYS_PREFIX": self.prefix, "SEAWALL_METRICS_PORT": str(self.metrics_port),
                    "SEAWALL_METRICS_HOST": "127.0.0.1", "SEAWALL_WORKER_LAG_EVERY_S": "0.5",
                    "SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "0", "SEAWALL_WORKER_BATCH": str(self.args.batch)})
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "ops.cli", "serve", "--redis", self.url, "--model", self.model_path,
             "--consumer", "soak-0"], env=env, stdout=log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + 120
        while not self.consumer_joined():
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise SeawallError("bench soak: the worker did not become ready; see its log above")
            time.sleep(0.1)

    def consumer_joined(self) -> bool:
        import redis

        try:
            rows = self.client.xinfo_consumers(self.prefix + "comments", self.prefix + "workers")
        except redis.ResponseError:
            return False
        return any(row["name"] == b"soak-0" for row in rows)

    def stop_worker(self) -> int:
        if self.proc is None or self.proc.poll() is not None:
            return self.proc.returncode if self.proc else 0
        self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait(timeout=10)

    def sample(self, t: float, phase: str) -> None:
        lag, pending = group_state(self.client, self.prefix + "comments", self.prefix + "workers")
        self.samples.append({"t": round(t, 2), "phase": phase, "lag": lag, "pending": pending,
                             "lag_metric": scrape_gauge(self.metrics_port, "seawall_consumer_lag"),
                             "rss_mb": round(rss_mb(self.proc.pid), 2)})

    def run(self) -> dict:
        from ops.bench.stream import invented_comments
        from worker.partitions import send_comment
        from worker.settings import Keys

        a = self.args
        texts = [t for t, _ in invented_comments(2000, seed=11, length=160)]
        keys = Keys(prefix=self.prefix)  # the soak runs one partition
        duration = a.minutes * 60.0 if a.minutes else a.seconds
        burst_from, burst_to = a.burst_at, a.burst_at + a.burst_seconds
        sent = 0
        tick = 0.02
        t0 = time.monotonic()
        next_sample = 0.0
        owed = 0.0
        burst_sent = [None, None]  # comments sent when the burst started and ended
        last_t = 0.0
        while True:
            t = time.monotonic() - t0
            if t >= duration:
                break
            in_burst = burst_from <= t < burst_to
            if in_burst and burst_sent[0] is None:
                burst_sent[0] = sent
            if t >= burst_to and burst_sent[1] is None:
                burst_sent[1] = sent
            # What is owed follows the clock, so a slow loop turn sends more next time, not fewer overall.
            owed += a.rate * (a.burst_factor if in_burst else 1.0) * (t - last_t)
            last_t = t
            n = int(owed)
            owed -= n
            if n:
                pipe = self.client.pipeline(transaction=False)
                for i in range(sent, sent + n):
                    send_comment(self.client, keys, {"id": f"s{i}", "text": texts[i % len(texts)],
                                                     "site": f"site{i % 4}.example"}, pipeline=pipe)
                pipe.execute()
                sent += n
            if t >= next_sample:
                self.sample(t, "burst" if in_burst else ("before" if t < burst_from else "after"))
                next_sample += a.sample_s
            pause = (t0 + t + tick) - time.monotonic()
            if pause > 0:
                time.sleep(pause)
        produced_s = time.monotonic() - t0
        drained_at = None
        while time.monotonic() - t0 < duration + a.drain_timeout:
            t = time.monotonic() - t0
            self.sample(t, "drain")
            if self.client.xlen(self.prefix + "verdicts") >= sent and self.samples[-1]["lag"] == 0 \
                    and self.samples[-1]["pending"] == 0:
                drained_at = t
                break
            time.sleep(a.sample_s)
        in_burst = (burst_sent[1] if burst_sent[1] is not None else sent) - (burst_sent[0] or 0)
        return self.figures(sent=sent, duration=duration, produced_s=produced_s, drained_at=drained_at,
                            burst=(burst_from, burst_to), burst_offered=in_burst / a.burst_seconds)

    def verdict_counts(self) -> Counter:
        counts: Counter = Counter()
        last = "-"
        while True:
            page = self.client.xrange(self.prefix + "verdicts", min=last, count=5000)
            if last != "-":
                page = page[1:]
            if not page:
                return counts
            counts.update(fields[b"id"] for _sid, fields in page)
            last = page[-1][0].decode()

    def figures(self, *, sent, duration, produced_s, drained_at, burst, burst_offered) -> dict:
        a = self.args
        s = self.samples
        counts = self.verdict_counts()
        burst_from, burst_to = burst
        steady = [x["lag"] for x in s if x["phase"] in ("before", "after")]
        peak = max(s, key=lambda x: x["lag"])
        # The burst's backlog is drained when the lag is back to the steady level after the burst.
        level = max(2 * (statistics.median(steady) if steady else 0), 10)
        back = next((x["t"] for x in s if x["t"] >= burst_to and x["lag"] <= level), None)
        run = [x["rss_mb"] for x in s if x["t"] <= duration]
        k = max(1, len(run) // 10)
        first, last = statistics.median(run[:k]), statistics.median(run[-k:])
        metric = [x["lag_metric"] for x in s if x["lag_metric"] is not None]
        return {
            "seconds": round(duration, 1),
            "rate_per_s": a.rate,
            "burst_per_s": a.rate * a.burst_factor,
            "burst_window_s": f"{burst_from:.0f}-{burst_to:.0f}",
            "comments_sent": sent,
            "offered_per_s": round(sent / produced_s, 1),
            "burst_offered_per_s": round(burst_offered, 1),
            "verdict_ids": len(counts),
            "lost": sent - len(counts),
            "duplicates": sum(n - 1 for n in counts.values() if n > 1),
            "backlog_drained": drained_at is not None,
            "drained_after_end_s": round(drained_at - duration, 2) if drained_at is not None else None,
            "lag_median_steady": statistics.median(steady) if steady else 0,
            "lag_peak": peak["lag"],
            "lag_peak_at_s": peak["t"],
            "lag_metric_peak": max(metric) if metric else None,
            "lag_metric_final": metric[-1] if metric else None,
            "burst_backlog_drained_s_after_burst": round(back - burst_to, 2) if back is not None else None,
            "rss_mb_start_median": round(first, 2),
            "rss_mb_end_median": round(last, 2),
            "rss_end_to_start_ratio": round(last / first, 3) if first else None,
            "rss_mb_peak": max(x["rss_mb"] for x in s),
            "samples": len(s),
        }

    def cleanup(self) -> None:
        keys = list(self.client.scan_iter(match=self.prefix + "*", count=1000))
        for i in range(0, len(keys), 1000):
            self.client.unlink(*keys[i:i + 1000])
        self.client.close()


def run(args) -> int:
    from ops.bench.stream import train_model

    if args.rate <= 0 or args.burst_factor < 1 or args.seconds <= 0 or args.minutes < 0 or args.sample_s <= 0:
        raise SeawallError("bench soak: --rate, --seconds and --sample-s must be > 0, --burst-factor >= 1")
    duration = args.minutes * 60.0 if args.minutes else args.seconds
    if args.burst_at + args.burst_seconds > duration:
        raise SeawallError("bench soak: the burst must end before the run does; lower --burst-at or --burst-seconds")
    with tempfile.TemporaryDirectory(prefix="seawall-soak-") as tmp:
        model_path = os.path.join(tmp, "model.bin")
        train_model(model_path)
        if args.redis:
            figures = _soak(args.redis, model_path, args, tmp)
        else:
            with LocalRedis() as url:
                figures = _soak(url, model_path, args, tmp)
    samples = figures.pop("timeline")
    if args.json:
        figures["timeline"] = samples
    report("seawall bench soak (one worker process; lag = XINFO GROUPS lag, RSS = the worker's VmRSS)", figures,
           as_json=args.json)
    if not args.json:
        print("  timeline (t s, phase, lag, pending, worker lag gauge, RSS MiB), every 5th sample:")
        for x in samples[::5]:
            print(f"    {x['t']:7.1f} {x['phase']:<6} {x['lag']:>7} {x['pending']:>5} {x['lag_metric']!s:>8} "
                  f"{x['rss_mb']:8.2f}")
    return 0 if figures["lost"] == 0 and figures["duplicates"] == 0 and figures["backlog_drained"] else 1


def _soak(url: str, model_path: str, args, tmp: str) -> dict:
    soak = Soak(url=url, prefix=f"seawall-soak-{os.getpid()}:", model_path=model_path, args=args)
    log_path = os.path.join(tmp, "worker.log")
    try:
        with open(log_path, "wb") as log:
            soak.start_worker(log)
            try:
                figures = soak.run()
            finally:
                figures_code = soak.stop_worker()
        figures["worker_exit_code"] = figures_code
        figures["timeline"] = soak.samples
        return figures
    except SeawallError:
        with open(log_path, errors="replace") as fh:
            sys.stderr.write(fh.read()[-3000:])
        raise
    finally:
        if soak.proc is not None and soak.proc.poll() is None:
            soak.proc.kill()
        soak.cleanup()


def register(sub) -> None:
    parser = sub.add_parser("soak", help="steady rate, a 10x burst: backlog drains, lag rises and falls, worker RSS")
    parser.add_argument("--redis", metavar="URL", help="Redis to use (default: start a redis-server on a free port)")
    parser.add_argument("--json", action="store_true", help="print one JSON object (with the whole timeline)")
    parser.add_argument("--seconds", type=float, default=60.0, help="length of the offered stream (default 60)")
    parser.add_argument("--minutes", type=float, default=0.0, help="run length in minutes instead (the RSS soak: 10)")
    parser.add_argument("--rate", type=float, default=300.0, help="steady comments per second (default 300)")
    parser.add_argument("--burst-factor", type=float, default=10.0, help="burst rate = rate x this (default 10)")
    parser.add_argument("--burst-at", type=float, default=20.0, help="burst start, seconds into the run (default 20)")
    parser.add_argument("--burst-seconds", type=float, default=5.0, help="burst length in seconds (default 5)")
    parser.add_argument("--batch", type=int, default=256, help="worker batch size (default 256)")
    parser.add_argument("--sample-s", type=float, default=1.0, help="sampling interval in seconds (default 1)")
    parser.add_argument("--drain-timeout", type=float, default=300.0,
                        help="longest wait for the backlog to drain after the run, in seconds (default 300)")
    parser.set_defaults(func=run)
