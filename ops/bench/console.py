"""``seawall bench console``: the queue page with 500 held comments, and a decision's round trip.

On its own redis-server (or ``--redis``), a real worker scores invented
comments with a real model and holds them all (a per-site hold threshold of
0), so every held comment carries the worker's cache entry and reasons.  A
real console runs with uvicorn on a free loopback port and the benchmark
talks to it over HTTP, signed in like a browser:

* the queue page, all 500 held comments on one page, one by one and grouped:
  the server-side time (the page's ``Server-Timing`` header) and the HTTP
  round trip, against reading the 500 held comments from Redis alone
  (:func:`worker.holdqueue.read_held`), measured in turns; and the first
  render of a console with every cache cold;
* a decision's round trip: ``POST /api/decide`` for one comment, against
  ``GET /healthz`` on the same connection (the HTTP floor), in turns;
* with ``--partitions K`` (K > 1) the held comments are spread over K
  partitions, and the merged read of the queue is timed against the same
  comments held in one partition (a second prefix), in turns.

Every timing is a median (and p99 for decisions) over many runs; the figures
are printed, never asserted.
"""
from __future__ import annotations

import http.client
import re
import statistics
import threading
import time
from urllib.parse import urlencode

from model.actions import Action
from model.errors import SeawallError
from ops.bench import report
from ops.bench.servers import LocalRedis, free_port

SITE = "bench-forum.example"
PASSWORD = "bench-password-not-secret"


def register(sub) -> None:
    parser = sub.add_parser("console", help="queue page with 500 held comments, decision round trip (HTTP, loopback)")
    parser.add_argument("--redis", metavar="URL", help="Redis to use (default: start a redis-server on a free port)")
    parser.add_argument("--held", type=int, default=500, help="held comments on the page (default 500)")
    parser.add_argument("--pages", type=int, default=30, help="timed page loads (default 30)")
    parser.add_argument("--decisions", type=int, default=300, help="timed single-comment decisions (default 300)")
    parser.add_argument("--partitions", type=int, default=1,
                        help="K: spread the held comments over K partitions (keys.partitions); with K > 1 the "
                             "merged queue read is also timed against the same comments in one partition")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.set_defaults(func=run)


def fill_queue(url: str, keys, comments, model, *, site_thresholds=None, policies=(), clock=time.time) -> int:
    """Send ``comments`` (dicts of input fields) through a real worker with ``model``; returns verdicts written.

    ``site_thresholds`` (e.g. ``{site: {hold: 0.0, reject: 1.0}}``) decides
    what gets held; ``policies`` are worker batch policies such as the
    campaign policy.
    """
    from ops.config import Config
    from ops.serving import build_consumer
    from worker.connection import connect
    from worker.loader import StaticModelSource
    from worker.partitions import send_comment
    from worker.settings import WorkerSettings

    raw = connect(url, client_name="seawall-fill-queue")
    plain = connect(url, raw_streams=False)
    try:
        pipe = plain.pipeline(transaction=False)
        for c in comments:
            if isinstance(c.get("id"), str) and c["id"]:
                send_comment(plain, keys, c, pipeline=pipe)
            else:  # a malformed entry (the tests' dead-letter cases): it has no partition, the first one takes it
                pipe.xadd(keys.parts[0].comments, c)
        pipe.execute()
        settings = WorkerSettings(batch=256, block_ms=10, site_thresholds=site_thresholds or {})
        config = Config(redis_url=url, keys=keys, worker=settings)
        consumer = build_consumer(config, source=StaticModelSource(model=model), consumer="fill-queue",
                                  policies=list(policies), client=raw, clock=clock)
        consumer.prepare()
        written, idle = 0, 0
        while idle < 3:
            done = consumer.step()
            written += done.written
            idle = idle + 1 if done.read == 0 else 0
        return written
    finally:
        raw.close()
        plain.close()


class ConsoleThread:
    """A real console (uvicorn) in a background thread on a free loopback port."""

    def __init__(self, console, *, port: int | None = None):
        self.console = console
        self.port = port or free_port()
        self.server = None
        self._thread = None

    def __enter__(self) -> "ConsoleThread":
        import uvicorn

        from ops.console.app import build_app

        config = uvicorn.Config(build_app(self.console), host="127.0.0.1", port=self.port, access_log=False,
                                log_level="warning", lifespan="on")
        self.server = uvicorn.Server(config)
        self._thread = threading.Thread(target=self.server.run, name="seawall-console-bench", daemon=True)
        self._thread.start()
        deadline = time.monotonic() + 30
        while not self.server.started:
            if time.monotonic() > deadline or not self._thread.is_alive():
                raise SeawallError("bench console: the console did not start")
            time.sleep(0.02)
        return self

    def __exit__(self, *exc) -> None:
        self.server.should_exit = True
        self._thread.join(timeout=30)


class Browser:
    """Just enough of a browser over one keep-alive connection: a cookie, the CSRF token, same-origin headers."""

    def __init__(self, port: int):
        self.port = port
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
        self.cookie = ""
        self.csrf = ""

    def request(self, method: str, path: str, body: bytes | None = None, headers: dict | None = None):
        h = {"Host": f"127.0.0.1:{self.port}"}
        if self.cookie:
            h["Cookie"] = self.cookie
        h.update(headers or {})
        self.conn.request(method, path, body=body, headers=h)
        res = self.conn.getresponse()
        data = res.read()
        for name, value in res.getheaders():
            if name.lower() == "set-cookie":
                self.cookie = value.split(";", 1)[0]
        return res, data

    def sign_in(self, name: str, password: str) -> None:
        _res, page = self.request("GET", "/signin")
        token = re.search(rb'name="csrf" value="([^"]+)"', page).group(1).decode()
        form = urlencode({"name": name, "password": password, "csrf": token, "next": "/queue"}).encode()
        res, _ = self.request("POST", "/signin", form, {"Content-Type": "application/x-www-form-urlencoded",
                                                        "Origin": f"http://127.0.0.1:{self.port}"})
        if res.status != 303:
            raise SeawallError(f"bench console: sign-in failed ({res.status})")
        _res, page = self.request("GET", "/overview")
        self.csrf = re.search(rb'name="seawall-csrf" content="([^"]+)"', page).group(1).decode()

    def post_json(self, path: str, payload: bytes):
        return self.request("POST", path, payload, {"Content-Type": "application/json", "X-Seawall-CSRF": self.csrf,
                                                    "Origin": f"http://127.0.0.1:{self.port}"})


def _server_ms(response) -> float:
    return float(response.getheader("server-timing", "").partition("dur=")[2] or "nan")


def _ms(values) -> float:
    return round(statistics.median(values) * 1000, 2)


def _p99(values) -> float:
    ordered = sorted(values)
    return round(ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))] * 1000, 2)


def run(args) -> int:
    if args.held < 1 or args.pages < 1 or args.decisions < 1 or args.decisions > args.held:
        raise SeawallError("bench console: --held, --pages and --decisions must be >= 1, decisions <= held")
    if not 1 <= args.partitions <= 256:
        raise SeawallError(f"bench console: --partitions must be in [1, 256], got {args.partitions}")
    if args.redis:
        return _bench(args, args.redis)
    with LocalRedis() as url:
        return _bench(args, url)


def _merged_read(url: str, client, keys, comments, model, *, pages: int) -> dict:
    """The hold queue read over K partitions against the same comments held in one partition, in turns."""
    from ops.config import load_config
    from worker.holdqueue import read_held

    one = load_config({"redis_url": url, "keys.prefix": "seawall-bench-console-one:"}, environ={}).keys
    fill_queue(url, one, comments, model, site_thresholds={SITE: {Action.HOLD: 0.0, Action.REJECT: 1.0}})
    merged_s, single_s = [], []
    for _ in range(pages):
        for k, times in ((keys, merged_s), (one, single_s)):
            t0 = time.perf_counter()
            read_held(client, k, limit=len(comments))
            times.append(time.perf_counter() - t0)
    return {f"read every held comment over {keys.partitions} partitions, median ms": _ms(merged_s),
            "reference: the same comments in one partition, median ms": _ms(single_s),
            "ratio merged / one partition": round(statistics.median(merged_s) / statistics.median(single_s), 2)}


def _bench(args, url: str) -> int:
    import json

    from model.classifier import EmbeddingClassifier
    from ops.bench.stream import invented_comments
    from ops.config import load_config
    from ops.connection import connect
    from ops.console.accounts import Accounts
    from ops.console.app import Console
    from worker.holdqueue import held_count, read_held

    config = load_config({"redis_url": url, "keys.prefix": "seawall-bench-console:",
                          "keys.partitions": args.partitions}, environ={})
    keys = config.keys
    client = connect(config)
    if held_count(client, keys) or client.exists(keys.accounts):
        raise SeawallError(f"bench console: keys under {keys.prefix!r} already exist; use an empty Redis")
    data = invented_comments(2000, seed=3)
    model = EmbeddingClassifier(seed=0, epochs=3).fit([t for t, _ in data], [y for _, y in data])
    texts = invented_comments(args.held, seed=11)
    comments = [{"id": f"bench-{i}", "text": t, "site": SITE, "author": f"member-{i % 97}"}
                for i, (t, _y) in enumerate(texts)]
    fill_queue(url, keys, comments, model, site_thresholds={SITE: {Action.HOLD: 0.0, Action.REJECT: 1.0}})
    held = held_count(client, keys)
    accounts = Accounts(client=client, keys=keys)
    accounts.add("bench-moderator", PASSWORD, role="moderator", now=time.time())
    console = Console(client=client, config=config, accounts=accounts)
    out = {"held": held, "partitions": args.partitions}
    if args.partitions > 1:
        out.update(_merged_read(url, client, keys, comments, model, pages=args.pages))
    with ConsoleThread(console) as server:
        browser = Browser(server.port)
        browser.sign_in("bench-moderator", PASSWORD)
        # a console that has just started, before any page: every comment rendered from scratch (in this process)
        fresh = Console(client=client, config=config, accounts=accounts)
        t0 = time.perf_counter()
        fresh.queue_html({"view": "list"}, account=None, csrf="")
        out["queue page, every cache cold (a new console's first render), ms"] = round(
            (time.perf_counter() - t0) * 1000, 2)
        console.warmed.wait(120)  # the served console prepares the newest held comments when it starts
        first = time.perf_counter()
        res, page = browser.request("GET", "/queue?view=list")
        out["queue page, first load after start, server-side ms"] = _server_ms(res)
        out["queue page, first load after start, HTTP ms"] = round((time.perf_counter() - first) * 1000, 2)
        for view in ("list", "families"):
            server_ms, http_s, redis_s = [], [], []
            for _ in range(args.pages):
                t0 = time.perf_counter()
                read_held(client, keys, limit=args.held)
                redis_s.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                res, page = browser.request("GET", f"/queue?view={view}")
                http_s.append(time.perf_counter() - t0)
                server_ms.append(_server_ms(res))
            name = "every comment" if view == "list" else "grouped"
            out[f"[{name}] rows on the page"] = page.count(b'class="row ')
            out[f"[{name}] page bytes"] = len(page)
            out[f"[{name}] queue page, server-side median ms"] = round(statistics.median(server_ms), 2)
            out[f"[{name}] queue page, server-side max ms"] = round(max(server_ms), 2)
            out[f"[{name}] queue page, HTTP round trip median ms"] = _ms(http_s)
            out[f"[{name}] reference: read {held} held from Redis, median ms"] = _ms(redis_s)
            out[f"[{name}] ratio page server-side / Redis read"] = round(
                statistics.median(server_ms) / 1000 / statistics.median(redis_s), 1)

        ids = [c.id for c in read_held(client, keys, limit=args.held)][: args.decisions]
        decide_s, floor_s, refused = [], [], 0
        for comment_id in ids:
            t0 = time.perf_counter()
            browser.request("GET", "/healthz")
            floor_s.append(time.perf_counter() - t0)
            payload = json.dumps({"ids": [comment_id], "action": Action.REJECT}).encode()
            t0 = time.perf_counter()
            res, body = browser.post_json("/api/decide", payload)
            decide_s.append(time.perf_counter() - t0)
            if res.status != 200 or json.loads(body)["decided"] != [comment_id]:
                refused += 1
        out["decisions timed"] = len(decide_s)
        out["decisions not taken (should be 0)"] = refused
        out["decision round trip median ms"] = _ms(decide_s)
        out["decision round trip p99 ms"] = _p99(decide_s)
        out["reference: GET /healthz round trip median ms"] = _ms(floor_s)
        out["reference: GET /healthz round trip p99 ms"] = _p99(floor_s)
        out["ratio decision / healthz (medians)"] = round(statistics.median(decide_s) / statistics.median(floor_s), 1)
    from worker.decisions import finalize_due

    finalize_due(client, keys, now=time.time() + 3600)  # the undo windows, without waiting for them
    out["decisions on the stream afterwards"] = client.xlen(keys.decisions)
    out["labels on the feedback stream afterwards"] = client.xlen(keys.feedback)
    report(f"seawall bench console ({held} held comments, {args.pages} page loads, {len(ids)} decisions; loopback)",
           out, as_json=args.json)
    return 0
