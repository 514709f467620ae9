"""The console's parts without a browser: sessions, accounts, the queue's view and the overview's figures.

Pure functions and fakeredis; the web app itself is tested over HTTP (test_console_http.py) and in a real
browser (test_console_browser.py).
"""
from __future__ import annotations

import hashlib
import json

import pytest

from ops.console import sessions
from ops.console.accounts import SCRYPT_N, AccountError, Accounts, hash_password, verify_password
from ops.console.app import host_name, safe_next
from ops.console.overview import deadletter_counts, gate_summary, summarize_rates
from ops.console.queue import (
    Families, Filters, Group, Highlighter, apply_filters, campaigns_by_family, group_label, group_rows, infer_rule,
    parse_filters, render_body, visible,
)
from ops.watchview import SiteRow
from worker.holdqueue import HeldComment
from worker.settings import Keys

KEYS = Keys()
SECRET = b"k" * 32
NOW = 1_800_000_000.0


# -- sessions -------------------------------------------------------------------------------

def test_a_session_survives_the_round_trip_and_nothing_else_does():
    s = sessions.new_session("mod-ana", epoch=3, now=NOW)
    value = sessions.encode(s, SECRET)
    assert sessions.decode(value, SECRET, now=NOW + 10, max_age_s=60) == s
    body, mac = value.split(".")
    forged = sessions.encode(sessions.Session("mod-admin", 3, s.csrf, s.issued), b"x" * 32)
    for bad in (forged, f"{body}.{mac[:-2]}AA", body, value + ".x", "", None, "a" * 2000,
                f"{forged.split('.')[0]}.{mac}"):
        assert sessions.decode(bad, SECRET, now=NOW + 10, max_age_s=60) is None
    assert sessions.decode(value, SECRET, now=NOW + 61, max_age_s=60) is None  # expired
    assert sessions.decode(value, SECRET, now=NOW - 5, max_age_s=60) is None  # from the future


def test_cookie_flags():
    header = sessions.cookie_header("v", max_age_s=3600, secure=False)
    assert header == "seawall_console=v; Path=/; Max-Age=3600; HttpOnly; SameSite=Strict"
    assert sessions.cookie_header("v", max_age_s=60, secure=True).endswith("; Secure")
    assert "Max-Age=0" in sessions.clear_cookie_header(secure=False)


def test_csrf_tokens_are_fresh_per_session_and_compared_exactly():
    a, b = sessions.new_session(now=NOW), sessions.new_session(now=NOW)
    assert a.csrf != b.csrf and len(a.csrf) >= 32
    assert sessions.csrf_matches(a, a.csrf)
    assert not sessions.csrf_matches(a, b.csrf) and not sessions.csrf_matches(a, None)
    assert not sessions.csrf_matches(None, a.csrf) and not sessions.csrf_matches(a, "")


# -- accounts -------------------------------------------------------------------------------

def test_scrypt_matches_the_rfc_7914_test_vector():
    # RFC 7914, section 12, second vector: the primitive the account hashes are made with
    digest = hashlib.scrypt(b"password", salt=b"NaCl", n=1024, r=8, p=16, dklen=64)
    assert digest.hex() == ("fdbabe1c9d3472007856e7190d01e9fe7c6ad7cbc8237830e77376634b3731622eaf30d92e22a38"
                            "86ff109279d9830dac727afb94a83ee6d8360cbdfa2cc0640")


def test_stored_hashes_are_salted_scrypt_with_their_parameters():
    a = hash_password("correct horse battery", n=1024)
    b = hash_password("correct horse battery", n=1024)
    assert a["salt"] != b["salt"] and a["hash"] != b["hash"]  # salted: same password, different hashes
    assert (a["n"], a["r"], a["p"]) == (1024, 8, 1)
    assert verify_password("correct horse battery", a) and not verify_password("correct horse batterz", a)
    assert not verify_password("correct horse battery", dict(a, hash="AAAA"))
    assert not verify_password("x", {"salt": "!!"})
    assert SCRYPT_N == 2**17  # the default cost: OWASP's minimum for scrypt (from memory)


def test_accounts_lifecycle(fake_redis):
    accounts = Accounts(client=fake_redis, keys=KEYS, cost=1024, attempts=3)
    ana = accounts.add("mod-ana", "a long password", role="admin", now=NOW)
    assert ana.is_admin and accounts.get("mod-ana") == ana
    record = json.loads(fake_redis.hget(KEYS.accounts, "mod-ana"))
    assert "a long password" not in json.dumps(record) and record["n"] == 1024
    assert accounts.authenticate("mod-ana", "a long password") == ana
    with pytest.raises(AccountError, match="already exists"):
        accounts.add("mod-ana", "another long one", role="moderator", now=NOW)
    assert accounts.set_password("mod-ana", "a new long password").epoch == 1
    assert accounts.authenticate("mod-ana", "a long password") is None
    assert accounts.set_role("mod-ana", "moderator").role == "moderator"
    assert accounts.end_sessions("mod-ana").epoch == 3
    assert [a.name for a in accounts.list()] == ["mod-ana"]
    assert accounts.remove("mod-ana") and accounts.get("mod-ana") is None
    assert accounts.authenticate("mod-ana", "a new long password") is None


def test_an_account_locks_after_too_many_failures(fake_redis):
    accounts = Accounts(client=fake_redis, keys=KEYS, cost=1024, attempts=3)
    accounts.add("mod-bo", "a long password", role="moderator", now=NOW)
    for _ in range(3):
        assert accounts.authenticate("mod-bo", "wrong password!") is None
    assert accounts.locked("mod-bo")
    assert accounts.authenticate("mod-bo", "a long password") is None  # even the right one, for now
    assert 0 < fake_redis.ttl(KEYS.signin_failures("mod-bo")) <= 900


@pytest.mark.parametrize("name, password, role, match", [
    ("Ana", "a long password", "admin", "account name"),
    ("ana ana", "a long password", "admin", "account name"),
    ("-ana", "a long password", "admin", "account name"),
    ("ana", "short", "admin", "at least 10"),
    ("ana", "a long password", "owner", "role must be"),
    ("ana", "x" * 2000, "admin", "at most"),
], ids=["capital", "space", "dash-first", "short-password", "role", "huge-password"])
def test_bad_accounts_are_refused_before_anything_is_stored(fake_redis, name, password, role, match):
    with pytest.raises(AccountError, match=match):
        Accounts(client=fake_redis, keys=KEYS, cost=1024).add(name, password, role=role, now=NOW)
    assert fake_redis.hlen(KEYS.accounts) == 0


def test_the_session_secret_is_made_once_and_shared(fake_redis):
    a = Accounts(client=fake_redis, keys=KEYS, cost=1024).session_secret()
    assert a == Accounts(client=fake_redis, keys=KEYS, cost=1024).session_secret() and len(a) == 32


# -- highlighting ---------------------------------------------------------------------------

def kinds(segments):
    return [(s.text, s.kind) for s in segments if s.kind]


def test_reasons_mark_the_words_that_made_them_in_the_original_spelling():
    h = Highlighter()
    text = "FR33 c4sino spins at https://www.Casino.example/claim?x=1 tonight, see you"
    reasons = [("free", 1.1), ("casino", 0.8), ("domain:casino.example", 0.5), ("see", -0.3),
               ("spins_at", 0.2)]
    assert kinds(h.segments(text, reasons)) == [("FR33", "spam"), ("c4sino", "spam"), ("spins", "spam"),
                                                ("at", "spam"), ("https://www.Casino.example/claim?x=1", "spam"),
                                                ("see", "ham")]
    assert "".join(s.text for s in h.segments(text, reasons)) == text  # nothing lost or added


def test_a_chunk_with_both_directions_takes_the_sign_of_its_sum():
    h = Highlighter()
    marked = kinds(h.segments("good-value prize", [("good", -0.9), ("value", 0.2), ("prize", 0.4)]))
    assert marked == [("good-value", "ham"), ("prize", "spam")]


def test_hidden_and_direction_characters_are_shown_not_applied():
    h = Highlighter()
    text = "safe \u202eevil\u202c link\u200b here\u2066x\u2069\x07"
    segs = h.segments(text, [])
    shown = "".join(s.text for s in segs)
    assert not any(ch in shown for ch in "\u202e\u202c\u200b\u2066\u2069\x07")
    assert [s.text for s in segs if s.kind == "ctl"] == ["U+202E", "U+202C", "U+200B", "U+2066", "U+2069", "U+0007"]
    assert [s.text for s in visible("a\u202eb") if s.kind == "ctl"] == ["U+202E"]
    assert "\n" in "".join(s.text for s in h.segments("line one\nline two", []))  # newlines stay


def test_a_body_is_escaped_html_whatever_the_comment_holds():
    h = Highlighter()
    text = '<script>alert(1)</script> "quoted" & <a href="javascript:x">free</a>\u202e'
    html = str(render_body(segments=h.segments(text, [("free", 0.5), ("<script>", 0.1)]), full=visible(text),
                           reasons=[("<b>free</b>", 0.5), ('"x" onmouseover=y', -0.2)], chars=len(text)))
    assert "<script" not in html and "<a " not in html and "<b>free" not in html and "\u202e" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html and "&#34;quoted&#34; &amp;" in html
    assert '<mark class="w-spam" title="+0.50 toward spam">href=&#34;javascript:x&#34;&gt;free&lt;/a&gt;</mark>' in html
    assert "&lt;b&gt;free&lt;/b&gt;" in html and "&#34;x&#34; onmouseover=y" in html
    assert html.count("<details") == 1 and f"Show all {len(text)} characters" in html
    expired = str(render_body(segments=None, full=None, reasons=[], chars=0))
    assert "no longer cached" in expired


# -- families -------------------------------------------------------------------------------

def held(cid, text, *, at=0.0, site="s", score=0.5, campaign=None, author=""):
    return HeldComment(id=cid, held_at=at, text=text, site=site, score=score, campaign=campaign, author=author)


TEMPLATE = "I put two Quorbex capsules in the water butt and my tomatoes did really well this year, search Quorbex"


def test_near_duplicates_form_one_family_even_when_spelled_to_dodge():
    comments = [held("a", TEMPLATE, at=1), held("b", TEMPLATE.replace("tomatoes", "leeks"), at=2),
                held("c", TEMPLATE.replace("Quorbex", "Qu0rb3x").replace("o", "\u043e"), at=3),  # leet + Cyrillic o
                held("d", "Is the ferry running on Sunday or only on weekdays this month?", at=4),
                held("e", "thanks!", at=5), held("f", "thanks!", at=6)]
    group_of = Families().group_of(comments)
    assert group_of == {"a": "family:a", "b": "family:a", "c": "family:a"}  # short texts never group
    rows = group_rows(comments, group_of)
    assert [(r.kind, r.size) for r in rows] == [("family", 3), ("single", 1), ("single", 1), ("single", 1)]
    assert rows[0].ids == ["a", "b", "c"]


def test_a_campaign_named_by_the_verdict_is_its_own_group():
    comments = [held("a", "one text", campaign="c9"), held("b", "another text", campaign="c9"), held("c", "x")]
    group_of = Families().group_of(comments)
    assert group_of == {"a": "campaign:c9", "b": "campaign:c9"}
    assert [(r.kind, r.key) for r in group_rows(comments, group_of)][0] == ("campaign", "campaign:c9")


def test_an_active_campaign_names_the_family_of_its_first_member():
    group_of = {"a": "family:a", "b": "family:a", "z": "family:z"}
    linked = campaigns_by_family(group_of, {"c1": {"example_id": "b"}, "c2": {"example_id": "gone"}})
    assert linked == {"family:a": "c1"}
    g = Group(key="family:a", kind="family", members=[held("a", TEMPLATE), held("b", TEMPLATE)])
    assert group_label(g, "c1") == "campaign c1 · 2 comments"
    assert group_label(g).startswith("family of 2 · “I put two Quorbex")


# -- filters and rules ------------------------------------------------------------------------

def test_filters_from_query_parameters():
    f = parse_filters({"site": " a.example ", "min": "0.5", "max": "2", "q": "Prize", "group": "family:x"})
    assert f == Filters(site="a.example", group="family:x", min_score=0.5, max_score=None, contains="Prize")
    assert parse_filters({"min": "abc"}).min_score is None and not parse_filters({}).active


def test_apply_filters():
    comments = [held("a", "Free PRIZE here", site="a.example", score=0.9),
                held("b", "hello", site="b.example", score=0.2),
                held("c", None, site="a.example", score=None), held("d", "prize two", site="a.example", score=0.6)]
    group_of = {"a": "family:a", "d": "family:a"}
    ids = lambda f: [c.id for c in apply_filters(comments, f, group_of)]  # noqa: E731
    assert ids(Filters(site="a.example")) == ["a", "c", "d"]
    assert ids(Filters(min_score=0.5, max_score=0.8)) == ["d"]
    assert ids(Filters(contains="prize")) == ["a", "d"]
    assert ids(Filters(group="family:a", site="a.example", min_score=0.7)) == ["a"]


@pytest.mark.parametrize("comment, model_hold, site_hold, campaign, expected", [
    (HeldComment("a", 0, "t", score=0.2, rule="site"), 0.5, None, None, "site"),
    (HeldComment("a", 0, "t", score=0.2), 0.5, None, "c1", "campaign"),
    (HeldComment("a", 0, "t", score=0.7), 0.5, 0.3, None, "model"),
    (HeldComment("a", 0, "t", score=0.4), 0.5, 0.3, None, "site"),
    (HeldComment("a", 0, "t", score=0.1), 0.5, 0.3, None, "campaign"),
    (HeldComment("a", 0, "t", score=None), 0.5, None, None, "unknown"),
    (HeldComment("a", 0, "t", score=0.1), None, None, None, "model"),
], ids=["recorded", "campaign", "model", "site", "below-all", "no-score", "no-thresholds"])
def test_infer_rule(comment, model_hold, site_hold, campaign, expected):
    assert infer_rule(comment, model_hold=model_hold, site_hold=site_hold, campaign=campaign) == expected


# -- overview figures -----------------------------------------------------------------------

def test_rates_are_bucketed_by_five_minutes_with_gaps_for_silence():
    first = 30_000_000  # a multiple of 5 minutes: the window's first minute starts a bucket
    now = (first + 11) * 60 + 30  # twelve minutes, the last one still running
    rows = [SiteRow("a.example", totals=[10] * 5 + [0] * 5 + [4] * 2, flagged=[1] * 5 + [0] * 5 + [4, 0])]
    out = summarize_rates(rows, now=now)
    assert out["starts"] == [first * 60, (first + 5) * 60, (first + 10) * 60] and out["bucket_s"] == 300
    assert out["series"][0]["rates"] == [0.1, None, 0.5] and out["series"][0]["total"] == 58
    assert summarize_rates([], now=now)["series"] == []


def test_dead_letters_are_counted_by_reason():
    entries = [(b"1700000002000-0", {b"reason": b"missing_text"}), (b"1700000001000-0", {b"reason": b"missing_text"}),
               (b"1700000000000-0", {b"reason": b"empty_text"}), (b"1699999999000-0", {})]
    out = deadletter_counts(entries)
    assert out["reasons"] == [{"reason": "missing_text", "count": 2}, {"reason": "empty_text", "count": 1},
                              {"reason": "(none)", "count": 1}]
    assert out["sampled"] == 4 and out["since"] == 1699999999.0


def test_gate_summary_keeps_what_a_report_says():
    report = {"decision": "refused", "reasons": ["holdout: ROC-AUC 0.9 is 0.05 below"], "labels": {"new": 41},
              "gate": {"sets": {"canary": {"active": {"roc_auc": 0.95, "recall_at_gate_fpr": 0.8},
                                           "candidate": {"roc_auc": 0.9, "recall_at_gate_fpr": 0.7, "junk": "x"}},
                                "broken": "not a dict"}}}
    out = gate_summary(report)
    assert out["decision"] == "refused" and out["labels_new"] == 41
    assert out["sets"] == [{"set": "canary", "active": {"roc_auc": 0.95, "recall_at_gate_fpr": 0.8},
                            "candidate": {"roc_auc": 0.9, "recall_at_gate_fpr": 0.7}}]
    assert gate_summary(None) is None and gate_summary({"decision": "skipped"})["sets"] == []


def test_gate_summary_of_a_retrain_that_built_two_candidates(fake_redis):
    # the shape ops.retrain writes when it builds a warm start and a fit from scratch and chooses one
    sets = {name: {"rows": 60, "spam": 20, "active": {"roc_auc": 0.97, "recall_at_gate_fpr": 0.81},
                   "warm_start": {"roc_auc": 0.98, "recall_at_gate_fpr": 0.85},
                   "scratch": {"roc_auc": 0.99, "recall_at_gate_fpr": 0.9}} for name in ("canary", "holdout")}
    report = {"decision": "promoted", "chosen": "scratch", "candidate": "v2", "reasons": ["fine"],
              "gate": {"sets": sets}, "labels": {"new": 300}, "finished_at": 5.0}
    out = gate_summary(report)
    assert out["chosen"] == "scratch" and [r["set"] for r in out["sets"]] == ["canary", "holdout"]
    assert out["sets"][0]["candidate"] == {"roc_auc": 0.99, "recall_at_gate_fpr": 0.9}
    assert out["sets"][0]["active"] == {"roc_auc": 0.97, "recall_at_gate_fpr": 0.81}
    refused = gate_summary({"decision": "refused", "reasons": ["the recent holdout has 23 rows"]})
    assert refused["sets"] == [] and refused["chosen"] == ""
    assert refused["reasons"] == ["the recent holdout has 23 rows"]


# -- small web helpers --------------------------------------------------------------------------

@pytest.mark.parametrize("host, name", [("127.0.0.1:9320", "127.0.0.1"), ("[::1]:9320", "[::1]"),
                                        ("LocalHost", "localhost"), ("console.example:443", "console.example"),
                                        ("::1", "::1"), ("", "")])
def test_host_name(host, name):
    assert host_name(host) == name


@pytest.mark.parametrize("target, safe", [("/overview", "/overview"), ("//evil.example/x", "/queue"),
                                          ("https://evil.example", "/queue"), ("/\\evil", "/queue"),
                                          (None, "/queue"), ("/queue?site=a", "/queue?site=a")])
def test_safe_next(target, safe):
    assert safe_next(target) == safe
