"""`seawall watch`: one frame rendered to a string from Redis data."""
from __future__ import annotations

import json

import pytest

from ops.cli import main
from ops.watchview import collect, render, sparkline
from worker.events import add_event
from worker.settings import Keys

KEYS = Keys()
NOW = 1_800_000_000.0 + 30  # 30 s into a minute
MINUTE = int(NOW // 60)


def fill(client):
    for back in range(15):
        m = MINUTE - back
        client.hset(KEYS.rates(m), mapping={"news.example:total": 100 + 10 * (15 - back), "news.example:hold": 5,
                                            "news.example:reject": 1, "forum.example:total": 20,
                                            "forum.example:hold": 10 if back < 3 else 1})
    client.hset("seawall:waves:active", "forum.example",
                json.dumps({"site": "forum.example", "minute": MINUTE - 2, "rate": 0.5, "baseline": 0.05}))
    client.hset("seawall:campaigns:active", "c0abc", json.dumps({"id": "c0abc", "site": "news.example",
                                                                 "authors": 7, "started": NOW - 300}))
    client.hset("seawall:campaigns:size", "c0abc", 42)
    client.hset("seawall:campaigns:last", "c0abc", NOW - 5)
    client.xgroup_create(KEYS.comments, KEYS.group, id="0", mkstream=True)
    for i in range(3):
        client.xadd(KEYS.comments, {"id": f"c{i}", "text": "hello"})
    client.set("seawall:models:active", "ab12cd34ef56")
    client.hset("seawall:models:meta:ab12cd34ef56", mapping={"version": "ab12cd34ef56", "created_at": NOW - 3 * 86400})
    add_event(client, KEYS.events, "retrain", {"decision": "refused", "reasons": ["auc 0.91 < 0.95"]}, ts=NOW - 7200)
    add_event(client, KEYS.events, "wave_start", {"site": "forum.example", "rate": 0.5}, ts=NOW - 90)


def test_frame_shows_rates_waves_campaigns_lag_model_and_retrain(fake_redis):
    fill(fake_redis)
    frame = render(collect(fake_redis, KEYS, now=NOW))
    lines = frame.splitlines()
    news = next(line for line in lines if line.startswith("news.example"))
    assert " 240 " in news  # the last complete minute (one back): 100 + 10 * 14
    assert "2.7%" in news  # 36 flagged of 1,350 in the last 6 minutes (250 + 240 + ... + 200)
    assert news.rstrip().endswith(sparkline([100 + 10 * (15 - b) for b in range(14, -1, -1)]))
    forum = next(line for line in lines if line.startswith("forum.example"))
    assert forum.rstrip().endswith("WAVE")
    assert "WAVE      forum.example since" in frame and "flagged 50.0% vs normal 5.0%" in frame
    assert "CAMPAIGN  c0abc on news.example: 42 members" in frame
    assert "lag       3 waiting, 0 pending, 0 consumers" in frame
    assert "model     ab12cd34ef56  age 3d 0h" in frame
    assert "retrain   refused 2h 0m ago (auc 0.91 < 0.95)" in frame
    assert "wave_start" in frame


def test_empty_redis_says_none(fake_redis):
    frame = render(collect(fake_redis, KEYS, now=NOW))
    for expected in ("model     none", "retrain   none yet", "lag       none", "waves     none", "campaigns none",
                     "no comments counted"):
        assert expected in frame


def test_hostile_site_names_cannot_drive_the_terminal(fake_redis):
    fake_redis.hset(KEYS.rates(MINUTE), mapping={"evil\x1b[2Jsite.example" + "x" * 80 + ":total": 5})
    frame = render(collect(fake_redis, KEYS, now=NOW))
    assert "\x1b" not in frame and "evil?[2Jsite" in frame and "…" in frame


def test_sparkline_scales_to_the_largest():
    assert sparkline([0, 1, 2, 4, 8]) == " ▂▃▅█"
    assert sparkline([0, 0]) == "▁▁"


def test_watch_once_on_a_real_redis_server(redis_server, capsys):
    client = redis_server.client()
    fill(client)
    assert main(["watch", "--redis", redis_server.url, "--once"]) == 0
    out = capsys.readouterr().out
    assert "Seawall watch" in out and "model     ab12cd34ef56" in out


def test_watch_refuses_a_bad_interval(capsys):
    assert main(["watch", "--redis", "redis://127.0.0.1:1/0", "--interval", "0"]) == 2
    assert "interval" in capsys.readouterr().err


def test_events_read_as_sentences_not_json(fake_redis):
    add_event(fake_redis, KEYS.events, "promote", {"version": "bbb222", "previous": "aaa111", "actor": "retrain",
                                                   "reason": "gate passed"}, ts=NOW - 60)
    add_event(fake_redis, KEYS.events, "retrain", {"decision": "promoted", "candidate": "bbb222", "labels_new": 812},
              ts=NOW - 59)
    add_event(fake_redis, KEYS.events, "campaign_start", {"id": "c9", "site": "news.example", "members": 10,
                                                          "authors": 4}, ts=NOW - 30)
    add_event(fake_redis, KEYS.events, "wave_end", {"site": "news.example", "minutes": 12, "peak_rate": 0.31},
              ts=NOW - 20)
    add_event(fake_redis, KEYS.events, "audit", {"who": "ops", "what": "drill"}, ts=NOW - 10)
    frame = render(collect(fake_redis, KEYS, now=NOW))
    events = frame.split("recent events\n", 1)[1].splitlines()
    assert events == [
        "  08:00    10s ago  audit           what=drill, who=ops",
        "  08:00    20s ago  wave_end        wave over on news.example after 12 min, peak 31.0% flagged",
        "  08:00    30s ago  campaign_start  campaign c9 on news.example: 10 near-duplicates from 4 authors",
        "  07:59    59s ago  retrain         promoted bbb222 after 812 new labels",
        "  07:59    60s ago  promote         promoted bbb222 (was aaa111) by retrain",
    ]
    assert "{" not in frame


def test_model_line_says_when_the_model_was_trained_and_promoted(fake_redis):
    fake_redis.set("seawall:models:active", "bbb222")
    fake_redis.hset("seawall:models:meta:bbb222", mapping={"created_at": NOW - 40, "promoted_at": NOW - 33})
    frame = render(collect(fake_redis, KEYS, now=NOW))
    assert "model     bbb222  age 40s (trained or retrained), promoted 33s ago" in frame


def test_live_view_redraws_in_place_without_clearing_the_screen(fake_redis):
    import io

    from rich.console import Console

    from ops.commands.watch import live

    fill(fake_redis)
    out = io.StringIO()
    console = Console(file=out, force_terminal=True, width=120, height=60)
    live(fake_redis, KEYS, "prefix seawall:", interval=0.0, console=console, frames=3)
    drawn = out.getvalue()
    assert drawn.count("Seawall watch") == 3           # three frames ...
    assert "\x1b[2J" not in drawn                       # ... and the screen is never erased between them
    assert drawn.count("\x1b[H") >= 3                    # each one starts from the top-left corner
    assert "\x1b[1;31mWAVE" in drawn                     # waves stand out on a terminal


def test_hostile_names_cannot_inject_markup_into_the_live_view():
    from ops.commands.watch import styled

    text = styled("forum[bold red]x[/] 3\n")
    assert text.plain == "forum[bold red]x[/] 3\n"
