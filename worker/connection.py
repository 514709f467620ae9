"""Redis clients for the worker, built from plain values (ops passes them from Config).

``redis://[user:password@]host:port/db`` carries AUTH/ACL credentials in the
URL; ``rediss://`` turns TLS on, verified against ``tls_ca`` when given, with
``tls_cert``/``tls_key`` for mutual TLS; ``unix:///path.sock`` uses a socket.
Clients never decode replies (``decode_responses=False``): comment text stays
bytes until :mod:`worker.validation` checks it.
"""
from __future__ import annotations

from urllib.parse import urlsplit

import redis

# Replies worker.streams parses itself: left exactly as the server sent them.
RAW_COMMANDS = ("XREADGROUP", "XAUTOCLAIM", "XPENDING", "XINFO GROUPS", "XCLAIM")


def _raw(response, **_options):
    return response


def raw_stream_replies(client):
    """Turn off redis-py's reply shaping for :data:`RAW_COMMANDS` on ``client`` (and its pipelines).

    redis-py would fold entry fields into a dict, losing duplicate field names
    and order; the worker wants the wire reply.
    """
    for command in RAW_COMMANDS:
        client.set_response_callback(command, _raw)
    return client


def connect(
    url: str,
    *,
    tls_ca: str = "",
    tls_cert: str = "",
    tls_key: str = "",
    socket_timeout: float | None = None,
    client_name: str = "",
    raw_streams: bool = True,
) -> redis.Redis:
    """A client for ``url``; checks the arguments before any connection is made."""
    if not isinstance(url, str) or not url:
        raise ValueError(f"connect: url must be a non-empty string, got {url!r}")
    scheme = urlsplit(url).scheme
    if scheme not in ("redis", "rediss", "unix"):
        raise ValueError(f"connect: url scheme must be redis://, rediss:// or unix://, got {scheme!r}")
    if (tls_ca or tls_cert or tls_key) and scheme != "rediss":
        raise ValueError("connect: redis_tls_* settings need a rediss:// URL")
    if bool(tls_cert) != bool(tls_key):
        raise ValueError("connect: redis_tls_cert and redis_tls_key go together for mutual TLS")
    kwargs: dict = {"decode_responses": False, "protocol": 2}
    if socket_timeout is not None:
        kwargs["socket_timeout"] = socket_timeout
    kwargs["socket_connect_timeout"] = 5.0
    if client_name:
        kwargs["client_name"] = client_name
    if scheme == "rediss":
        kwargs["ssl_cert_reqs"] = "required"
        if tls_ca:
            kwargs["ssl_ca_certs"] = tls_ca
        if tls_cert:
            kwargs["ssl_certfile"] = tls_cert
            kwargs["ssl_keyfile"] = tls_key
    client = redis.Redis.from_url(url, **kwargs)
    return raw_stream_replies(client) if raw_streams else client
