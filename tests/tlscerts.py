"""A throw-away certificate authority for TLS tests, made with the ``openssl`` command.

``make_ca(folder)`` writes a self-signed CA, a server certificate for
127.0.0.1 and a client certificate, both signed by it, plus a second,
unrelated CA (a certificate signed by it must be refused).  EC P-256 keys
keep it fast.
"""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

from servers import require


def _openssl(*args, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def _ca(name: str, cwd: Path) -> None:
    _openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes", "-days", "1",
             "-subj", f"/CN={name}", "-keyout", f"{name}.key", "-out", f"{name}.crt", cwd=cwd)


def _signed(name: str, ca: str, cwd: Path) -> None:
    _openssl("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes", "-subj", f"/CN={name}",
             "-keyout", f"{name}.key", "-out", f"{name}.csr", cwd=cwd)
    _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", f"{ca}.crt", "-CAkey", f"{ca}.key", "-CAcreateserial",
             "-days", "1", "-extfile", "san.ext", "-out", f"{name}.crt", cwd=cwd)


def make_ca(folder) -> dict[str, str]:
    """Paths: ``ca``, ``cert``/``key`` (server), ``client_cert``/``client_key``, ``other_ca``."""
    require(shutil.which("openssl") is not None, "openssl command not on PATH")
    d = Path(folder)
    d.mkdir(parents=True, exist_ok=True)
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    _ca("test-ca", d)
    _ca("other-ca", d)
    _signed("server", "test-ca", d)
    _signed("client", "test-ca", d)
    return {"ca": str(d / "test-ca.crt"), "cert": str(d / "server.crt"), "key": str(d / "server.key"),
            "client_cert": str(d / "client.crt"), "client_key": str(d / "client.key"),
            "other_ca": str(d / "other-ca.crt")}
