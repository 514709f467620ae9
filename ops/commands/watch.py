"""``seawall watch``: a live terminal view of the deployment, read from Redis.

Refreshes every second: per-site comments per minute and flagged share with
a sparkline of the last minutes, active waves and campaigns, consumer-group
lag, the served model's version and age, and the last retrain's outcome.  It
reads Redis directly, so it works with no Prometheus.  Ctrl-C quits.
"""
from __future__ import annotations

import argparse
import sys
import time

from ops.connection import add_connection_args, config_from_args, connect

CLEAR = "\x1b[H\x1b[2J"


def register(sub) -> None:
    parser = sub.add_parser("watch", help="live terminal view: rates, flagged share, waves, campaigns, lag, model",
                            description=__doc__.split("\n\n", 1)[1],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_args(parser)
    parser.add_argument("--interval", type=float, default=1.0, metavar="SECONDS", help="refresh period (default 1)")
    parser.add_argument("--once", action="store_true", help="print one frame and exit (for scripts)")
    parser.set_defaults(func=run)


def run(args) -> int:
    if not args.interval > 0:
        from model.errors import SeawallError

        raise SeawallError(f"watch: --interval must be > 0 seconds, got {args.interval}")
    from redis.exceptions import RedisError

    from ops.watchview import collect, render

    config = config_from_args(args)
    client = connect(config, socket_timeout=5.0)
    title = f"prefix {config.keys.prefix}"
    if args.once:
        try:
            print(render(collect(client, config.keys), title=title), end="")
        except (RedisError, OSError) as exc:
            from model.errors import SeawallError

            raise SeawallError(f"watch: cannot read Redis ({type(exc).__name__}: {exc}); check --redis") from None
        return 0
    try:
        while True:
            try:
                frame = render(collect(client, config.keys), title=title)
            except (RedisError, OSError) as exc:
                frame = f"Seawall watch  {title}\nredis unreachable ({type(exc).__name__}); retrying every {args.interval:g}s\n"
            sys.stdout.write(CLEAR + frame)
            sys.stdout.flush()
            time.sleep(args.interval)
    except KeyboardInterrupt:
        return 0
