"""The console in a real browser: Debian's chromium driven by Playwright, against a real redis-server.

One module-scoped story: the invented Hedgerow Lane forum's demo hour plays through the real workers on a real
redis-server, with the simulated moderators leaving the last 25 minutes of the hold queue (the campaign's
near-duplicates, a few hundred of them; with so few labels the nightly retrain is refused), then comments of two strict sections, hostile comments and a second campaign still posting at the
end go through the worker too.  One browser serves every test; each test signs in with its own context.

The tests work the queue with the keyboard and the mouse, bulk-reject the campaign and undo it, and check the
feedback and decisions streams; they refuse unauthenticated, cross-site and script-injection attempts, watch the
overview update without a reload, and write a screenshot of the queue and of the overview
(``SEAWALL_SCREENSHOT_DIR=docs`` writes the README's).
"""
from __future__ import annotations

import http.server
import os
import shutil
import threading
import time
from pathlib import Path

import pytest
from playwright.sync_api import expect

from console_kit import (
    HOSTILE, HOSTILE_AUTHOR, HOSTILE_SITE, PWNED, SANDBOX, SITE_THRESHOLDS, STRICT_SECTIONS, hostile_comments,
    late_campaign_comments, strict_section_comments,
)
from model.classifier import EmbeddingClassifier
from kit import wait_until
from ops.bench.console import ConsoleThread, fill_queue
from ops.config import load_config
from ops.connection import connect
from ops.cusum import WaveParams
from ops.waves import GRACE_S, WaveDetector, wave_keys
from ops.console.accounts import Accounts
from ops.console.app import Console
from ops.lab.demo import DEMO_SETTINGS, demo_scenario, run_demo
from ops.serving import campaign_policy
from ops.registry import Registry
from ops.retrain import last_reports
from ops.lab.scenario import Scenario
from servers import RedisServer, free_port, require
from worker.campaignstore import read_campaigns
from worker.connection import connect as worker_connect

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]  # about a minute: a demo hour, then a browser

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"  # Debian's; Playwright downloads no browser here
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
PASSWORD = "hedgerow lane moderators"
UNDO_S = 1.5


class Story:
    """The module's world: Redis, the console on it, its clients, and where screenshots go."""

    def __init__(self, server: RedisServer, shots: Path):
        self.server = server
        self.shots = shots
        overrides = dict(DEMO_SETTINGS, redis_url=server.url)
        overrides.update({"console.undo_s": UNDO_S, "console.poll_s": 0.5,
                          "worker.site_thresholds": SITE_THRESHOLDS})
        self.config = load_config(overrides, environ={})
        self.keys = self.config.keys
        self.client = connect(self.config)

    def play(self) -> None:
        worker_client = worker_connect(self.server.url, socket_timeout=30.0)
        scenario = demo_scenario(self.config)
        run_demo(client=self.client, worker_client=worker_client, config=self.config, scenario=scenario,
                 leave_queue_at_min=35)
        worker_client.close()
        self.story_end = scenario.start_ts + scenario.duration_s
        registry = Registry(client=self.client, keys=self.keys, clock=lambda: self.story_end - 600)
        model = registry.load()
        self.retrain_decision = last_reports(self.client, self.keys)[0]["decision"]
        # a second version, pushed but never promoted: the admin's promote and roll back work on it
        history = Scenario(seed=7).training_set(600)
        spare = EmbeddingClassifier(seed=5, epochs=2).fit([c.text for c in history], [c.label for c in history])
        self.spare_version = registry.push(spare.to_bytes(), source="push")
        fill_queue(self.server.url, self.keys, hostile_comments(), model, site_thresholds=SITE_THRESHOLDS,
                   clock=lambda: self.story_end - 200)
        for i, comment in enumerate(strict_section_comments()):
            fill_queue(self.server.url, self.keys, [comment], model, site_thresholds=STRICT_SECTIONS,
                       clock=lambda i=i: self.story_end - 1500 + 50 * i)
        # the demo's campaign ran for half an hour and became its own history; a new one is still going when the
        # console opens, in the minute after the last one the demo's wave detector read, and the detector reads
        # it (as the monitor does every minute): the section it floods is in a wave
        cursor = int(self.client.get(wave_keys(self.keys)["cursor"]))
        late_ts = max(self.story_end - 120, (cursor + 1) * 60 + 1)
        fill_queue(self.server.url, self.keys, late_campaign_comments(), model,
                   policies=[campaign_policy(self.config, clock=lambda: late_ts)], clock=lambda: late_ts)
        read_at = (int(late_ts) // 60 + 1) * 60 + GRACE_S + 1
        WaveDetector(client=self.client, keys=self.keys, params=WaveParams.from_settings(self.config.waves),
                     sites=self.config.metrics.sites, clock=lambda: read_at).tick()
        self.console_now = max(self.story_end, read_at)
        bad = [{"id": "bad-1", "body": "the text under another name"}, {"id": "bad-2", "text": "   "},
               {"text": "no id"}, {"id": "bad-3", "text": "x", "a": "1", **{f"f{i}": "y" for i in range(20)}}]
        fill_queue(self.server.url, self.keys, bad, model, clock=lambda: self.story_end - 100)
        accounts = Accounts(client=self.client, keys=self.keys, cost=2**14)
        for name, role in (("mod-hazel", "moderator"), ("mod-idris", "moderator"), ("boss", "admin")):
            accounts.add(name, PASSWORD, role=role, now=time.time())
        offset = self.console_now - time.time()
        self.console = Console(client=self.client, config=self.config, accounts=accounts,
                               clock=lambda: time.time() + offset)

    # -- reading Redis -----------------------------------------------------------------------
    def held(self) -> set[str]:
        return {m.decode() for m in self.client.zrange(self.keys.held, 0, -1)}

    def entries(self, stream: str) -> list[dict[str, str]]:
        return [{k.decode(): v.decode() for k, v in f.items()} for _s, f in self.client.xrange(stream)]


@pytest.fixture(scope="module")
def story(tmp_path_factory):
    require(shutil.which("chromium") is not None, "chromium missing; apt-get install chromium chromium-driver")
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    shots = Path(os.environ.get("SEAWALL_SCREENSHOT_DIR") or tmp_path_factory.mktemp("shots"))
    server = RedisServer(tmp_path_factory.mktemp("redis")).start()
    try:
        s = Story(server, shots)
        s.play()
        with ConsoleThread(s.console) as web:
            s.base = f"http://127.0.0.1:{web.port}"
            yield s
        s.client.close()
    finally:
        server.stop()


@pytest.fixture(scope="module")
def browser(story):
    from playwright.sync_api import expect, sync_playwright

    expect.set_options(timeout=30_000)

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield b
        b.close()


class Session:
    """One signed-in moderator's browser context and page, with a record of CSP reports and navigations."""

    def __init__(self, browser, story: Story, name: str):
        self.context = browser.new_context(viewport={"width": 1280, "height": 900})
        self.page = self.context.new_page()
        self.page.set_default_timeout(20_000)
        self.problems: list[str] = []
        self.page.on("console", lambda m: self.problems.append(m.text) if "Content Security Policy" in m.text
                     or m.type == "error" and "404" not in m.text else None)
        self.page.on("pageerror", lambda e: self.problems.append(str(e)))
        self.story = story
        self.page.goto(f"{story.base}/queue")
        self.page.fill("input[name=name]", name)
        self.page.fill("input[name=password]", PASSWORD)
        self.page.click("button[type=submit]")
        self.page.wait_for_url("**/queue")

    def goto(self, path: str):
        self.page.goto(self.story.base + path)
        return self.page

    def close(self):
        self.context.close()


@pytest.fixture
def hazel(browser, story):
    s = Session(browser, story, "mod-hazel")
    yield s
    assert s.problems == [], s.problems  # no CSP violation, no script error on any page it saw
    s.close()


def row_ids(row) -> list[str]:
    return row.get_attribute("data-ids").split()


def test_sign_in_lands_on_the_queue_with_the_campaign_as_one_row(story, browser, hazel):
    page = hazel.page
    first = page.locator("#rows > li").first
    assert first.locator(".badge").text_content() == "campaign"  # the campaign the worker named
    assert first.locator(".cid").text_content().startswith("c")
    size = int(first.get_attribute("data-size"))
    assert size >= 100  # the soil-additive campaign: one row, a count and three examples
    assert first.locator(".examples > li").count() == 3
    assert first.locator("button[data-act=reject]").inner_text() == f"Reject all {size:,}"
    assert page.locator("mark.w-spam").count() > 0 and page.locator("mark.w-ham").count() > 0
    assert page.locator("#nav-held").inner_text() == f"{len(story.held()):,}"
    page.screenshot(path=str(story.shots / "console-queue.png"))
    boss = Session(browser, story, "boss")  # the overview as an admin sees it, while the campaign is still held
    try:
        boss.goto("/overview").wait_for_selector("#families li a")
        boss.page.screenshot(path=str(story.shots / "console-overview.png"), full_page=True)
        assert boss.problems == []
    finally:
        boss.close()


def test_the_keyboard_publishes_one_comment_and_the_site_is_told(story, hazel):
    page = hazel.goto("/queue?view=list&site=cycling")
    rows = page.locator("#rows > li")
    assert rows.count() >= 2
    target = row_ids(rows.nth(1))[0]
    page.keyboard.press("j")  # from the first row to the second
    assert "cursor" in rows.nth(1).get_attribute("class")
    page.keyboard.press("p")
    expect(page.locator("#toast-text")).to_have_text("Published 1 comment.")
    assert not rows.nth(1).is_visible()
    decision = wait_until(lambda: next((e for e in story.entries(story.keys.decisions) if e["id"] == target), None),
                          timeout=60, what="the decision on the decisions stream")
    assert (decision["decision"], decision["label"], decision["moderator"]) == ("publish", "ham", "mod-hazel")
    assert decision["site"] == "cycling" and decision["source"] == "console"
    labels = [f for f in story.entries(story.keys.feedback) if f["id"] == target]
    assert [(f["label"], f["moderator"]) for f in labels] == [("ham", "mod-hazel")]
    assert target not in story.held()


def test_bulk_reject_of_the_campaign_then_undo_then_for_good(story, hazel):
    page = hazel.page
    family = page.locator("#rows > li").first
    ids = row_ids(family)
    held_before = len(story.held())
    family.locator("button[data-act=reject]").click()
    expect(page.locator("#toast-text")).to_have_text(f"Rejected {len(ids)} comments.")
    assert story.held().isdisjoint(ids)
    page.keyboard.press("u")  # undo, while the countdown runs
    expect(page.locator("#toast-text")).to_contain_text("Undone")
    assert set(ids) <= story.held() and len(story.held()) == held_before
    assert family.is_visible()
    time.sleep(UNDO_S + 1)  # past the window: an undone decision must never be written
    written = ({e["id"] for e in story.entries(story.keys.decisions)}
               | {f["id"] for f in story.entries(story.keys.feedback)})
    assert written.isdisjoint(ids)

    page.keyboard.press("r")  # the cursor is back on the family row
    wait_until(lambda: set(ids) <= {e["id"] for e in story.entries(story.keys.decisions)},
               timeout=90, what="the family's decisions")
    decided = [e for e in story.entries(story.keys.decisions) if e["id"] in set(ids)]
    assert len(decided) == len(ids) and {(e["decision"], e["moderator"]) for e in decided} == {("reject", "mod-hazel")}
    labels = [f for f in story.entries(story.keys.feedback) if f["id"] in set(ids)]
    assert len(labels) == len(ids) and {f["label"] for f in labels} == {"spam"}
    assert story.held().isdisjoint(ids)
    audit = [a for a in story.entries(story.keys.audit) if a.get("id") in set(ids)]
    assert [a["event"] for a in audit].count("undo") == len(ids)


def test_a_selection_is_decided_in_one_go(story, hazel):
    page = hazel.goto("/queue?view=list&site=cycling")
    rows = page.locator("#rows > li")
    picked = [row_ids(rows.nth(0))[0], row_ids(rows.nth(2))[0]]
    page.keyboard.press("x")
    page.keyboard.press("j")
    page.keyboard.press("j")
    page.keyboard.press("x")
    assert page.locator("#bulkbar").is_visible() and page.locator("#picked").inner_text().startswith("2 selected")
    page.locator("#bulkbar button[data-bulk=reject]").click()
    expect(page.locator("#toast-text")).to_have_text("Rejected 2 comments.")
    wait_until(lambda: set(picked) <= {e["id"] for e in story.entries(story.keys.decisions)}, timeout=60,
               what="both decisions")


def test_hostile_comments_are_shown_as_text_and_run_nothing(story, hazel):
    page = hazel.goto(f"/queue?view=list&site={SANDBOX}")
    assert page.locator("#rows > li").count() == len(HOSTILE)
    assert page.evaluate(f"typeof window.{PWNED}") == "undefined"
    assert page.locator(".text script, .text img, .text a, .why a, .meta a, [onerror], [onmouseover]").count() == 0
    assert page.locator("a[href^='javascript:' i]").count() == 0
    body = page.locator("#rows").inner_text()
    assert f"<script>window.{PWNED} = 1</script>" in body and "javascript:window" in body
    assert HOSTILE_AUTHOR in body  # the author, as text
    assert HOSTILE_SITE in page.locator("select[name=site]").inner_text()  # a site name, as text
    assert "\u202e" not in body and "\u2066" not in body  # direction controls are shown as badges instead
    assert page.locator(".ctl", has_text="U+202E").count() == 1
    long_row = page.locator("#rows > li", has=page.locator("details.full"))
    long_row.locator("summary").click()
    full = long_row.locator("details.full .text").inner_text()
    assert len(full) >= 65_000 and full.startswith("Our allotment diary")
    page.screenshot(path=str(story.shots / "console-hostile.png"))


def test_the_second_moderator_sees_the_comment_is_gone(story, browser, hazel):
    idris = Session(browser, story, "mod-idris")
    try:
        path = "/queue?view=list&site=events"
        hazel.goto(path)
        other = idris.goto(path)
        row = hazel.page.locator("#rows > li").first
        target = row_ids(row)[0]
        row.locator("button[data-act=publish]").click()
        hazel.page.wait_for_selector("#toast:not([hidden])")
        other.locator(f"#rows > li[data-ids='{target}'] button[data-act=reject]").click()
        expect(other.locator("#toast-text")).to_have_text(
            "Rejected 0 comments. 1 had already been decided by someone else.")
        wait_until(lambda: any(e["id"] == target for e in story.entries(story.keys.decisions)), timeout=60,
                   what="the decision")
        time.sleep(UNDO_S + 0.5)
        assert [(f["label"], f["moderator"]) for f in story.entries(story.keys.feedback) if f["id"] == target] == [
            ("ham", "mod-hazel")]
        assert idris.problems == []
    finally:
        idris.close()


def test_the_queue_notices_newly_held_comments_without_a_reload(story, hazel):
    page = hazel.goto("/queue?view=list")
    navigations = []
    page.on("framenavigated", lambda frame: navigations.append(frame.url))
    count = page.locator("#held-count").inner_text()
    assert page.locator("#fresh").is_hidden()
    model = Registry(client=story.client, keys=story.keys).load()
    fill_queue(story.server.url, story.keys, [{"id": "x-late", "text": "a late note for the sandbox", "site": SANDBOX}],
               model, site_thresholds=SITE_THRESHOLDS, clock=lambda: story.console_now)
    expect(page.locator("#fresh")).to_be_visible()
    expect(page.locator("#held-count")).not_to_have_text(count)
    assert navigations == []


class _Attacker(http.server.BaseHTTPRequestHandler):
    """Another site on this machine whose page tries to make a signed-in moderator's browser decide."""

    target = ""
    victim = ""

    def do_GET(self):  # noqa: N802 - the stdlib's name
        body = f"""<!doctype html><title>free seeds</title>
<form id=f method=post action="{self.target}/api/decide" enctype="text/plain">
<input name='{{"ids":["{self.victim}"],"action":"reject","x":"' value='"}}'></form>
<script>
fetch("{self.target}/api/decide", {{method: "POST", mode: "no-cors", credentials: "include",
  headers: {{"Content-Type": "text/plain"}}, body: JSON.stringify({{ids: ["{self.victim}"], action: "reject"}})}})
  .finally(function () {{ document.getElementById("f").submit(); }});
</script>""".encode()
        self.send_response(200)
        self.send_header("Content-Type", "text/html; charset=utf-8")
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args):
        pass


def test_unauthenticated_and_cross_site_attempts_are_refused(story, browser, hazel):
    stranger = browser.new_context()
    page = stranger.new_page()
    page.goto(f"{story.base}/queue")
    assert page.url.startswith(f"{story.base}/signin") and page.locator("input[name=password]").count() == 1
    stranger.close()

    victim = sorted(story.held())[0]
    _Attacker.target, _Attacker.victim = story.base, victim
    port = free_port()
    evil = http.server.ThreadingHTTPServer(("127.0.0.1", port), _Attacker)
    threading.Thread(target=evil.serve_forever, daemon=True).start()
    try:
        page = hazel.page
        page.goto(f"http://127.0.0.1:{port}/")
        page.wait_for_url(f"{story.base}/api/decide")  # the form posted, and the console answered
        assert "cross-site request refused" in page.content() or "JSON" in page.content()
    finally:
        evil.shutdown()
    time.sleep(UNDO_S + 0.5)
    assert victim in story.held() and story.client.zscore(story.keys.deciding, victim) is None
    hazel.problems.clear()  # the refused request's error page is the attacker's doing


def test_the_overview_updates_live_and_only_admins_switch_models(story, browser, hazel):
    boss = Session(browser, story, "boss")
    try:
        page = boss.goto("/overview")
        navigations = []
        page.on("framenavigated", lambda frame: navigations.append(frame.url))
        page.wait_for_selector("#chart svg path.line")
        assert page.locator("#chart svg path.line").count() == page.locator("#legend li").count() >= 4
        assert page.locator("#legend .wave").count() >= 1  # the campaign's sections are in a wave
        assert page.locator("#waves li.hot").count() >= 1
        assert page.locator("#campaigns li.hot").count() == len(read_campaigns(story.client, story.keys)) >= 1
        expect(page.locator("#last-retrain")).to_contain_text("Last retrain: ")  # the nightly retrain's outcome
        assert story.retrain_decision in page.locator("#last-retrain").text_content()
        assert page.locator("#dead tbody tr").count() == 4  # missing_text, empty_text, missing_id, too_many_fields
        held_tile = page.locator("#t-held")
        before = held_tile.inner_text()

        hazel_page = hazel.goto("/queue?view=list&site=events")
        hazel_page.locator("#rows > li").first.locator("button[data-act=reject]").click()
        hazel_page.wait_for_selector("#toast:not([hidden])")
        expect(held_tile).not_to_have_text(before)
        assert navigations == []  # the figure changed with no reload

        # a moderator sees no model switches; the admin rolls back and promotes again
        mod_page = hazel.goto("/overview")
        mod_page.wait_for_selector("#models tbody tr")
        assert mod_page.locator("#models button, #rollback-box button").count() == 0
        registry = Registry(client=story.client, keys=story.keys)
        active = registry.active()
        page.on("dialog", lambda dialog: dialog.accept())
        page.locator("#models tbody tr", has_text=story.spare_version).locator("button").click()
        expect(page.locator("#model-message")).to_contain_text(f"{story.spare_version} is active")
        assert registry.active() == story.spare_version
        page.locator("#rollback-box button").click()
        expect(page.locator("#model-message")).to_contain_text(f"{active} is active")
        assert registry.active() == active
        assert boss.problems == []
    finally:
        boss.close()
