"""The ``seawall`` command.

Each subcommand lives in its own module under ``ops/commands`` and exposes
``register(subparsers)``, which adds its parser and sets ``func``; ``func``
takes the parsed arguments and returns the exit code.  User errors
(:class:`model.errors.SeawallError`, :class:`ops.config.ConfigError`) are
printed on one line with no traceback.

Start-up time matters here: ``seawall --help`` and the short commands a
moderator's script runs (``feedback``, ``watch --once``) must not pay for
libraries they do not use.  So this module and every command module import
only the standard library and light Seawall modules at the top; numpy,
scikit-learn, redis, RQ and prometheus-client are imported inside the
functions that use them (``seawall bench startup`` measures it, and
tests/test_startup.py checks that ``--help`` loads none of them).
"""
from __future__ import annotations

import argparse
import importlib
import sys

from model.errors import SeawallError
from ops.config import ConfigError

COMMANDS = (
    "sample",
    "train",
    "evaluate",
    "score",
    "serve",
    "partitions",
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
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:
        message = redis_error_message(exc)
        if message is None:
            raise
        print(f"seawall {args.command}: error: {message}", file=sys.stderr)
        return 2
    return int(code or 0)


def redis_error_message(exc: BaseException) -> str | None:
    """The one-line message for a Redis error a user can act on, or None for anything else.

    A command that never imported redis cannot have raised one of its errors,
    so redis is not imported here just to find out.
    """
    redis = sys.modules.get("redis")
    if redis is None:
        return None
    errors = redis.exceptions
    if isinstance(exc, errors.AuthenticationError):
        # Checked before ConnectionError, its base class.  The URL is not printed: it holds the password.
        return f"Redis refused the credentials ({exc}); check the user and password in redis_url"
    if isinstance(exc, errors.NoPermissionError):
        return (f"the Redis ACL user may not do this ({exc}); "
                "see the README's ACL rule for the commands Seawall needs")
    if isinstance(exc, (errors.ConnectionError, errors.TimeoutError)):
        return f"cannot reach Redis ({exc}); check redis_url and that the server runs"
    return None


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
