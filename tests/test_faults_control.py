"""Concurrent control: two `seawall retrain` and two `seawall models promote` processes at once
leave one consistent active model, and the one that lost says so on one line (exit 2)."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from faults_kit import KEYS
from kit import clean_env
from ops.registry import Registry
from retrain_kit import bootstrap, model_bytes, send_feedback, stream

pytestmark = pytest.mark.redis_server
RACE = str(Path(__file__).with_name("cli_race.py"))


def race(*argvs) -> list[subprocess.CompletedProcess]:
    """Start one process per command line, let them import, then release them together."""
    procs = [subprocess.Popen([sys.executable, RACE, *argv], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=clean_env(),
                              cwd=Path(__file__).resolve().parent.parent) for argv in argvs]
    for p in procs:
        assert p.stderr.readline().strip() == "ready"
    for p in procs:
        p.stdin.write("go\n")
        p.stdin.flush()
    out = []
    for p, argv in zip(procs, argvs):
        stdout, stderr = p.communicate(timeout=300)
        out.append(subprocess.CompletedProcess(argv, p.returncode, stdout, stderr))
    return out


def consistent(registry: Registry) -> str:
    """The active pointer, the history head and the meta agree; returns the active version."""
    active = registry.active()
    history = registry.history()
    assert history and history[0] == active
    assert registry.meta(active)["promoted_at"]
    assert registry.load().version == active  # its artifact is there and loads
    return active




@pytest.mark.slow
def test_two_concurrent_retrains_one_runs_the_other_is_told(redis_server):
    client = redis_server.client()
    registry, first = bootstrap(client)
    send_feedback(client, stream()[:1500])
    a, b = race(*[["retrain", "--redis", redis_server.url, "--json", "--rescore", "off"]] * 2)
    winner, loser = (a, b) if a.returncode == 0 else (b, a)
    assert (winner.returncode, loser.returncode) == (0, 2), (a.stderr, b.stderr)
    assert loser.stdout == "" and loser.stderr.count("\n") == 1
    assert loser.stderr.startswith("seawall retrain: error: retrain: another retrain is running (lock held by ")
    report = json.loads(winner.stdout)
    assert report["decision"] in ("promoted", "refused") and report["labels"]["new"] == 1500
    active = consistent(registry)
    if report["decision"] == "promoted":
        assert active == report["candidate"] and registry.history() == [active, first]
        assert registry.meta(active)["parent"] == first
    else:
        assert active == first and registry.history() == [first]
    assert client.get("seawall:retrain:lock") is None  # released by its holder
    assert client.llen("seawall:retrain:reports") == 1  # the loser stored no report


@pytest.mark.slow
def test_two_concurrent_promotes_leave_one_consistent_active_model(redis_server):
    client = redis_server.client()
    registry = Registry(client=client, keys=KEYS)
    base, a, b = (registry.push(model_bytes(seed)) for seed in (0, 1, 2))
    registry.promote(base)
    url = redis_server.url

    # The same version twice: exactly one switch happens; the other is told why.
    first, second = race(["models", "promote", a, "--redis", url, "--rescore", "off"],
                         ["models", "promote", a, "--redis", url, "--rescore", "off"])
    codes = sorted([first.returncode, second.returncode])
    assert codes == [0, 2], (first.stderr, second.stderr)
    loser = first if first.returncode else second
    assert loser.stderr.count("\n") == 1 and loser.stderr.startswith("seawall models: error: models promote")
    assert ("another promote or rollback changed the active model" in loser.stderr
            or f"{a} is already the active model" in loser.stderr), loser.stderr
    assert consistent(registry) == a and registry.history() == [a, base]

    # Two different versions: either one wins and the other is told, or they ran one after the other;
    # the pointer, the history and the events agree in every case.
    one, two = race(["models", "promote", b, "--redis", url, "--rescore", "off", "--json"],
                    ["models", "promote", base, "--redis", url, "--rescore", "off", "--json"])
    won = [(v, p) for v, p in ((b, one), (base, two)) if p.returncode == 0]
    lost = [p for p in (one, two) if p.returncode != 0]
    assert len(won) + len(lost) == 2 and won
    for p in lost:
        assert p.returncode == 2 and p.stderr.count("\n") == 1
        assert "another promote or rollback changed the active model" in p.stderr
    switches = sorted((json.loads(p.stdout) for _v, p in won), key=lambda r: r["previous"] != a)
    active = consistent(registry)
    assert active == switches[-1]["version"]
    assert registry.history() == [s["version"] for s in reversed(switches)] + [a, base]
    assert switches[0]["previous"] == a
    promotes = [json.loads(f[b"data"]) for _i, f in client.xrange(KEYS.events) if f[b"type"] == b"promote"]
    assert len(promotes) == 2 + len(won)
    assert promotes[-1]["version"] == active
