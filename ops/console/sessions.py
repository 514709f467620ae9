"""Signed session cookies and the CSRF token they carry (pure functions, no I/O).

A session is a small JSON object, ``{"u": account, "e": epoch, "c": csrf
token, "t": issued at}``, base64url-encoded and signed with HMAC-SHA256 under
the deployment's session secret.  Nothing in it is secret from its holder:
the signature only stops anyone from making or changing one.  A visitor who
has not signed in gets a session with an empty account, so the sign-in form
has a CSRF token too.

The cookie is ``HttpOnly`` (scripts cannot read it), ``SameSite=Strict`` (a
browser does not send it with requests started by another site) and
``Secure`` when the console is served over https.
"""
from __future__ import annotations

import base64
import hashlib
import hmac
import json
import secrets
from dataclasses import dataclass

COOKIE = "seawall_console"
_CONTEXT = b"seawall-console-session\x00"
MAX_COOKIE_CHARS = 1024


@dataclass(frozen=True)
class Session:
    user: str
    epoch: int
    csrf: str
    issued: float

    @property
    def signed_in(self) -> bool:
        return bool(self.user)


def new_session(user: str = "", *, epoch: int = 0, now: float) -> Session:
    """A fresh session with a new CSRF token (sign-in rotates it)."""
    return Session(user=user, epoch=epoch, csrf=secrets.token_urlsafe(24), issued=round(float(now), 3))


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode()


def _unb64(text: str) -> bytes:
    return base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))


def encode(session: Session, secret: bytes) -> str:
    body = _b64(json.dumps({"u": session.user, "e": session.epoch, "c": session.csrf, "t": session.issued},
                           separators=(",", ":")).encode())
    mac = hmac.new(secret, _CONTEXT + body.encode(), hashlib.sha256).digest()
    return f"{body}.{_b64(mac)}"


def decode(value: str | None, secret: bytes, *, now: float, max_age_s: float) -> Session | None:
    """The session in a cookie value, or None if it is missing, forged, malformed or older than ``max_age_s``."""
    if not value or len(value) > MAX_COOKIE_CHARS or value.count(".") != 1:
        return None
    body, mac = value.split(".")
    try:
        expected = hmac.new(secret, _CONTEXT + body.encode(), hashlib.sha256).digest()
        if not hmac.compare_digest(_unb64(mac), expected):
            return None
        data = json.loads(_unb64(body))
        session = Session(user=str(data["u"]), epoch=int(data["e"]), csrf=str(data["c"]), issued=float(data["t"]))
    except (ValueError, KeyError, TypeError, UnicodeError):
        return None
    if not session.csrf or not 0 <= now - session.issued <= max_age_s:
        return None
    return session


def cookie_header(value: str, *, max_age_s: float, secure: bool) -> str:
    """The ``Set-Cookie`` value for a session cookie."""
    parts = [f"{COOKIE}={value}", "Path=/", f"Max-Age={int(max_age_s)}", "HttpOnly", "SameSite=Strict"]
    if secure:
        parts.append("Secure")
    return "; ".join(parts)


def clear_cookie_header(*, secure: bool) -> str:
    parts = [f"{COOKIE}=", "Path=/", "Max-Age=0", "HttpOnly", "SameSite=Strict"]
    if secure:
        parts.append("Secure")
    return "; ".join(parts)


def csrf_matches(session: Session | None, token: str | None) -> bool:
    return bool(session and token and hmac.compare_digest(session.csrf.encode(), str(token).encode()))
