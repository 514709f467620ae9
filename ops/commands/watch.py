"""``seawall watch``: a live terminal view of the deployment, read from Redis.

Refreshes every second: per-site comments per minute and flagged share with
a sparkline of the last minutes, active waves and campaigns, consumer-group
lag, the served model's version, age and promotion, the last retrain's
outcome and the recent events in words.  It reads Redis directly, so it
works with no Prometheus.  On a terminal the frame is redrawn in place (on
the alternate screen, like ``top``); into a pipe or a file each frame is
printed after the last.  Ctrl-C quits.
"""
from __future__ import annotations

import argparse
import sys
import time

from ops.connection import add_connection_args, config_from_args, connect

# Line starts that get a colour on a terminal (the frame itself is plain text).
STYLES = (("WAVE", "bold red"), ("CAMPAIGN", "bold yellow"), ("redis unreachable", "bold red"),
          ("Seawall watch", "bold"), ("SITE", "dim"), ("recent events", "dim"))


def register(sub) -> None:
    parser = sub.add_parser("watch", help="live terminal view: rates, flagged share, waves, campaigns, lag, model",
                            description=__doc__.split("\n\n", 1)[1],
                            formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_args(parser)
    parser.add_argument("--interval", type=float, default=1.0, metavar="SECONDS", help="refresh period (default 1)")
    parser.add_argument("--once", action="store_true", help="print one frame, plain text, and exit (for scripts)")
    parser.set_defaults(func=run)


def run(args) -> int:
    from model.errors import SeawallError

    if not args.interval > 0:
        raise SeawallError(f"watch: --interval must be > 0 seconds, got {args.interval}")
    config = config_from_args(args)
    client = connect(config, socket_timeout=5.0)
    title = f"prefix {config.keys.prefix}"
    if args.once:
        from redis.exceptions import RedisError

        try:
            print(frame(client, config.keys, title, strict=True), end="")
        except (RedisError, OSError) as exc:
            raise SeawallError(f"watch: cannot read Redis ({type(exc).__name__}: {exc}); check --redis") from None
        return 0
    try:
        if sys.stdout.isatty():
            live(client, config.keys, title, interval=args.interval)
        else:
            while True:
                sys.stdout.write(frame(client, config.keys, title) + "\n")
                sys.stdout.flush()
                time.sleep(args.interval)
    except KeyboardInterrupt:
        return 0
    return 0


def frame(client, keys, title: str, *, strict: bool = False) -> str:
    """One frame as plain text; with ``strict`` a Redis error is raised, else shown in the frame."""
    from redis.exceptions import RedisError

    from ops.watchview import collect, render

    try:
        return render(collect(client, keys), title=title)
    except (RedisError, OSError) as exc:
        if strict:
            raise
        return f"Seawall watch  {title}\nredis unreachable ({type(exc).__name__}); retrying\n"


def styled(text: str):
    """The frame as rich ``Text``: plain characters (never markup), a colour per kind of line."""
    from rich.text import Text

    out = Text()
    for line in text.splitlines(keepends=True):
        style = next((s for start, s in STYLES if line.startswith(start)), None)
        if style is None and line.rstrip().endswith("  WAVE"):
            style = "red"
        out.append(line, style=style)
    return out


def live(client, keys, title: str, *, interval: float, console=None, frames: int | None = None) -> None:
    """Redraw the frame in place every ``interval`` seconds (``frames``: stop after that many, for tests).

    rich's ``Live`` on the alternate screen moves the cursor home and
    overwrites the lines it drew, so the screen never goes blank between
    frames; the old view cleared the whole screen every second.
    """
    from rich.live import Live

    shown = 0
    with Live(console=console, screen=True, auto_refresh=False, transient=False) as view:
        while frames is None or shown < frames:
            view.update(styled(frame(client, keys, title)), refresh=True)
            shown += 1
            if frames is None or shown < frames:
                time.sleep(interval)
