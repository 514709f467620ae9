"""The ``seawall`` command.

Each subcommand lives in its own module under ``ops/commands`` and exposes
``register(subparsers)``, which adds its parser and sets ``func``; ``func``
takes the parsed arguments and returns the exit code.  User errors
(:class:`model.errors.SeawallError`, :class:`ops.config.ConfigError`) are
printed on one line with no traceback.
"""
from __future__ import annotations

import argparse
import importlib
import sys

import redis

from model.errors import SeawallError
from ops.config import ConfigError

COMMANDS = (
    "train",
    "evaluate",
    "score",
    "serve",
    "feedback",
    "labels",
    "retrain",
    "models",
    "watch",
    "console",
    "demo",
    "bench",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="seawall",
        description="Streaming comment moderation that adapts: score, route, learn from moderators.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMANDS:
        importlib.import_module(f"ops.commands.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = args.func(args)
    except (SeawallError, ConfigError) as exc:
        print(f"seawall {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except redis.exceptions.AuthenticationError as exc:
        # Checked before ConnectionError, its base class.  The URL is not printed: it holds the password.
        print(f"seawall {args.command}: error: Redis refused the credentials ({exc}); "
              "check the user and password in redis_url", file=sys.stderr)
        return 2
    except redis.exceptions.NoPermissionError as exc:
        print(f"seawall {args.command}: error: the Redis ACL user may not do this ({exc}); "
              "see the README's ACL rule for the commands Seawall needs", file=sys.stderr)
        return 2
    except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError) as exc:
        print(f"seawall {args.command}: error: cannot reach Redis ({exc}); check redis_url and that the server runs",
              file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0
    return int(code or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
