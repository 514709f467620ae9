"""The console over HTTP on loopback (uvicorn) against a real redis-server, without a browser.

Sign-in and sessions, the CSRF and cross-site defences, the Host check, the security headers, roles, and the
decision API with two moderators racing.  A refused request must leave Redis as it was.
"""
from __future__ import annotations

import json
import re
import threading
import time
from urllib.parse import urlencode

import pytest

from console_kit import hold
from kit import wait_until
from ops.bench.console import Browser, ConsoleThread
from ops.config import load_config
from ops.connection import connect
from ops.console.accounts import Accounts
from ops.console.app import CSP, Console
from ops.registry import Registry
from worker_models import tiny_model

pytestmark = pytest.mark.redis_server

PASSWORD = "a long enough password"


class Desk:
    """A console on a real redis-server, with two moderators and an admin."""

    def __init__(self, url: str, **settings):
        overrides = {"redis_url": url, "console.undo_s": 0.5, "console.signin_attempts": 3}
        overrides.update({f"console.{k}": v for k, v in settings.items()})
        self.config = load_config(overrides, environ={})
        self.keys = self.config.keys
        self.client = connect(self.config)
        self.accounts = Accounts(client=self.client, keys=self.keys, cost=1024, attempts=3)
        for name, role in (("mod-ana", "moderator"), ("mod-bo", "moderator"), ("boss", "admin")):
            self.accounts.add(name, PASSWORD, role=role, now=time.time())
        self.console = Console(client=self.client, config=self.config, accounts=self.accounts)
        self.server = ConsoleThread(self.console)

    def browser(self, name: str | None = None) -> Browser:
        b = Browser(self.server.port)
        if name:
            b.sign_in(name, PASSWORD)
        return b

    def held(self) -> list[bytes]:
        return self.client.zrange(self.keys.held, 0, -1)


@pytest.fixture
def desk(redis_server):
    d = Desk(redis_server.url)
    with d.server:
        yield d
    d.client.close()


def decide(browser: Browser, ids, action="reject", *, drop=(), **headers):
    """POST /api/decide as the console's own page would, with ``headers`` changed and ``drop`` left out."""
    sent = {"Content-Type": "application/json", "X-Seawall-CSRF": browser.csrf,
            "Origin": f"http://127.0.0.1:{browser.port}", **headers}
    return browser.request("POST", "/api/decide", json.dumps({"ids": ids, "action": action}).encode(),
                           {k: v for k, v in sent.items() if k not in drop})


def test_nothing_without_signing_in(desk):
    hold(desk.client, 3)
    anon = desk.browser()
    res, _ = anon.request("GET", "/queue?site=x")
    assert res.status == 303 and res.getheader("location") == "/signin?next=%2Fqueue%3Fsite%3Dx"
    for path in ("/overview", "/"):
        assert anon.request("GET", path)[0].status == 303
    assert anon.request("GET", "/api/overview")[0].status == 401
    assert anon.request("GET", "/api/queue/status")[0].status == 401
    assert decide(anon, ["c0"])[0].status == 401
    assert len(desk.held()) == 3 and desk.client.xlen(desk.keys.feedback) == 0


def test_sign_in_sets_a_strict_httponly_cookie_and_rotates_the_csrf_token(desk):
    b = desk.browser()
    res, page = b.request("GET", "/signin")
    assert "HttpOnly" in res.getheader("set-cookie") and "SameSite=Strict" in res.getheader("set-cookie")
    before = re.search(rb'name="csrf" value="([^"]+)"', page).group(1).decode()
    b.sign_in("mod-ana", PASSWORD)
    assert b.csrf and b.csrf != before
    audit = [f[b"event"] for _sid, f in desk.client.xrange(desk.keys.audit)]
    assert audit == [b"sign_in"]


def test_wrong_passwords_are_refused_counted_and_lock_the_account(desk):
    b = desk.browser()
    _res, page = b.request("GET", "/signin")
    token = re.search(rb'name="csrf" value="([^"]+)"', page).group(1).decode()

    def attempt(password):
        form = urlencode({"name": "mod-ana", "password": password, "csrf": token}).encode()
        return b.request("POST", "/signin", form, {"Content-Type": "application/x-www-form-urlencoded"})[0].status

    assert [attempt("not the password") for _ in range(3)] == [401, 401, 401]
    assert attempt(PASSWORD) == 401  # locked for a while, even with the right password
    events = [f[b"event"] for _sid, f in desk.client.xrange(desk.keys.audit)]
    assert events == [b"sign_in_failed"] * 4


def test_sign_in_needs_the_form_token_and_a_same_site_origin(desk):
    b = desk.browser()
    _res, page = b.request("GET", "/signin")
    token = re.search(rb'name="csrf" value="([^"]+)"', page).group(1).decode()
    ok = {"name": "mod-ana", "password": PASSWORD}
    form = "application/x-www-form-urlencoded"
    assert b.request("POST", "/signin", urlencode(ok).encode(), {"Content-Type": form})[0].status == 403
    assert b.request("POST", "/signin", urlencode(dict(ok, csrf=token)).encode(),
                     {"Content-Type": form, "Origin": "http://evil.example"})[0].status == 403
    assert desk.client.xlen(desk.keys.audit) == 0


def test_state_changes_need_the_csrf_token_json_and_our_own_origin(desk):
    hold(desk.client, 2)
    b = desk.browser("mod-ana")
    cases = [
        ({"X-Seawall-CSRF": ""}, ()),
        ({"X-Seawall-CSRF": "a-guess"}, ()),
        ({}, ("X-Seawall-CSRF",)),
        ({"Origin": "http://evil.example"}, ()),
        ({"Origin": "null"}, ()),
        ({"Origin": f"http://localhost:{b.port}"}, ()),  # another site name for the same server
        ({"Referer": "http://evil.example/page"}, ("Origin",)),
        ({"Content-Type": "text/plain"}, ()),
        ({"Content-Type": "application/x-www-form-urlencoded"}, ()),
    ]
    for headers, drop in cases:
        res, _ = decide(b, ["c0"], drop=drop, **headers)
        assert res.status in (403, 415), (headers, drop)
    assert len(desk.held()) == 2 and desk.client.zcard(desk.keys.deciding) == 0
    assert decide(b, ["c0"])[0].status == 200  # the same request, done right


def test_an_unknown_host_name_is_refused(desk):
    b = desk.browser("mod-ana")
    res, _ = b.request("GET", "/queue", headers={"Host": f"rebind.example:{b.port}"})
    assert res.status == 421
    assert b.request("GET", "/queue", headers={"Host": f"localhost:{b.port}"})[0].status == 200


def test_every_response_carries_the_security_headers(desk):
    b = desk.browser("mod-ana")
    for path in ("/signin", "/queue", "/overview", "/api/overview", "/static/console.css", "/nope"):
        res, _ = b.request("GET", path)
        assert res.getheader("content-security-policy") == CSP, path
        assert res.getheader("x-content-type-options") == "nosniff"
        assert res.getheader("x-frame-options") == "DENY"
    assert "script-src 'self'" in CSP and "unsafe-inline" not in CSP and "frame-ancestors 'none'" in CSP


def test_decide_undo_and_the_streams(desk):
    hold(desk.client, 3)
    b = desk.browser("mod-ana")
    res, body = decide(b, ["c0", "c1", "missing"])
    got = json.loads(body)
    assert res.status == 200 and got["decided"] == ["c0", "c1"] and got["gone"] == ["missing"]
    assert got["undo_s"] == 0.5
    res, body = b.post_json("/api/undo", json.dumps({"token": got["token"], "ids": ["c1"]}).encode())
    assert json.loads(body) == {"restored": ["c1"], "final": []}
    wait_until(lambda: desk.client.xlen(desk.keys.decisions) >= 1, timeout=60,
               what="the finalizer (after the undo window)")
    entries = [{k.decode(): v.decode() for k, v in f.items()} for _s, f in desk.client.xrange(desk.keys.decisions)]
    assert [(e["id"], e["decision"], e["moderator"]) for e in entries] == [("c0", "reject", "mod-ana")]
    assert sorted(desk.held()) == [b"c1", b"c2"]
    status = json.loads(b.request("GET", "/api/queue/status")[1])
    assert status["held"] == 2 and status["deciding"] == 0


def test_bad_decision_requests_are_refused_with_a_reason(desk):
    hold(desk.client, 1)
    b = desk.browser("mod-ana")
    for payload in (b"not json", b"[1, 2]", json.dumps({"ids": "c0", "action": "reject"}).encode(),
                    json.dumps({"ids": ["c0"], "action": "delete"}).encode(),
                    json.dumps({"ids": [], "action": "reject"}).encode(),
                    json.dumps({"ids": [f"c{i}" for i in range(5001)], "action": "reject"}).encode()):
        res, body = b.post_json("/api/decide", payload)
        assert res.status == 400 and json.loads(body)["error"], payload[:40]
    res, _ = b.post_json("/api/decide", b'{"ids": ["' + b"x" * (3 * 2**20) + b'"]}')
    assert res.status == 413
    assert desk.held() == [b"c0"]


def test_two_moderators_racing_over_http_decide_each_comment_once(desk):
    ids = hold(desk.client, 60)
    ana, bo = desk.browser("mod-ana"), desk.browser("mod-bo")
    won = {"mod-ana": [], "mod-bo": []}

    def work(browser, name, order):
        for i in range(0, len(order), 3):
            got = json.loads(decide(browser, order[i:i + 3])[1])
            won[name] += got["decided"]

    threads = [threading.Thread(target=work, args=(ana, "mod-ana", ids)),
               threading.Thread(target=work, args=(bo, "mod-bo", ids[::-1]))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert sorted(won["mod-ana"] + won["mod-bo"]) == sorted(ids)
    assert won["mod-ana"] and won["mod-bo"]  # both got some: they met in the middle
    wait_until(lambda: desk.client.xlen(desk.keys.feedback) >= 60, timeout=60, what="the 60 labels")
    labels = [{k.decode(): v.decode() for k, v in f.items()} for _s, f in desk.client.xrange(desk.keys.feedback)]
    assert sorted(label["id"] for label in labels) == sorted(ids)
    assert {label["id"]: label["moderator"] for label in labels} == {
        **{i: "mod-ana" for i in won["mod-ana"]}, **{i: "mod-bo" for i in won["mod-bo"]}}


def test_only_an_admin_promotes_or_rolls_back(desk, tmp_path):
    registry = Registry(client=desk.client, keys=desk.keys)
    first, second = (registry.push(path.read_bytes()) for path, _v in (tiny_model(1), tiny_model(2)))
    registry.promote(first)
    mod, boss = desk.browser("mod-ana"), desk.browser("boss")
    res, _ = mod.post_json("/api/models/promote", json.dumps({"version": second}).encode())
    assert res.status == 403 and registry.active() == first
    res, body = boss.post_json("/api/models/promote", json.dumps({"version": second}).encode())
    got = json.loads(body)
    assert res.status == 200 and registry.active() == second and got["previous"] == first
    assert got["rescore"]["held"] == 0
    res, body = boss.post_json("/api/models/rollback", b"{}")
    assert res.status == 200 and registry.active() == first
    res, body = boss.post_json("/api/models/rollback", b"{}")
    assert res.status == 409 and "no earlier promoted version" in json.loads(body)["error"]
    audit = [(f[b"event"], f.get(b"moderator")) for _s, f in desk.client.xrange(desk.keys.audit)]
    assert (b"promote", b"boss") in audit and (b"rollback", b"boss") in audit
    overview = json.loads(boss.request("GET", "/api/overview")[1])
    assert overview["admin"] is True and overview["models"]["active"] == first
    assert json.loads(mod.request("GET", "/api/overview")[1])["admin"] is False


def test_a_new_password_or_signing_out_ends_sessions(desk):
    ana = desk.browser("mod-ana")
    stolen = ana.cookie
    desk.accounts.set_password("mod-ana", "another long password")
    assert ana.request("GET", "/api/queue/status")[0].status == 401
    bo = desk.browser("mod-bo")
    copy = desk.browser()
    copy.cookie = bo.cookie
    res, _ = bo.request("POST", "/signout", urlencode({"csrf": bo.csrf}).encode(),
                        {"Content-Type": "application/x-www-form-urlencoded"})
    assert res.status == 303 and "Max-Age=0" in res.getheader("set-cookie")
    assert copy.request("GET", "/api/queue/status")[0].status == 401  # a copied cookie is dead too
    thief = desk.browser()
    thief.cookie = stolen
    assert thief.request("GET", "/queue")[0].status == 303


def test_the_queue_page_filters_and_pages(redis_server):
    d = Desk(redis_server.url, page_size=2)
    hold(d.client, 5)
    d.client.hset(d.keys.text("c4"), mapping={"site": "other.example", "score": "0.95"})
    with d.server:
        b = d.browser("mod-ana")
        page = b.request("GET", "/queue?view=list")[1].decode()
        assert page.count('class="row ') == 2 and "page 1 of 3" in page
        page = b.request("GET", "/queue?view=list&page=3")[1].decode()
        assert page.count('class="row ') == 1
        page = b.request("GET", "/queue?view=list&site=other.example")[1].decode()
        assert 'data-ids="c4"' in page and page.count('class="row ') == 1
        page = b.request("GET", "/queue?view=list&min=0.9")[1].decode()
        assert re.findall(r'data-ids="([^"]+)"', page) == ["c4"]
        page = b.request("GET", "/queue?view=list&q=number+3")[1].decode()
        assert re.findall(r'data-ids="([^"]+)"', page) == ["c3"]
        page = b.request("GET", "/queue?view=list&order=oldest")[1].decode()
        assert re.findall(r'data-ids="([^"]+)"', page) == ["c0", "c1"]
    d.client.close()
