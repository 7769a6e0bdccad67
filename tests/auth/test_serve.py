"""``leastwise serve`` beyond loopback: refused without tokens, started with one; TLS certificates.

Servers bind 0.0.0.0 on a free port, but the tests only ever connect to 127.0.0.1.
"""

from __future__ import annotations

import datetime
import ssl
import ipaddress
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from click.testing import CliRunner

from leastwise.cli import main

from tests.support.postgres import free_port
from tests.support.server import LeastwiseServer

ANY = "0.0.0.0"


def _serve_argv(host: str, db: str, *extra: str, port: str = "{port}") -> list[str]:
    return [sys.executable, "-m", "leastwise", "serve", "--host", host, "--port", port, "--database", db, *extra]


def _env(folder: Path) -> dict[str, str]:
    return LeastwiseServer("sqlite:///unused", workdir=folder).environment()


def _token(db: str, scope: str = "admin", label: str = "operator") -> str:
    r = CliRunner().invoke(main, ["token", "create", "--database", db, "--scope", scope, "--label", label])
    assert r.exit_code == 0, r.output
    return r.stdout.strip()


@pytest.mark.parametrize("existing", [False, True])
def test_non_loopback_without_tokens_refuses(tmp_path: Path, existing: bool):
    db_file = tmp_path / "leastwise.sqlite3"
    db = f"sqlite:///{db_file}"
    if existing:  # a database with only a revoked token
        r = CliRunner().invoke(main, ["token", "create", "--database", db, "--scope", "read"])
        CliRunner().invoke(main, ["token", "revoke", "--database", db, "1"])
        assert r.exit_code == 0
    port = str(free_port())
    proc = subprocess.run(_serve_argv(ANY, db, port=port), env=_env(tmp_path), cwd=tmp_path, capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode != 0
    assert "loopback" in proc.stderr and "leastwise token create" in proc.stderr and "--scope admin" in proc.stderr
    assert db_file.exists() is existing  # the check never creates a database


def test_non_loopback_with_a_token_starts(server_factory, tmp_path: Path):
    db = f"sqlite:///{tmp_path / 'lw.sqlite3'}"
    admin = _token(db)
    server = server_factory(db, command=_serve_argv(ANY, "{database}"))  # connects via 127.0.0.1
    with server.client() as http:
        assert http.get("/healthz").json() == {"status": "ok"}
        assert http.get("/v1/models").status_code == 401
        auth = {"Authorization": f"Bearer {admin}"}
        assert http.get("/v1/models", headers=auth).json() == {"models": []}
        assert http.put("/v1/models/m-1", json={"features": ["a"]}, headers=auth).status_code == 201
        # revoking the last token does not open a service bound beyond loopback
        tid = http.get("/v1/tokens", headers=auth).json()["tokens"][0]["id"]
        assert http.delete(f"/v1/tokens/{tid}", headers=auth).status_code == 204
        r = http.get("/v1/models")
        assert r.status_code == 401 and "token create" in r.json()["detail"]


def _self_signed(folder: Path) -> tuple[Path, Path]:
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")])
    now = datetime.datetime.now(datetime.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), False)
            .sign(key, hashes.SHA256()))
    cert_path, key_path = folder / "cert.pem", folder / "key.pem"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    return cert_path, key_path


def test_tls_certificate_options(tmp_path: Path):
    pytest.importorskip("cryptography")
    cert, key = _self_signed(tmp_path)
    port = free_port()
    argv = _serve_argv("127.0.0.1", f"sqlite:///{tmp_path / 'tls.sqlite3'}", "--tls-cert", str(cert),
                       "--tls-key", str(key), port=str(port))
    log = open(tmp_path / "tls.log", "wb")
    proc = subprocess.Popen(argv, env=_env(tmp_path), cwd=tmp_path, stdout=log, stderr=subprocess.STDOUT,
                            start_new_session=True)
    try:
        deadline = time.monotonic() + 30
        with httpx.Client(verify=ssl.create_default_context(cafile=str(cert)), trust_env=False, timeout=2.0) as http:
            while True:
                assert proc.poll() is None, (tmp_path / "tls.log").read_text()
                try:
                    r = http.get(f"https://127.0.0.1:{port}/healthz")
                    break
                except httpx.HTTPError:
                    assert time.monotonic() < deadline, (tmp_path / "tls.log").read_text()
                    time.sleep(0.1)
            assert r.json() == {"status": "ok"}
        with httpx.Client(trust_env=False, timeout=2.0) as plain:  # plain HTTP is not answered
            with pytest.raises(httpx.HTTPError):
                plain.get(f"http://127.0.0.1:{port}/healthz")
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


def test_tls_needs_both_files(tmp_path: Path):
    r = CliRunner().invoke(main, ["serve", "--database", f"sqlite:///{tmp_path / 'x.sqlite3'}", "--tls-cert", "c.pem"])
    assert r.exit_code != 0 and "--tls-key" in r.output
