"""The invented board of recurring formats and campaigns, and what the campaign detector does on it.

The replay tests run the policy ``seawall serve`` builds (two simulated workers, one real
redis-server) over a short board: three ordinary days, then a test day with six campaigns from
new accounts, three of them disguised.  The model is blind to the campaigns (each campaign comment
gets the score of a random ham comment), so only the detector can hold them.
"""
from __future__ import annotations

import collections
import re

import numpy as np
import pytest

from model.tokens import Tokenizer
from ops.lab.board import DAY_S, SITES, Board, blind_scores, obfuscate, play
from ops.config import load_config
from ops.serving import campaign_policy

SMALL = dict(history_days=3, chatter_per_day=800)


@pytest.fixture(scope="module")
def small_board():
    board = Board(**SMALL)
    return board, board.comments()


def test_the_same_seed_gives_the_same_board_and_another_seed_another():
    assert Board(**SMALL).comments()[:500] == Board(**SMALL).comments()[:500]
    assert [c.text for c in Board(seed=4, **SMALL).comments()[:200]] != [c.text for c in Board(**SMALL).comments()[:200]]


def test_formats_recur_every_day_and_campaigns_only_on_the_test_day(small_board):
    board, comments = small_board
    assert [c.ts for c in comments] == sorted(c.ts for c in comments)
    assert len({c.id for c in comments}) == len(comments)
    days = collections.defaultdict(collections.Counter)
    for c in comments:
        days[int((c.ts - board.start_ts) // DAY_S)][c.kind] += 1
    for day in range(board.history_days + 1):
        for kind in ("dish", "puzzle", "rota", "tools", "found", "leftovers", "visitors", "chatter"):
            assert days[day][kind] > 10, (day, kind)
        assert (days[day]["campaign"] > 0) == (day == board.history_days)
    assert days[board.history_days]["market"] > 0 and days[0]["market"] == 0  # weekly: only on the test day
    assert {c.site for c in comments} == set(SITES)


def test_campaigns_come_from_accounts_the_board_has_never_seen(small_board):
    board, comments = small_board
    campaign = [c for c in comments if c.kind == "campaign"]
    ordinary_authors = {c.author for c in comments if c.kind != "campaign"}
    assert len({c.campaign for c in campaign}) == 6 and len(campaign) > 1500
    assert not {c.author for c in campaign} & ordinary_authors
    assert {c.obfuscated for c in campaign} == {True, False}
    assert all(c.label == 1 for c in campaign) and all(c.label == 0 for c in comments if c.kind not in ("spam", "campaign"))


def test_links_point_at_example_or_invalid_hosts_only(small_board):
    _board, comments = small_board
    hosts = set()
    for c in comments:
        hosts |= set(re.findall(r"[a-z0-9-]+(?:\.[a-z0-9-]+)*\.(?:example|invalid|com|org|net)\b", c.text.lower()))
    assert hosts and all(h.endswith((".example", ".invalid")) for h in hosts), sorted(hosts)[:10]


def test_disguised_text_reads_the_same_to_the_tokenizer_mostly():
    """Each trick is undone by the model's normalization; a few artefacts remain (a spaced word glued to a
    one-letter word, leetspeak read as a number with a unit), as they would in real disguised spam."""
    import random

    text = ("Honest review: the pasta box from Zelvantra was on our table in 10 minutes and the kids asked for "
            "seconds. No shopping, no waste. Code K123 gets a free first box at zelvantra-kits.example")
    tok = Tokenizer(bigrams=False)
    plain = tok.words(text)
    same = []
    for seed in range(50):
        disguised = obfuscate(text, random.Random(seed))
        assert disguised != text
        words = tok.words(disguised)
        same.append(len(set(words) & set(plain)) / len(set(plain)))
    assert np.mean(same) > 0.9 and min(same) > 0.75


def _replay(client, comments, scores, overrides=None):
    class Clock:
        now = 0.0

        def __call__(self):
            return self.now

        def set(self, ts):
            self.now = ts

    config = load_config(overrides or {}, environ={})
    clock = Clock()
    policies = [campaign_policy(config, clock=clock) for _ in range(2)]
    return play(client, policies, comments, scores, set_time=clock.set, keys=config.keys)


def _blind(comments):
    rng = np.random.default_rng(0)
    scores = np.where([c.label == 1 and c.kind == "spam" for c in comments], 0.99, rng.uniform(0.0, 0.3, len(comments)))
    return blind_scores(comments, scores)


@pytest.mark.slow
def test_the_detector_holds_campaigns_and_not_the_boards_formats(small_board, redis_client):
    """Precision, plain and disguised recall with the model blind, detection delay: the targets."""
    board, comments = small_board
    replay = _replay(redis_client, comments, _blind(comments))
    day, whole = replay.figures(since=board.test_day_ts), replay.figures(since=0.0)
    assert day["ham_held_by_campaigns_share"] <= 0.005 and whole["ham_held_by_campaigns_share"] <= 0.005, whole
    assert day["campaigns_started_false"] == 0 and whole["campaigns_started_false"] == 0
    assert day["campaigns_started_true"] >= 6
    assert day["plain_recall"] >= 0.95 and day["obfuscated_recall"] >= 0.95, day
    delays = {**day["plain_delay_comments"], **day["obfuscated_delay_comments"]}
    assert all(d is not None and d <= 30 for d in delays.values()), delays


@pytest.mark.slow
def test_without_the_peak_baseline_the_visitors_notes_are_held(small_board, redis_client):
    """Visitors sign without an account (always new authors) every afternoon: only their history says
    that an afternoon's dozen notes is ordinary.  With the busiest-window test off, they are held."""
    board, comments = small_board
    replay = _replay(redis_client, comments, _blind(comments), {"waves.campaign_peak_ratio": 1.0})
    truth = {c.id: c for c in comments}
    held_kinds = collections.Counter(truth[i].kind for i in replay.members if truth[i].label == 0)
    assert held_kinds["visitors"] > 0 and replay.figures(since=0.0)["campaigns_started_false"] > 0
