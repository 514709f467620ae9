"""``seawall demo``: the whole story on one command, on an in-process Redis unless told otherwise.

An invented forum's hour around the nightly retrain: a first model is trained
and promoted, comments stream through two workers, a spam wave the model has
never seen starts, the campaign and wave detectors fire, moderators label,
the nightly retrain is gated and promoted, the workers hot-reload, and the
same wave is caught.  Progress as it goes, a summary table at the end, and an
HTML report with plots.

By default everything runs on fakeredis inside this process (no server, no
network).  ``--redis URL`` plays the same story on a real server, under its
own key prefix (``--prefix``, default ``seawall-demo:``); it refuses to touch
a prefix that already holds keys unless ``--reset`` is given.

``--console`` leaves the hold queue to you once the nightly retrain has run
(the simulated moderators stop working it, and the retrain does not re-score
it), then opens the moderators' console on it: a one-time account ``demo``
is made and its password printed; Ctrl-C ends the demo.
"""
from __future__ import annotations

import argparse
import logging
from pathlib import Path

from model.errors import SeawallError
from ops.config import load_config

DEFAULT_PREFIX = "seawall-demo:"
DEMO_ACCOUNT = "demo"
# The moderators' last round is the one at 03:00, just before the nightly retrain (so it has its labels);
# what is held from then on, and what that round left, stays for the console.
LEAVE_QUEUE_AT_MIN = 41


class DemoError(SeawallError):
    """The demo cannot run as asked (the message says what to do)."""


def register(sub) -> None:
    parser = sub.add_parser(
        "demo",
        help="the whole story on one command: a spam wave, the alarms, the retrain, the wave caught",
        description=__doc__.split("\n\n", 1)[1],
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--redis", metavar="URL", help="play the story on this Redis server instead of in-process")
    parser.add_argument("--prefix", metavar="PREFIX", default=DEFAULT_PREFIX,
                        help=f"key prefix of the demo's keys (default {DEFAULT_PREFIX})")
    parser.add_argument("--reset", action="store_true",
                        help="with --redis: delete the keys under the prefix first")
    parser.add_argument("--report", metavar="PATH", default="seawall-report.html",
                        help="where to write the HTML report (default seawall-report.html)")
    parser.add_argument("--seed", type=int, default=7, help="seed of the invented data (default 7)")
    parser.add_argument("--config", metavar="FILE", help="TOML config file (else $SEAWALL_CONFIG)")
    parser.add_argument("--quiet", action="store_true", help="print only the summary")
    parser.add_argument("--console", action="store_true",
                        help="leave the last held comments to you and open the moderators' console on them")
    parser.add_argument("--console-port", type=int, default=9320, metavar="PORT",
                        help="port of the console on 127.0.0.1 (default 9320)")
    parser.set_defaults(func=run)


def run(args) -> int:
    from ops.lab.demo import DEMO_SETTINGS, demo_scenario, run_demo
    from ops.lab.demo_report import render_html, summary_text
    from ops.serving import configure_logging

    embedded = not args.redis
    if not args.prefix or not args.prefix.strip():
        raise DemoError("demo: --prefix must not be empty")
    overrides = dict(DEMO_SETTINGS)
    overrides["keys.prefix"] = args.prefix
    if args.redis:
        overrides["redis_url"] = args.redis
    config = load_config(overrides, config_file=args.config)
    configure_logging("ERROR")
    logging.getLogger("seawall").setLevel(logging.ERROR)

    report_path = Path(args.report)
    if not report_path.parent.exists():
        raise DemoError(f"demo: the report's folder {report_path.parent} does not exist; create it or pass --report")

    client, worker_client, backend = _clients(config, embedded=embedded)
    try:
        if not embedded:
            _claim_prefix(client, args.prefix, reset=args.reset, url=args.redis)
        progress = (lambda line: None) if args.quiet else (lambda line: print(line, flush=True))
        scenario = demo_scenario(config, seed=args.seed)
        progress(f"seawall demo on {backend}: the Hedgerow Lane forum (invented), seed {args.seed}")
        result = run_demo(client=client, worker_client=worker_client, config=config, scenario=scenario,
                          progress=progress, leave_queue_at_min=LEAVE_QUEUE_AT_MIN if args.console else None)
        print()
        print(summary_text(result, backend=backend))
        report_path.write_text(render_html(result, backend=backend), encoding="utf-8")
        print(f"\nreport: {report_path}")
        if not embedded:
            print(f"the demo's keys stay under {args.prefix!r} for you to look at "
                  f"(e.g. XRANGE {config.keys.events} - +); run with --reset to start over")
        if args.console:
            open_console(client, config, story_end=scenario.start_ts + scenario.duration_s, port=args.console_port)
    finally:
        client.close()
        worker_client.close()
    return 0


def open_console(client, config, *, story_end: float, port: int, on_ready=None) -> None:
    """Serve the console on the demo's Redis until Ctrl-C, on the story's clock, with a one-time account."""
    import secrets
    import time
    import webbrowser

    from ops.console.accounts import Accounts
    from ops.console.app import Console, serve

    offset = story_end - time.time()  # ages and the overview's hours read as at the story's end
    accounts = Accounts(client=client, keys=config.keys)
    password = secrets.token_urlsafe(12)
    accounts.remove(DEMO_ACCOUNT)
    accounts.add(DEMO_ACCOUNT, password, role="admin", now=time.time())
    console = Console(client=client, config=config, accounts=accounts, clock=lambda: time.time() + offset)
    url = f"http://127.0.0.1:{port}/queue"

    def ready(server):
        from worker.holdqueue import held_count

        held = held_count(client, config.keys)
        print(f"\nconsole: {url}  ({held} held comments left for you)\n"
              f"  sign in as {DEMO_ACCOUNT!r} with the password {password}  (made for this run only)\n"
              "  Ctrl-C ends the demo", flush=True)
        if on_ready is not None:
            on_ready(server, password)
        else:
            webbrowser.open(url)

    serve(console, host="127.0.0.1", port=port, on_ready=ready)


def _clients(config, *, embedded: bool):
    """An ordinary client and a worker client (raw stream replies) of one server."""
    from worker.connection import connect, raw_stream_replies

    if embedded:
        try:
            import fakeredis
        except ImportError:
            raise DemoError("demo: the in-process server needs fakeredis; `pip install 'fakeredis[lua]'` "
                            "or pass --redis URL") from None
        server = fakeredis.FakeServer()
        return (fakeredis.FakeRedis(server=server), raw_stream_replies(fakeredis.FakeRedis(server=server)),
                "in-process fakeredis")
    tls = {"tls_ca": config.redis_tls_ca, "tls_cert": config.redis_tls_cert, "tls_key": config.redis_tls_key}
    try:
        plain = connect(config.redis_url, raw_streams=False, socket_timeout=30.0, **tls)
        raw = connect(config.redis_url, socket_timeout=30.0, client_name="seawall-demo-worker", **tls)
    except ValueError as exc:
        raise DemoError(f"demo: {exc}") from None
    return plain, raw, "Redis at " + _redacted(config.redis_url)


def _redacted(url: str) -> str:
    from urllib.parse import urlsplit, urlunsplit

    parts = urlsplit(url)
    if parts.password:
        netloc = f"{parts.username or ''}:***@{parts.hostname}" + (f":{parts.port}" if parts.port else "")
        parts = parts._replace(netloc=netloc)
    return urlunsplit(parts)


def _claim_prefix(client, prefix: str, *, reset: bool, url: str) -> None:
    """Refuse a prefix that holds keys, or delete them with --reset (only keys under the prefix)."""
    import redis

    pattern = _glob_escape(prefix) + "*"
    try:
        keys = list(client.scan_iter(match=pattern, count=1000))
    except redis.ConnectionError as exc:
        raise DemoError(f"demo: cannot reach Redis at {_redacted(url)} ({exc}); check --redis") from None
    if keys and not reset:
        raise DemoError(f"demo: {len(keys)} keys under {prefix!r} already exist on {_redacted(url)}; "
                        "pass --reset to delete them first, or --prefix to use another prefix")
    for i in range(0, len(keys), 500):
        client.unlink(*keys[i:i + 500])


def _glob_escape(text: str) -> str:
    return "".join("\\" + ch if ch in "*?[]\\" else ch for ch in text)
