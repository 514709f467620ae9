"""`seawall sample`: invented labelled comments a newcomer can train on, import and retrain with."""
from __future__ import annotations

import json
import re

from ops.cli import main
from ops.commands.labels import parse_label_line
from ops.datafiles import read_examples
from ops.lab.scenario import WAVE_TERMS


def rows(path) -> list[dict]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def test_history_is_labelled_json_lines_that_train_reads(tmp_path, capsys):
    path = tmp_path / "sample.jsonl"
    assert main(["sample", "--out", str(path)]) == 0
    assert capsys.readouterr().out.startswith("sample: wrote 3,000 comments")
    got = rows(path)
    assert len(got) == 3000 and len({r["id"] for r in got}) == 3000
    assert {r["label"] for r in got} == {"spam", "ham"} and 0.2 < sum(r["label"] == "spam" for r in got) / 3000 < 0.3
    assert set(got[0]) == {"id", "text", "label", "site", "author"}
    assert len(read_examples([str(path)], op="train")) == 3000
    assert not any(term in r["text"].lower() for r in got for term in WAVE_TERMS)  # the campaign is for later


def test_later_comments_carry_moderators_and_a_campaign_the_history_never_saw(tmp_path):
    path = tmp_path / "later.jsonl"
    assert main(["sample", "--later", "--out", str(path)]) == 0
    got = rows(path)
    assert len(got) == 600 and {r["moderator"] for r in got} == {"mod-ana", "mod-bo", "mod-cy"}
    campaign = [r for r in got if any(term in r["text"].lower() for term in WAVE_TERMS)]
    assert 20 <= len(campaign) and all(r["label"] == "spam" for r in campaign)
    for i, r in enumerate(got[:50]):
        record = parse_label_line(json.dumps(r), f"later.jsonl:{i + 1}", text_max_bytes=262144, now=0.0)
        assert record.moderator == r["moderator"]


def test_the_same_seed_gives_the_same_file_and_hosts_are_invented(tmp_path):
    a, b, c = tmp_path / "a.jsonl", tmp_path / "b.jsonl", tmp_path / "c.jsonl"
    assert main(["sample", "--out", str(a), "--comments", "200"]) == 0
    assert main(["sample", "--out", str(b), "--comments", "200"]) == 0
    assert main(["sample", "--out", str(c), "--comments", "200", "--seed", "8"]) == 0
    assert a.read_bytes() == b.read_bytes() != c.read_bytes()
    hosts = {h for r in rows(a) for h in re.findall(r"https?://([^/\s]+)", r["text"])}
    assert hosts and all(h.endswith((".example", ".invalid")) for h in hosts), hosts


def test_too_few_comments_is_a_one_line_error(tmp_path, capsys):
    assert main(["sample", "--out", str(tmp_path / "x.jsonl"), "--comments", "3"]) == 2
    assert "at least 10" in capsys.readouterr().err
