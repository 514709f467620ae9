"""`seawall console` commands (accounts, audit, serve) and `seawall demo --console`, against real processes.

Accounts are made with the production scrypt cost here, so these also show that a sign-in works with it.
"""
from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import time

import pytest

from console_kit import hold
from kit import wait_until
from ops.bench.console import Browser
from ops.cli import main
from ops.config import load_config
from ops.console.accounts import Accounts
from servers import free_port, wait_for_port
from worker.settings import Keys

pytestmark = pytest.mark.redis_server

KEYS = Keys()
PASSWORD = "a long enough password"


def test_user_commands(redis_server, redis_client, monkeypatch, capsys):
    url = redis_server.url
    monkeypatch.setattr(sys, "stdin", io.StringIO(PASSWORD + "\n"))
    assert main(["console", "user", "add", "ana", "--role", "admin", "--password-stdin", "--redis", url]) == 0
    typed = iter([PASSWORD, PASSWORD, "first password", "second password"])
    monkeypatch.setattr("getpass.getpass", lambda prompt="": next(typed))
    assert main(["console", "user", "add", "bo", "--redis", url]) == 0
    assert main(["console", "user", "add", "cy", "--redis", url]) == 2  # the two typed passwords differ
    assert "the two passwords differ" in capsys.readouterr().err
    monkeypatch.setattr(sys, "stdin", io.StringIO("short\n"))
    assert main(["console", "user", "add", "cy", "--password-stdin", "--redis", url]) == 2
    monkeypatch.setattr(sys, "stdin", io.StringIO(PASSWORD + "\n"))
    assert main(["console", "user", "add", "ana", "--password-stdin", "--redis", url]) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(["console", "user", "list", "--json", "--redis", url]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert [(a["name"], a["role"]) for a in listed] == [("ana", "admin"), ("bo", "moderator")]
    record = json.loads(redis_client.hget(KEYS.accounts, "ana"))
    assert (record["n"], record["r"], record["p"]) == (2**17, 8, 1) and PASSWORD not in json.dumps(record)
    assert main(["console", "user", "role", "bo", "admin", "--redis", url]) == 0
    assert main(["console", "user", "remove", "bo", "--redis", url]) == 0
    assert main(["console", "user", "remove", "bo", "--redis", url]) == 2
    accounts = Accounts(client=redis_client, keys=KEYS)
    assert accounts.authenticate("ana", PASSWORD).is_admin and accounts.get("bo") is None


def console_process(url: str, port: int, tmp_path, **env_extra) -> subprocess.Popen:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    env.update({"SEAWALL_CONSOLE_UNDO_S": "1.0", **env_extra})
    log = open(tmp_path / f"console-{port}-{time.monotonic_ns()}.log", "wb")
    proc = subprocess.Popen([sys.executable, "-m", "ops.cli", "console", "serve", "--port", str(port), "--redis", url],
                            env=env, stdout=log, stderr=subprocess.STDOUT)
    wait_for_port("127.0.0.1", port, timeout=60)
    return proc


@pytest.mark.slow
def test_serve_then_a_killed_console_writes_its_pending_decisions_when_it_starts_again(redis_server, redis_client,
                                                                                       tmp_path, capsys):
    url = redis_server.url
    Accounts(client=redis_client, keys=KEYS, cost=1024).add("ana", PASSWORD, role="moderator", now=time.time())
    hold(redis_client, 2)
    assert load_config({}, environ={}).console.host == "127.0.0.1"  # loopback unless configured
    port = free_port()
    proc = console_process(url, port, tmp_path, SEAWALL_CONSOLE_UNDO_S="30")
    try:
        b = Browser(port)
        assert b.request("GET", "/healthz")[0].status == 200
        b.sign_in("ana", PASSWORD)
        res, body = b.post_json("/api/decide", json.dumps({"ids": ["c0"], "action": "reject"}).encode())
        assert json.loads(body)["decided"] == ["c0"]
    finally:
        proc.kill()  # no chance to write anything at shutdown
        proc.wait(timeout=30)
    assert redis_client.zscore(KEYS.deciding, "c0") is not None and redis_client.xlen(KEYS.decisions) == 0
    redis_client.zadd(KEYS.deciding, {"c0": time.time() - 1})  # its window has passed meanwhile
    proc = console_process(url, port, tmp_path)
    try:
        wait_until(lambda: redis_client.xlen(KEYS.decisions), timeout=60, what="the restarted console's finalizer")
        assert [f[b"id"] for _s, f in redis_client.xrange(KEYS.decisions)] == [b"c0"]
    finally:
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    proc = console_process(url, port, tmp_path)  # undo window 1 s
    b = Browser(port)
    b.sign_in("ana", PASSWORD)
    res, body = b.post_json("/api/decide", json.dumps({"ids": ["c1"], "action": "publish"}).encode())
    assert json.loads(body)["decided"] == ["c1"]
    proc.send_signal(signal.SIGINT)  # a clean stop inside the undo window: the decision is written first
    assert proc.wait(timeout=30) == 0
    assert [f[b"id"] for _s, f in redis_client.xrange(KEYS.decisions)] == [b"c0", b"c1"]
    assert redis_client.zcard(KEYS.deciding) == 0
    assert main(["console", "audit", "--json", "--redis", url]) == 0
    events = [json.loads(line)["event"] for line in capsys.readouterr().out.splitlines()]
    assert events == ["sign_in", "decide", "sign_in", "decide"]


@pytest.mark.slow
def test_demo_console_opens_on_the_held_comments_it_left(tmp_path):
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    proc = subprocess.Popen([sys.executable, "-m", "ops.cli", "demo", "--console", "--console-port", str(port),
                             "--quiet", "--report", str(tmp_path / "report.html")],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        password, lines = None, []
        deadline = time.monotonic() + 240
        while password is None and time.monotonic() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            lines.append(line)
            if "with the password" in line:
                password = line.split("with the password", 1)[1].split()[0]
        assert password, "".join(lines[-20:])
        b = Browser(port)
        b.sign_in("demo", password)
        status = json.loads(b.request("GET", "/api/queue/status")[1])
        assert status["held"] >= 10  # the story's last held comments, the campaign among them
        page = b.request("GET", "/queue")[1].decode()
        size = int(page.split('data-size="', 1)[1].split('"', 1)[0])
        assert size >= 10  # the first row is the campaign
        ids = page.split('data-ids="', 1)[1].split('"', 1)[0].split()
        res, body = b.post_json("/api/decide", json.dumps({"ids": ids, "action": "reject"}).encode())
        assert res.status == 200 and len(json.loads(body)["decided"]) == size
        assert (tmp_path / "report.html").exists()
    finally:
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=60)
    assert proc.returncode in (0, 130)
