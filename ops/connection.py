"""One Redis client from the configuration, for the control-plane commands and jobs.

AUTH/ACL credentials come in the URL; rediss:// turns TLS on with the
``redis_tls_*`` settings (see :func:`worker.connection.connect`).  Replies are
bytes and parsed by redis-py as usual.
"""
from __future__ import annotations

from ops.config import Config


def connect(config: Config, **kwargs):
    """A redis-py client for ``config.redis_url`` (redis://, rediss:// or unix://); a cluster client with
    ``[redis] cluster = true``."""
    from worker.connection import connect as worker_connect

    kwargs.setdefault("cluster", config.redis.cluster)
    try:
        return worker_connect(config.redis_url, tls_ca=config.redis_tls_ca, tls_cert=config.redis_tls_cert,
                              tls_key=config.redis_tls_key, raw_streams=False, **kwargs)
    except ValueError as exc:
        from ops.config import ConfigError

        raise ConfigError(str(exc)) from None


def add_connection_args(parser) -> None:
    """``--redis URL`` and ``--config FILE``, shared by the commands that talk to Redis."""
    parser.add_argument("--redis", metavar="URL", default=None,
                        help="Redis URL (default: SEAWALL_REDIS_URL, the config file, redis://127.0.0.1:6379/0)")
    parser.add_argument("--config", metavar="FILE", default=None, help="TOML config file (default: SEAWALL_CONFIG)")


def config_from_args(args, overrides: dict | None = None) -> Config:
    """The process's one :class:`Config`, with ``--redis`` winning over the environment and file."""
    from ops.config import load_config

    values = {"redis_url": getattr(args, "redis", None)}
    values.update(overrides or {})
    return load_config(values, config_file=getattr(args, "config", None))
