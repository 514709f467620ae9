"""The console's web application (Starlette + Jinja2, served by uvicorn).

:func:`build_app` wires a :class:`Console` (state and handlers) into a
Starlette app with two pure-ASGI layers around it: a Host check (the console
answers only to loopback names and ``console.allowed_hosts``, which stops DNS
rebinding) and a layer that puts the security headers on every response,
among them a Content-Security-Policy that allows scripts, styles and
connections from the console itself only (no inline script or style).

Every state-changing request is a POST that must carry the session's CSRF
token (``X-Seawall-CSRF`` header for the JSON API, a ``csrf`` form field for
the sign-in and sign-out forms) and, when the browser sends one, an
``Origin`` (else ``Referer``) of the console's own host.  The JSON API also
requires ``Content-Type: application/json``, which a cross-site form cannot
send.  Redis work runs in Starlette's thread pool with the same synchronous
helpers the CLI uses (:mod:`worker.holdqueue`, :mod:`worker.decisions`).
"""
from __future__ import annotations

import gc
import json
import logging
import threading
import time
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import parse_qs, quote, urlsplit

from jinja2 import Environment, PackageLoader, select_autoescape
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import HTMLResponse, JSONResponse, PlainTextResponse, RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles

from model.actions import Action
from ops.console import sessions
from ops.console.accounts import Account, Accounts
from ops.console.overview import collect_overview
from ops.console.queue import (
    EXAMPLES, PREVIEW_CHARS, REASONS_SHOWN, Families, Group, Highlighter, apply_filters, campaigns_by_family,
    group_label, group_rows, infer_rule, parse_filters, render_body, utc, visible,
)
from ops.registry import Registry, RegistryError
from ops.watchview import age
from worker import decisions
from worker.campaignstore import read_campaigns
from worker.holdqueue import HeldComment, held_count, newest_held_at, read_held
from worker.routing import parse_site_overrides

log = logging.getLogger("seawall.console")

STATIC = Path(__file__).parent / "static"
CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
       "font-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
SECURITY_HEADERS = [
    (b"content-security-policy", CSP.encode()),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"same-origin"),
    (b"x-frame-options", b"DENY"),
    (b"cross-origin-opener-policy", b"same-origin"),
    (b"cross-origin-resource-policy", b"same-origin"),
    (b"permissions-policy", b"camera=(), microphone=(), geolocation=(), payment=()"),
]
LOOPBACK_NAMES = frozenset({"127.0.0.1", "localhost", "::1", "[::1]"})
CSRF_HEADER = "x-seawall-csrf"
MAX_JSON_BYTES = 2 * 2**20
MAX_FORM_BYTES = 16 * 1024
FINALIZE_EVERY_S = 0.25
OVERVIEW_CACHE_S = 1.0
FAMILIES_IN_OVERVIEW = 5
OVERVIEW_SCAN = 1000
BODIES_KEPT = 20_000  # rendered comment bodies kept between page loads


class HostCheck:
    """Answers 421 to a request whose Host header is not one of the console's names (pure ASGI)."""

    def __init__(self, app, *, allowed: frozenset[str]):
        self.app = app
        self.allowed = allowed

    async def __call__(self, scope, receive, send):
        if scope["type"] == "http":
            host = dict(scope["headers"]).get(b"host", b"").decode("latin-1")
            if host_name(host) not in self.allowed:
                response = PlainTextResponse("unknown host name; add it to console.allowed_hosts", status_code=421)
                await response(scope, receive, _with_headers(send, static=False))
                return
        await self.app(scope, receive, send)


class SecurityHeaders:
    """Adds the CSP and the other security headers to every response (pure ASGI)."""

    def __init__(self, app):
        self.app = app

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        await self.app(scope, receive, _with_headers(send, static=scope["path"].startswith("/static/")))


def _with_headers(send, *, static: bool):
    async def sending(message):
        if message["type"] == "http.response.start":
            headers = list(message.get("headers", [])) + SECURITY_HEADERS
            if not static:
                headers.append((b"cache-control", b"no-store"))
            message = dict(message, headers=headers)
        await send(message)
    return sending


def host_name(host: str) -> str:
    """The name part of a Host header value (``[::1]:9320`` -> ``[::1]``, ``a.example:80`` -> ``a.example``)."""
    host = host.strip().lower()
    if host.startswith("["):
        return host[: host.find("]") + 1] if "]" in host else host
    return host.rpartition(":")[0] if host.count(":") == 1 else host


def same_origin(request: Request) -> bool:
    """No cross-site sender: the Origin (else Referer) header, when present, names this very host."""
    host = request.headers.get("host", "")
    origin = request.headers.get("origin")
    if origin is not None:
        return origin != "null" and urlsplit(origin).netloc == host
    referer = request.headers.get("referer")
    if referer is not None:
        return urlsplit(referer).netloc == host
    return True  # neither header: the CSRF token alone decides


def safe_next(target: str | None) -> str:
    """A local path to return to after signing in; anything else goes to the queue."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/queue"
    return target


@dataclass
class Seen:
    """What a request's session resolved to."""

    session: sessions.Session | None
    account: Account | None


class Console:
    """State and request handlers of one console process.

    Parameters
    ----------
    client : a Redis client (bytes replies), shared by the thread pool.
    config : the process's :class:`ops.config.Config`.
    accounts : the account store (tests pass one with a low scrypt cost).
    clock : epoch seconds; the demo passes its story's clock.
    """

    def __init__(self, *, client, config, accounts: Accounts | None = None, clock=time.time):
        self.client = client
        self.config = config
        self.keys = config.keys
        self.settings = config.console
        self.clock = clock
        self.accounts = accounts or Accounts(client=client, keys=config.keys, attempts=config.console.signin_attempts)
        self.secret = self.accounts.session_secret()
        self.env = Environment(loader=PackageLoader("ops.console", "templates"),
                               autoescape=select_autoescape(["html"], default_for_string=True, default=True),
                               trim_blocks=True, lstrip_blocks=True)
        self.highlighter = Highlighter()
        self.families = Families(tokenizer=self.highlighter.tokenizer)
        self.site_holds = {site: o[Action.HOLD] for site, o in parse_site_overrides(config.worker.site_thresholds).items()
                           if Action.HOLD in o}
        self._registry = Registry(client=client, keys=config.keys, clock=clock)
        self._model_holds: dict[str, float | None] = {}
        self._macros = self.env.get_template("_comment.html").module
        self._bodies: dict[tuple, object] = {}
        self._metas: dict[tuple, object] = {}
        self._families_lock = threading.Lock()
        self._overview: tuple[float, dict] | None = None
        self._stop = threading.Event()
        self._finalizer: threading.Thread | None = None
        self.warmed = threading.Event()

    # -- the finalizer ------------------------------------------------------------------
    def start(self) -> None:
        """In a background thread: prepare the newest held comments, then write decisions whose undo window is over."""
        self._stop.clear()
        self._finalizer = threading.Thread(target=self._finalize_loop, name="seawall-console-finalize", daemon=True)
        self._finalizer.start()

    def stop(self) -> None:
        """Stop the background thread, then wait out the undo windows still running (at most ``undo_s``) and
        write those decisions, so that a clean stop leaves none pending."""
        self._stop.set()
        if self._finalizer is not None:
            self._finalizer.join(timeout=10)
        deadline = time.monotonic() + self.settings.undo_s + 1.0
        try:
            while True:
                decisions.finalize_due(self.client, self.keys, now=self.clock())
                if decisions.pending_count(self.client, self.keys) == 0 or time.monotonic() > deadline:
                    return
                time.sleep(FINALIZE_EVERY_S)
        except Exception as exc:  # noqa: BLE001 - shutting down: report, never raise
            log.warning("console: could not finalize decisions at shutdown (%s); the next console start "
                        "writes them", type(exc).__name__)

    def warm(self) -> None:
        """Render the newest held comments once, so the first page after a start does not pay for every one of
        them (later pages only render the comments held since)."""
        try:
            self.queue_html({"view": "list"}, account=None, csrf="")
        except Exception as exc:  # noqa: BLE001 - only a head start: a page load does the same work
            log.warning("console: could not prepare the hold queue (%s)", type(exc).__name__)
        finally:
            # What exists now (modules, the web stack, the prepared comments) lives as long as the process:
            # keep it out of the cycle collector's full passes, which otherwise stall a page now and then.
            gc.freeze()
            self.warmed.set()

    def _finalize_loop(self) -> None:
        self.warm()
        delay = FINALIZE_EVERY_S
        while not self._stop.wait(delay):
            try:
                decisions.finalize_due(self.client, self.keys, now=self.clock())
                delay = FINALIZE_EVERY_S
            except Exception as exc:  # noqa: BLE001 - Redis down or slow: back off and keep going
                delay = min(10.0, delay * 2)
                log.warning("console: finalizing decisions failed (%s); retrying in %.1fs", type(exc).__name__, delay)

    # -- sessions ---------------------------------------------------------------------
    def _cookie_session(self, request: Request) -> sessions.Session | None:
        return sessions.decode(request.cookies.get(sessions.COOKIE), self.secret, now=self.clock(),
                               max_age_s=self.settings.session_hours * 3600)

    def _seen(self, request: Request) -> Seen:
        """The session and, if it is signed in and still valid, its account (one Redis read)."""
        session = self._cookie_session(request)
        if session is None or not session.signed_in:
            return Seen(session, None)
        account = self.accounts.get(session.user)
        if account is None or account.epoch != session.epoch:
            return Seen(session, None)
        return Seen(session, account)

    def _set_session(self, response: Response, session: sessions.Session) -> None:
        max_age = self.settings.session_hours * 3600
        response.headers.append("set-cookie", sessions.cookie_header(sessions.encode(session, self.secret),
                                                                    max_age_s=max_age,
                                                                    secure=self.settings.secure_cookies))

    def _render(self, name: str, status_code: int = 200, **context) -> HTMLResponse:
        html = self.env.get_template(name).render(**context)
        return HTMLResponse(html, status_code=status_code)

    @staticmethod
    def _refuse(status: int, message: str) -> JSONResponse:
        return JSONResponse({"error": message}, status_code=status)

    async def _json_body(self, request: Request) -> dict | JSONResponse:
        if request.headers.get("content-type", "").split(";")[0].strip().lower() != "application/json":
            return self._refuse(415, "send JSON (Content-Type: application/json)")
        body = await _read_limited(request, MAX_JSON_BYTES)
        if body is None:
            return self._refuse(413, "request too large")
        try:
            data = json.loads(body or b"{}")
        except ValueError:
            return self._refuse(400, "the request body is not JSON")
        return data if isinstance(data, dict) else self._refuse(400, "send a JSON object")

    async def _form_call(self, request: Request, handler) -> Response:
        """Read a small urlencoded form (first value of each field), then run ``handler(request, form)``."""
        body = await _read_limited(request, MAX_FORM_BYTES)
        form = {k: v[0] for k, v in parse_qs((body or b"").decode("utf-8", "replace")).items()}
        return await run_in_threadpool(handler, request, form)

    async def _json_call(self, request: Request, handler, *args, admin: bool = False) -> Response:
        """Read a JSON body (or refuse it); then, in the thread pool, the API guard and ``handler(request, body, seen, *args)``."""
        body = await self._json_body(request)
        if isinstance(body, Response):
            return body

        def guarded() -> Response:
            seen = self._api_guard(request, admin=admin)
            return handler(request, body, seen, *args) if isinstance(seen, Seen) else seen
        return await run_in_threadpool(guarded)

    def _api_guard(self, request: Request, *, admin: bool = False) -> Seen | JSONResponse:
        """Session, account, role, origin and CSRF checks of a state-changing API call."""
        if not same_origin(request):
            return self._refuse(403, "cross-site request refused")
        seen = self._seen(request)
        if seen.account is None:
            return self._refuse(401, "not signed in, or the session has ended; sign in again")
        if not sessions.csrf_matches(seen.session, request.headers.get(CSRF_HEADER)):
            return self._refuse(403, "missing or wrong CSRF token; reload the page")
        if admin and not seen.account.is_admin:
            return self._refuse(403, "only an admin may do this")
        return seen

    # -- sign-in ----------------------------------------------------------------------
    def _signin_page(self, request: Request, *, error: str = "", status: int = 200) -> Response:
        session = self._cookie_session(request)
        fresh = session is None
        if fresh:
            session = sessions.new_session(now=self.clock())
        response = self._render("signin.html", status_code=status, csrf=session.csrf, error=error,
                                next=safe_next(request.query_params.get("next")))
        if fresh:
            self._set_session(response, session)
        return response

    async def signin(self, request: Request) -> Response:
        return await self._form_call(request, self._signin)

    def _signin(self, request: Request, form: dict) -> Response:
        session = self._cookie_session(request)
        if not same_origin(request) or not sessions.csrf_matches(session, form.get("csrf")):
            return PlainTextResponse("sign-in refused: the form is stale or came from another site; "
                                     "reload the sign-in page", status_code=403)
        name = form.get("name", "").strip().lower()
        account = self.accounts.authenticate(name, form.get("password", ""))
        now = self.clock()
        if account is None:
            decisions.write_audit(self.client, self.keys, "sign_in_failed", {"name": name[:64]}, now=now)
            return self._signin_page(request, error="That name and password do not match an account, or the account "
                                                    "is locked for a while after too many tries.", status=401)
        decisions.write_audit(self.client, self.keys, "sign_in", {"moderator": account.name, "role": account.role},
                              now=now)
        response = RedirectResponse(safe_next(form.get("next")), status_code=303)
        self._set_session(response, sessions.new_session(account.name, epoch=account.epoch, now=now))
        return response

    async def signout(self, request: Request) -> Response:
        return await self._form_call(request, self._signout)

    def _signout(self, request: Request, form: dict) -> Response:
        seen = self._seen(request)
        if not same_origin(request) or not sessions.csrf_matches(seen.session, form.get("csrf")):
            return PlainTextResponse("sign-out refused: reload the page and try again", status_code=403)
        if seen.account is not None:
            self.accounts.end_sessions(seen.account.name)  # every copy of the cookie stops working
            decisions.write_audit(self.client, self.keys, "sign_out", {"moderator": seen.account.name},
                                  now=self.clock())
        response = RedirectResponse("/signin", status_code=303)
        response.headers.append("set-cookie", sessions.clear_cookie_header(secure=self.settings.secure_cookies))
        return response

    def _page_guard(self, request: Request) -> Seen | Response:
        seen = self._seen(request)
        if seen.account is None:
            target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
            return RedirectResponse(f"/signin?next={quote(target, safe='')}", status_code=303)
        return seen

    # -- the queue --------------------------------------------------------------------
    def _queue_page(self, request: Request) -> Response:
        seen = self._page_guard(request)
        if not isinstance(seen, Seen):
            return seen
        t0 = time.perf_counter()
        response = HTMLResponse(self.queue_html(request.query_params, account=seen.account, csrf=seen.session.csrf))
        # W3C Server Timing: what `seawall bench console` reads as the server-side time of the page
        response.headers["server-timing"] = f"queue;dur={(time.perf_counter() - t0) * 1000:.2f}"
        return response

    def queue_html(self, params, *, account: Account | None, csrf: str) -> str:
        """The queue page for these query parameters: read Redis, group, render."""
        return self.env.get_template("queue.html").render(
            account=account, csrf=csrf, page="queue", poll_s=self.settings.poll_s, undo_s=self.settings.undo_s,
            **self.queue_view(params))

    def queue_view(self, params) -> dict:
        """Everything the queue template shows for these query parameters."""
        filters = parse_filters(params)
        grouped = params.get("view", "families") != "list"
        order = params.get("order", "newest")
        order = order if order in ("newest", "oldest", "score") else "newest"
        try:
            page = max(1, min(10_000, int(params.get("page", "1"))))
        except ValueError:
            page = 1
        now = self.clock()
        total = held_count(self.client, self.keys)
        scanned = read_held(self.client, self.keys, limit=self.settings.scan_max, newest_first=order != "oldest")
        with self._families_lock:
            group_of = self.families.group_of(scanned)
        linked = campaigns_by_family(group_of, read_campaigns(self.client, self.keys))
        shown = apply_filters(scanned, filters, group_of)
        if order == "score":
            shown.sort(key=lambda c: -(c.score if c.score is not None else -1.0))
        rows = group_rows(shown, group_of) if grouped else [Group(key=c.id, kind="single", members=[c]) for c in shown]
        size = self.settings.page_size
        pages = max(1, -(-len(rows) // size))
        page = min(page, pages)
        visible_rows = rows[(page - 1) * size: page * size]
        groups = [g for g in group_rows(scanned, group_of) if g.kind != "single"]
        return {
            "rows": [self._row(g, now, group_of, linked) for g in visible_rows],
            "total": total, "scanned": len(scanned), "matching": len(shown), "row_count": len(rows),
            "families": sum(1 for r in rows if r.kind != "single"),
            "page_no": page, "pages": pages, "filters": filters, "grouped": grouped, "order": order,
            "sites": sorted({c.site for c in scanned}),
            "groups": [(g.key, group_label(g, linked.get(g.key))) for g in groups],
            "newest": newest_held_at(self.client, self.keys),
            "query": {k: v for k, v in params.items() if k != "page"},
        }

    def _model_hold(self, version: str) -> float | None:
        if version not in self._model_holds:
            raw = self.client.hget(self.keys.model_meta(version), Action.HOLD) if version else None
            try:
                self._model_holds[version] = float(raw) if raw else None
            except ValueError:
                self._model_holds[version] = None
        return self._model_holds[version]

    def _comment(self, c: HeldComment, now: float, campaign: str | None = None) -> dict:
        """One comment for the template: its escaped text and reasons (rendered once, kept), and its meta line."""
        key = (c.id, c.model, c.score, c.text is None, len(c.text or ""), c.reasons)
        body = self._bodies.get(key)
        if body is None:
            if len(self._bodies) >= BODIES_KEPT:
                self._bodies.clear()
            text = c.text
            long = text is not None and len(text) > PREVIEW_CHARS
            preview = text[:PREVIEW_CHARS] if long else text
            reasons = sorted(c.reasons, key=lambda r: -abs(r[1]))[:REASONS_SHOWN]
            body = self._bodies[key] = render_body(
                segments=self.highlighter.segments(preview, c.reasons) if text is not None else None,
                full=visible(text) if long else None, reasons=reasons, chars=len(text or ""))
        rule = infer_rule(c, model_hold=self._model_hold(c.model), site_hold=self.site_holds.get(c.site),
                          campaign=campaign)
        meta_key = (c.id, c.score, rule, c.site, c.author)
        meta = self._metas.get(meta_key)
        if meta is None:
            if len(self._metas) >= BODIES_KEPT:
                self._metas.clear()
            meta = self._metas[meta_key] = self._macros.meta(
                {"score": c.score, "rule": rule, "site": c.site, "author": c.author})
        return {"id": c.id, "body": body, "meta": meta, "age": age(now - c.held_at), "held_utc": utc(c.held_at)}

    def _row(self, group: Group, now: float, group_of: dict[str, str], linked: dict[str, str]) -> dict:
        members = sorted(group.members, key=lambda c: -c.held_at)
        campaign = linked.get(group_of.get(members[0].id, ""))
        row = {"key": group.key, "kind": "campaign" if campaign else group.kind, "size": group.size,
               "ids": " ".join(group.ids)}
        if group.kind == "single":
            row["comment"] = self._comment(members[0], now, campaign)
            return row
        span = group.score_range()
        row.update(examples=[self._comment(c, now, campaign) for c in members[:EXAMPLES]], sites=group.sites,
                   authors=group.authors, newest=age(now - group.newest), score_range=span,
                   label=campaign or group.key.partition(":")[2])
        return row

    def _queue_status(self, request: Request) -> Response:
        seen = self._seen(request)
        if seen.account is None:
            return self._refuse(401, "not signed in")
        return JSONResponse({"held": held_count(self.client, self.keys),
                             "deciding": decisions.pending_count(self.client, self.keys),
                             "newest": newest_held_at(self.client, self.keys), "now": self.clock()})

    # -- decisions --------------------------------------------------------------------
    async def decide(self, request: Request) -> Response:
        return await self._json_call(request, self._decide)

    def _decide(self, request: Request, body: dict, seen: Seen) -> Response:
        ids, action, reason = body.get("ids"), body.get("action"), body.get("reason", "")
        if not isinstance(ids, list) or not all(isinstance(i, str) for i in ids) or not isinstance(reason, str):
            return self._refuse(400, "send {\"ids\": [...], \"action\": \"publish\" or \"reject\"}")
        try:
            done = decisions.claim(self.client, self.keys, ids, action=action, moderator=seen.account.name,
                                   now=self.clock(), undo_s=self.settings.undo_s, reason=reason[:512])
        except ValueError as exc:
            return self._refuse(400, str(exc))
        if self.settings.undo_s == 0 and done.decided:
            decisions.finalize(self.client, self.keys, done.decided, now=done.final_at)
        return JSONResponse({"token": done.token, "action": done.action, "decided": done.decided, "gone": done.gone,
                             "final_at": done.final_at, "undo_s": self.settings.undo_s})

    async def undo(self, request: Request) -> Response:
        return await self._json_call(request, self._undo)

    def _undo(self, request: Request, body: dict, seen: Seen) -> Response:
        token, ids = body.get("token"), body.get("ids")
        if not isinstance(token, str) or not isinstance(ids, list) or not all(isinstance(i, str) for i in ids):
            return self._refuse(400, "send {\"token\": ..., \"ids\": [...]} from the decision")
        try:
            restored = decisions.undo(self.client, self.keys, token, ids, moderator=seen.account.name,
                                      now=self.clock())
        except ValueError as exc:
            return self._refuse(400, str(exc))
        kept = set(restored)
        return JSONResponse({"restored": restored, "final": [i for i in ids if i not in kept]})

    # -- the overview -----------------------------------------------------------------
    def _overview_page(self, request: Request) -> Response:
        seen = self._page_guard(request)
        if not isinstance(seen, Seen):
            return seen
        return self._render("overview.html", account=seen.account, csrf=seen.session.csrf, page="overview",
                            poll_s=self.settings.poll_s)

    def _overview_data(self, request: Request) -> Response:
        seen = self._seen(request)
        if seen.account is None:
            return self._refuse(401, "not signed in")
        data = dict(self.overview(), admin=seen.account.is_admin)
        return JSONResponse(data)

    def overview(self) -> dict:
        """The overview's figures, computed at most once a second however many pages poll."""
        now = self.clock()
        cached = self._overview
        if cached is not None and now - cached[0] < OVERVIEW_CACHE_S:
            return cached[1]
        data = collect_overview(self.client, self.keys, now=now, families=self._held_families(now))
        self._overview = (now, data)
        return data

    def _held_families(self, now: float) -> list[dict]:
        scanned = read_held(self.client, self.keys, limit=OVERVIEW_SCAN)
        with self._families_lock:
            group_of = self.families.group_of(scanned)
        out = []
        for g in group_rows(scanned, group_of):
            if g.kind == "single" or len(out) >= FAMILIES_IN_OVERVIEW:
                break
            example = max(g.members, key=lambda c: c.held_at)
            out.append({"key": g.key, "kind": g.kind, "size": g.size, "sites": g.sites, "authors": g.authors,
                        "newest": g.newest, "example": (example.text or "")[:280]})
        return out

    # -- models (admin) ---------------------------------------------------------------
    async def promote(self, request: Request) -> Response:
        return await self._json_call(request, self._switch, "promote", admin=True)

    async def rollback(self, request: Request) -> Response:
        return await self._json_call(request, self._switch, "rollback", admin=True)

    def _switch(self, request: Request, body: dict, seen: Seen, kind: str) -> Response:
        from ops.rescore import rescore_after_switch

        registry = self._registry
        actor = seen.account.name
        try:
            if kind == "promote":
                version = body.get("version")
                if not isinstance(version, str) or not version:
                    return self._refuse(400, "send {\"version\": ...}")
                result = registry.promote(version, actor=actor, reason="console")
            else:
                result = registry.rollback(actor=actor, reason="console")
        except RegistryError as exc:
            return self._refuse(409, str(exc))
        decisions.write_audit(self.client, self.keys, kind, {"moderator": actor, "version": result["version"],
                                                             "previous": result.get("previous") or ""},
                              now=self.clock())
        result = dict(result, **rescore_after_switch("now", self.client, self.config, result["version"]))
        self._overview = None
        return JSONResponse(result)

    async def root(self, request: Request) -> Response:
        return RedirectResponse("/queue", status_code=303)

    async def healthz(self, request: Request) -> Response:
        return PlainTextResponse("ok")


def _in_threads(handler):
    """A Starlette endpoint running ``handler(request)``, whose Redis calls block, in the thread pool."""
    async def endpoint(request: Request) -> Response:
        return await run_in_threadpool(handler, request)
    return endpoint


async def _read_limited(request: Request, limit: int) -> bytes | None:
    """The body, or None when it is longer than ``limit`` bytes (read no further than that)."""
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            return None
        chunks.append(chunk)
    return b"".join(chunks)


def build_app(console: Console, *, manage_finalizer: bool = True) -> Starlette:
    """The ASGI app: routes, static files, the Host check and the security headers."""
    @asynccontextmanager
    async def lifespan(app):
        if manage_finalizer:
            console.start()
        try:
            yield
        finally:
            if manage_finalizer:
                await run_in_threadpool(console.stop)

    routes = [
        Route("/", console.root),
        Route("/healthz", console.healthz),
        Route("/signin", _in_threads(console._signin_page), methods=["GET"]),
        Route("/signin", console.signin, methods=["POST"]),
        Route("/signout", console.signout, methods=["POST"]),
        Route("/queue", _in_threads(console._queue_page), methods=["GET"]),
        Route("/overview", _in_threads(console._overview_page), methods=["GET"]),
        Route("/api/queue/status", _in_threads(console._queue_status), methods=["GET"]),
        Route("/api/overview", _in_threads(console._overview_data), methods=["GET"]),
        Route("/api/decide", console.decide, methods=["POST"]),
        Route("/api/undo", console.undo, methods=["POST"]),
        Route("/api/models/promote", console.promote, methods=["POST"]),
        Route("/api/models/rollback", console.rollback, methods=["POST"]),
        Mount("/static", app=StaticFiles(directory=STATIC), name="static"),
    ]
    app = Starlette(routes=routes, lifespan=lifespan)
    bound = console.settings.host.lower()
    allowed = frozenset(LOOPBACK_NAMES | {h.lower() for h in console.settings.allowed_hosts}
                        | ({bound} if bound not in ("0.0.0.0", "::") else set()))
    return HostCheck(SecurityHeaders(app), allowed=allowed)


def serve(console: Console, *, host: str, port: int, on_ready=None) -> None:
    """Run the console with uvicorn until interrupted; access logs stay off (URLs may hold search words)."""
    import asyncio

    import uvicorn

    server = uvicorn.Server(uvicorn.Config(build_app(console), host=host, port=port, access_log=False,
                                           log_level="warning", lifespan="on", server_header=False))
    if on_ready is None:
        server.run()
        return

    async def main():
        task = asyncio.create_task(server.serve())
        while not server.started and not task.done():
            await asyncio.sleep(0.05)
        if server.started:
            on_ready(server)
        await task

    asyncio.run(main())
