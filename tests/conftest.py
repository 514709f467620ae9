"""Shared fixtures: fakeredis for unit tests, a real redis-server per test for
integration tests, and the public mail corpus for checks against the outside world."""
from __future__ import annotations

import shutil

import pytest

from servers import RabbitServer, RedisCluster, RedisServer, rabbitmq_server_path, require


@pytest.fixture
def fake_redis():
    """A fresh in-process fakeredis per test (unit tests only)."""
    import fakeredis

    server = fakeredis.FakeServer()
    client = fakeredis.FakeRedis(server=server)
    yield client
    client.close()


@pytest.fixture
def redis_factory(tmp_path):
    """Start real redis-servers with custom options; all are stopped afterwards."""
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    started: list[RedisServer] = []

    def make(name: str = "redis", **kwargs) -> RedisServer:
        server = RedisServer(tmp_path / name, **kwargs).start()
        started.append(server)
        return server

    yield make
    for server in started:
        server.stop()


@pytest.fixture
def redis_server(redis_factory) -> RedisServer:
    """A real redis-server on a free loopback port, stopped after the test."""
    return redis_factory()


@pytest.fixture
def redis_client(redis_server):
    client = redis_server.client()
    yield client
    client.close()


def _rabbit(path) -> RabbitServer:
    require(shutil.which("rabbitmq-server") is not None and rabbitmq_server_path() is not None,
            "rabbitmq-server not installed")
    return RabbitServer(path).start()


@pytest.fixture
def rabbit_server(tmp_path) -> RabbitServer:
    """A real rabbitmq-server node on a free loopback port, stopped after the test (tests that restart it)."""
    server = _rabbit(tmp_path / "rabbitmq")
    yield server
    server.stop()


@pytest.fixture(scope="module")
def rabbit_node(tmp_path_factory) -> RabbitServer:
    """One rabbitmq-server node for a whole module (it takes seconds to start); tests use their own queues."""
    server = _rabbit(tmp_path_factory.mktemp("rabbitmq"))
    yield server
    server.stop()


def _cluster_binaries() -> None:
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    require(shutil.which("redis-cli") is not None, "redis-cli binary not on PATH (redis-tools)")


@pytest.fixture(scope="session")
def cluster_session(tmp_path_factory) -> RedisCluster:
    """One Redis Cluster (3 primaries, 3 replicas) for every test that leaves it whole; see ``shared_cluster``."""
    _cluster_binaries()
    cluster = RedisCluster(tmp_path_factory.mktemp("cluster")).start()
    yield cluster
    cluster.stop()


@pytest.fixture
def shared_cluster(cluster_session) -> RedisCluster:
    """The session's Redis Cluster, emptied and settled for this test; the test must not break it."""
    cluster_session.wait_ok()
    cluster_session.flushall()
    return cluster_session


@pytest.fixture
def redis_cluster(tmp_path) -> RedisCluster:
    """A Redis Cluster of its own (3 primaries, 3 replicas) for a test that kills or reshards it."""
    _cluster_binaries()
    cluster = RedisCluster(tmp_path / "cluster").start()
    yield cluster
    cluster.stop()
