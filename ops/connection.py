"""One Redis client from the configuration: AUTH/ACL in the URL, TLS for rediss://."""
from __future__ import annotations

import redis

from ops.config import Config


def connect(config: Config, **kwargs) -> redis.Redis:
    """A client for ``config.redis_url`` (redis://, rediss:// or unix://).

    On a rediss:// URL the CA bundle and client certificate settings are
    applied; the password and ACL user come from the URL itself.
    """
    url = config.redis_url
    if url.startswith("rediss://"):
        if config.redis_tls_ca:
            kwargs.setdefault("ssl_ca_certs", config.redis_tls_ca)
        if config.redis_tls_cert:
            kwargs.setdefault("ssl_certfile", config.redis_tls_cert)
        if config.redis_tls_key:
            kwargs.setdefault("ssl_keyfile", config.redis_tls_key)
    return redis.Redis.from_url(url, **kwargs)


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
