"""Console accounts: moderators and admins, with salted scrypt password hashes, in Redis.

Each account is one field of the ``console:accounts`` hash (name -> JSON):
``role`` (moderator|admin), ``salt`` and ``hash`` (base64), the scrypt
parameters ``n``, ``r``, ``p`` (kept per account so the cost can be raised
later without breaking old hashes), ``created_at`` and ``epoch``.  The epoch
goes up when the password changes, which signs out every session of the
account (sessions carry the epoch they were issued under).

The default cost, N = 2**17, r = 8, p = 1 (128 MiB, about a second here), is
the OWASP Password Storage Cheat Sheet's minimum for scrypt (quoted from
memory).  Sign-ins hash one at a time per process, so a burst of them cannot
take 128 MiB each at once.  After ``attempts`` failed sign-ins within 15
minutes an account refuses every password until the window has passed.
"""
from __future__ import annotations

import base64
import hashlib
import hmac
import json
import re
import secrets
import threading
from dataclasses import dataclass

import redis

from model.errors import SeawallError
from model.params import Rule, integer, set_params
from worker.settings import Keys

ROLES = ("moderator", "admin")
NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
MIN_PASSWORD_CHARS = 10
MAX_PASSWORD_BYTES = 1024
SCRYPT_N = 2**17
SCRYPT_R = 8
SCRYPT_P = 1
FAILURE_WINDOW_S = 900
_HASHING = threading.Semaphore(1)


# The constructor's parameters: (check, what the error says a good value is).
_PARAMS = {
    "cost": Rule(lambda v: integer(2**10, 2**30).test(v) and not v & (v - 1), "a power of two >= 1024"),
    "attempts": integer(1),
}


class AccountError(SeawallError):
    """An account operation cannot be done as asked; the message says why."""


@dataclass(frozen=True)
class Account:
    name: str
    role: str
    epoch: int
    created_at: float

    @property
    def is_admin(self) -> bool:
        return self.role == "admin"


def check_name(name) -> str:
    if not isinstance(name, str) or not NAME_RE.fullmatch(name):
        raise AccountError(f"console: account name {name!r} must be 1-64 characters of a-z, 0-9, '.', '_' or '-', "
                           "starting with a letter or digit")
    return name


def check_role(role) -> str:
    if role not in ROLES:
        raise AccountError(f"console: role must be one of {', '.join(ROLES)}, got {role!r}")
    return role


def check_password(password) -> str:
    if not isinstance(password, str) or len(password) < MIN_PASSWORD_CHARS:
        raise AccountError(f"console: a password needs at least {MIN_PASSWORD_CHARS} characters")
    if len(password.encode("utf-8", "surrogatepass")) > MAX_PASSWORD_BYTES:
        raise AccountError(f"console: a password may have at most {MAX_PASSWORD_BYTES} bytes")
    return password


def _scrypt(password: str, salt: bytes, n: int, r: int, p: int) -> bytes:
    with _HASHING:
        return hashlib.scrypt(password.encode("utf-8", "surrogatepass"), salt=salt, n=n, r=r, p=p,
                              maxmem=256 * n * r + 2**20, dklen=32)


def hash_password(password: str, *, n: int = SCRYPT_N, r: int = SCRYPT_R, p: int = SCRYPT_P,
                  salt: bytes | None = None) -> dict:
    """The stored form of a password: a fresh 16-byte salt, the scrypt digest and its parameters."""
    salt = secrets.token_bytes(16) if salt is None else salt
    digest = _scrypt(password, salt, n, r, p)
    return {"salt": base64.b64encode(salt).decode(), "hash": base64.b64encode(digest).decode(), "n": n, "r": r, "p": p}


def verify_password(password: str, record: dict) -> bool:
    """Whether ``password`` matches the stored record (constant-time comparison)."""
    try:
        salt = base64.b64decode(record["salt"])
        expected = base64.b64decode(record["hash"])
        n, r, p = int(record["n"]), int(record["r"]), int(record["p"])
    except (KeyError, ValueError, TypeError):
        return False
    if not isinstance(password, str) or len(password.encode("utf-8", "surrogatepass")) > MAX_PASSWORD_BYTES:
        return False
    return hmac.compare_digest(_scrypt(password, salt, n, r, p), expected)


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


class Accounts:
    """The console's accounts in Redis.

    Parameters
    ----------
    client : a Redis client.
    keys : the deployment's key names.
    cost : scrypt N for new passwords (a power of two); tests lower it.
    attempts : failed sign-ins within 15 minutes that lock an account for the rest of them.
    """

    def __init__(self, *, client, keys: Keys, cost: int = SCRYPT_N, attempts: int = 10):
        set_params(self, _PARAMS, locals())
        self.client = client
        self.keys = keys
        # Unknown names are checked against this throw-away hash, so a sign-in takes as long
        # whether the account exists or not.
        self._decoy = None

    def _failures_key(self, name: str) -> str:
        return self.keys.signin_failures(name)

    def _record(self, name: str) -> dict | None:
        raw = self.client.hget(self.keys.accounts, name)
        if raw is None:
            return None
        try:
            record = json.loads(raw)
        except ValueError:
            return None
        return record if isinstance(record, dict) else None

    @staticmethod
    def _account(name: str, record: dict) -> Account:
        return Account(name=name, role=record.get("role", "moderator"), epoch=int(record.get("epoch", 0)),
                       created_at=float(record.get("created_at", 0.0)))

    def get(self, name: str) -> Account | None:
        if not isinstance(name, str) or not NAME_RE.fullmatch(name):
            return None
        record = self._record(name)
        return self._account(name, record) if record is not None and record.get("role") in ROLES else None

    def list(self) -> list[Account]:
        out = []
        for k, v in self.client.hgetall(self.keys.accounts).items():
            try:
                record = json.loads(v)
            except ValueError:
                continue
            out.append(self._account(_s(k), record))
        return sorted(out, key=lambda a: a.name)

    def add(self, name: str, password: str, *, role: str, now: float) -> Account:
        check_name(name)
        check_role(role)
        check_password(password)
        record = dict(hash_password(password, n=self.cost), role=role, epoch=0, created_at=round(float(now), 3))
        if not self.client.hsetnx(self.keys.accounts, name, json.dumps(record, sort_keys=True)):
            raise AccountError(f"console: account {name!r} already exists; use `seawall console user passwd` "
                               "or remove it first")
        return self._account(name, record)

    def _update(self, name: str, change) -> Account:
        with self.client.pipeline(transaction=True) as pipe:
            while True:
                try:
                    pipe.watch(self.keys.accounts)
                    raw = pipe.hget(self.keys.accounts, name)
                    if raw is None:
                        raise AccountError(f"console: no account {name!r}; see `seawall console user list`")
                    record = change(json.loads(raw))
                    pipe.multi()
                    pipe.hset(self.keys.accounts, name, json.dumps(record, sort_keys=True))
                    pipe.execute()
                    return self._account(name, record)
                except redis.exceptions.WatchError:
                    continue

    def set_password(self, name: str, password: str) -> Account:
        """A new password; every session of the account ends (its epoch goes up)."""
        check_password(password)
        fresh = hash_password(password, n=self.cost)
        return self._update(name, lambda rec: dict(rec, **fresh, epoch=int(rec.get("epoch", 0)) + 1))

    def set_role(self, name: str, role: str) -> Account:
        check_role(role)
        return self._update(name, lambda rec: dict(rec, role=role, epoch=int(rec.get("epoch", 0)) + 1))

    def end_sessions(self, name: str) -> Account:
        """Sign the account out everywhere (a signed cookie cannot be recalled, so its epoch moves on)."""
        return self._update(name, lambda rec: dict(rec, epoch=int(rec.get("epoch", 0)) + 1))

    def remove(self, name: str) -> bool:
        return bool(self.client.hdel(self.keys.accounts, name))

    def locked(self, name: str) -> bool:
        count = self.client.get(self._failures_key(name))
        return count is not None and int(count) >= self.attempts

    def authenticate(self, name: str, password: str) -> Account | None:
        """The account when the password matches and the account is not locked, else None."""
        record = self._record(name) if isinstance(name, str) and NAME_RE.fullmatch(name) else None
        if record is None:
            if self._decoy is None:
                self._decoy = hash_password("not-a-password", n=self.cost)
            verify_password(password, self._decoy)
            return None
        if self.locked(name):
            return None
        if verify_password(password, record) and record.get("role") in ROLES:
            self.client.delete(self._failures_key(name))
            return self._account(name, record)
        pipe = self.client.pipeline(transaction=True)
        pipe.incr(self._failures_key(name))
        pipe.ttl(self._failures_key(name))
        _count, ttl = pipe.execute()
        if ttl is None or int(ttl) < 0:  # the first failure of a window starts it
            self.client.expire(self._failures_key(name), FAILURE_WINDOW_S)
        return None

    def session_secret(self) -> bytes:
        """The key that signs session cookies, made once per deployment and shared by every console process."""
        key = self.keys.session_secret
        self.client.set(key, secrets.token_bytes(32), nx=True)
        return bytes(self.client.get(key))
