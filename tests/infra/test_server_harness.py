"""The server harness itself: start, health wait, kill, restart, reaping, errors.

Runs against a stand-in HTTP server (stdlib only), so it does not depend on the
real service; tests of the service use ``server_factory`` without ``command``.
"""

from __future__ import annotations

import os
import sys
import textwrap

import httpx
import pytest

from tests.support.server import LeastwiseServer, ServerStartError

STAND_IN = textwrap.dedent(
    """
    import http.server, os, sys
    port = int(sys.argv[1]); database = sys.argv[2]
    if os.environ.get("STAND_IN_FAIL"):
        print("stand-in: refusing to start", file=sys.stderr, flush=True)
        sys.exit(3)
    class H(http.server.BaseHTTPRequestHandler):
        def do_GET(self):
            body = f"{os.getpid()} {database}".encode()
            self.send_response(200 if self.path in ("/healthz", "/pid") else 404)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)
        def log_message(self, *a):
            pass
    http.server.HTTPServer.allow_reuse_address = True
    http.server.HTTPServer(("127.0.0.1", port), H).serve_forever()
    """
)


@pytest.fixture
def stand_in(tmp_path):
    script = tmp_path / "stand_in.py"
    script.write_text(STAND_IN)
    return [sys.executable, str(script), "{port}", "{database}"]


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def test_start_kill_restart_same_port(server_factory, stand_in, sqlite_url):
    server = server_factory(sqlite_url, command=stand_in)
    first_pid = int(httpx.get(server.url + "/pid", trust_env=False).text.split()[0])
    assert first_pid == server.pid
    port = server.port

    assert server.kill() == -9
    assert not server.running and not _alive(first_pid)

    server.restart()
    assert server.port == port and server.running
    pid, database = httpx.get(server.url + "/pid", trust_env=False).text.split()
    assert int(pid) != first_pid and database == sqlite_url

    assert server.terminate() is not None
    assert not server.running


def test_start_failure_shows_output(server_factory, stand_in):
    with pytest.raises(ServerStartError, match="refusing to start"):
        server_factory(command=stand_in, env={"STAND_IN_FAIL": "1"}, startup_timeout=10)


def test_context_manager_reaps(tmp_path, stand_in):
    server = LeastwiseServer("sqlite://", command=stand_in, workdir=tmp_path / "w")
    with server:
        pid = server.pid
        assert _alive(pid)
    assert not _alive(pid)
