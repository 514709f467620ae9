"""`seawall partitions`: what a producer in another language needs, printed from the configuration."""
from __future__ import annotations

import json

import pytest

from ops.cli import main
from worker.partitions import SLOTS, key_slot, partition_of


def run_json(capsys, monkeypatch, *argv, env=None) -> list[dict]:
    for name in ("SEAWALL_KEYS_PARTITIONS", "SEAWALL_KEYS_PREFIX", "SEAWALL_CONFIG"):
        monkeypatch.delenv(name, raising=False)
    for name, value in (env or {}).items():
        monkeypatch.setenv(name, value)
    assert main(["partitions", "--json", *argv]) == 0
    return [json.loads(line) for line in capsys.readouterr().out.splitlines()]


@pytest.mark.parametrize("k", [1, 3, 8])
def test_every_partition_with_its_tag_slot_and_stream(capsys, monkeypatch, k):
    rows = run_json(capsys, monkeypatch, "--partitions", str(k))
    assert [r["partition"] for r in rows] == list(range(k))
    assert rows[0]["slots"][0] == 0 and rows[-1]["slots"][1] == SLOTS - 1
    for r in rows:
        assert r["slot"] == key_slot(r["stream"])
        if k > 1:
            assert r["stream"] == f"seawall:{{{r['tag']}}}:comments"
            assert r["slots"][0] <= r["slot"] <= r["slots"][1]
    if k == 1:
        assert rows[0]["stream"] == "seawall:comments"


def test_the_configured_k_and_prefix_are_the_default(capsys, monkeypatch):
    rows = run_json(capsys, monkeypatch, env={"SEAWALL_KEYS_PARTITIONS": "5", "SEAWALL_KEYS_PREFIX": "forum:"})
    assert len(rows) == 5 and all(r["stream"].startswith("forum:{p") for r in rows)


def test_an_id_prints_its_partition_and_stream(capsys, monkeypatch):
    rows = run_json(capsys, monkeypatch, "--partitions", "6", "--id", "c-1", "--id", "comment-99")
    assert [(r["id"], r["partition"]) for r in rows] == [("c-1", partition_of("c-1", 6)),
                                                         ("comment-99", partition_of("comment-99", 6))]
    table = run_json(capsys, monkeypatch, "--partitions", "6")
    assert all(r["stream"] == table[r["partition"]]["stream"] for r in rows)


def test_the_table_names_the_formula(capsys, monkeypatch):
    monkeypatch.delenv("SEAWALL_KEYS_PARTITIONS", raising=False)
    assert main(["partitions", "--partitions", "2"]) == 0
    out = capsys.readouterr().out
    assert "murmur3_32(id, seed 0) mod 2" in out and "seawall:{p0.1}:comments" in out


def test_a_bad_k_is_an_error_with_the_setting_named(capsys, monkeypatch):
    monkeypatch.delenv("SEAWALL_KEYS_PARTITIONS", raising=False)
    assert main(["partitions", "--partitions", "0"]) != 0
    assert "partitions" in capsys.readouterr().err
