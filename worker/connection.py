"""Redis clients for the worker, built from plain values (ops passes them from Config).

``redis://[user:password@]host:port/db`` carries AUTH/ACL credentials in the
URL; ``rediss://`` turns TLS on, verified against ``tls_ca`` when given, with
``tls_cert``/``tls_key`` for mutual TLS; ``unix:///path.sock`` uses a socket.
``cluster=True`` builds redis-py's Redis Cluster client from the same URL.
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


def _raw_callbacks(client) -> None:
    for command in RAW_COMMANDS:
        client.set_response_callback(command, _raw)


def raw_stream_replies(client):
    """Turn off redis-py's reply shaping for :data:`RAW_COMMANDS` on ``client`` (and its pipelines).

    redis-py would fold entry fields into a dict, losing duplicate field names
    and order; the worker wants the wire reply.  A cluster client parses a
    reply twice, with the callbacks of the node's own client and then its
    own (and a cluster pipeline with the node's only), so every node client
    gets them too, including those made later for new or promoted primaries.
    """
    _raw_callbacks(client)
    nodes = getattr(client, "nodes_manager", None)
    if nodes is not None:
        for node in nodes.nodes_cache.values():
            if node.redis_connection is not None:
                _raw_callbacks(node.redis_connection)
        make = nodes.create_redis_node

        def create_redis_node(host, port, **kwargs):
            node_client = make(host, port, **kwargs)
            _raw_callbacks(node_client)
            return node_client

        nodes.create_redis_node = create_redis_node
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
    cluster: bool = False,
) -> redis.Redis:
    """A client for ``url``; checks the arguments before any connection is made.

    With ``cluster`` it is redis-py's cluster client (``redis.cluster.RedisCluster``)
    started from the node ``url`` names: it learns the other nodes and the slot
    map from it, sends each command to the node that holds its keys, and
    follows MOVED/ASK redirections.  Credentials and TLS settings apply to
    every node.
    """
    if not isinstance(url, str) or not url:
        raise ValueError(f"connect: url must be a non-empty string, got {url!r}")
    parts = urlsplit(url)
    scheme = parts.scheme
    if scheme not in ("redis", "rediss", "unix"):
        raise ValueError(f"connect: url scheme must be redis://, rediss:// or unix://, got {scheme!r}")
    if cluster and scheme == "unix":
        raise ValueError("connect: a Redis Cluster is reached over TCP: use a redis:// or rediss:// URL of one node")
    if cluster and parts.path.strip("/") not in ("", "0"):
        raise ValueError(f"connect: a Redis Cluster has only database 0, the URL names {parts.path.strip('/')!r}")
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
    if cluster:
        from redis.cluster import RedisCluster

        client = RedisCluster.from_url(url, **kwargs)
    else:
        client = redis.Redis.from_url(url, **kwargs)
    return raw_stream_replies(client) if raw_streams else client
