"""Run a real ``leastwise serve`` process for end-to-end tests.

    server = LeastwiseServer(database="sqlite:////tmp/x/leastwise.sqlite3", workdir=tmp_path)
    server.start()                # waits for GET /healthz == 200
    httpx.get(server.url + "/v1/models")
    server.kill()                 # SIGKILL, like a power cut for the process
    server.restart()              # same port, same database
    server.terminate()            # SIGTERM, then SIGKILL after a grace period

The command is ``sys.executable -m leastwise serve --host H --port P --database URL``
(override with ``command=[...]``, a list whose items may use ``{host}``, ``{port}``
and ``{database}``). Output (stdout and stderr together) goes to a log file in
``workdir``; when the process dies during start-up, the error shows its tail.

Inherited ``LEASTWISE_*`` environment variables are removed so a developer's
shell does not change what the tests see; pass ``env={...}`` to set some.
"""

from __future__ import annotations

import atexit
import os
import signal
import subprocess
import sys
import tempfile
import time
import weakref
from collections.abc import Mapping, Sequence
from pathlib import Path

from .postgres import free_port

__all__ = ["LeastwiseServer", "ServerStartError", "reap_all"]

_LIVE: "weakref.WeakSet[LeastwiseServer]" = weakref.WeakSet()


def _source_roots() -> list[str]:
    """Folders holding the ``leastwise`` / ``leastwise_client`` the tests import.

    Put first on the server's PYTHONPATH, so the subprocess serves exactly the
    code the test process imports (editable install, plain install or a
    ``pythonpath`` setting alike).
    """
    import importlib.util
    import sysconfig

    # site-packages is on the subprocess's path anyway; putting it on PYTHONPATH
    # would move it ahead of the standard library
    skip = {str(Path(sysconfig.get_path(k)).resolve()) for k in ("purelib", "platlib")}
    roots: list[str] = []
    for name in ("leastwise", "leastwise_client"):
        try:
            spec = importlib.util.find_spec(name)
        except (ImportError, ValueError):
            spec = None
        if spec is None or not spec.submodule_search_locations:
            continue
        root = str(Path(list(spec.submodule_search_locations)[0]).resolve().parent)
        if root not in roots and root not in skip:
            roots.append(root)
    return roots


class ServerStartError(RuntimeError):
    """The server did not become healthy; the message carries its output."""


class LeastwiseServer:
    def __init__(
        self,
        database: str,
        *,
        host: str = "127.0.0.1",
        port: int | None = None,
        workdir: str | os.PathLike[str] | None = None,
        env: Mapping[str, str] | None = None,
        args: Sequence[str] = (),
        command: Sequence[str] | None = None,
        startup_timeout: float = 30.0,
        stop_timeout: float = 10.0,
    ):
        self.database = database
        self.host = host
        self._port_fixed = port is not None
        self.port = port if port is not None else free_port(host)
        self.workdir = Path(workdir) if workdir is not None else Path(tempfile.mkdtemp(prefix="leastwise-srv-"))
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.extra_env = dict(env or {})
        self.args = list(args)
        self.command = list(command) if command is not None else None
        self.startup_timeout = startup_timeout
        self.stop_timeout = stop_timeout
        self.log_path = self.workdir / f"server-{self.port}.log"
        self.process: subprocess.Popen[bytes] | None = None
        self.starts = 0
        self._log_offset = 0
        _LIVE.add(self)

    # -- what tests read -------------------------------------------------
    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    @property
    def pid(self) -> int | None:
        return self.process.pid if self.process is not None else None

    @property
    def running(self) -> bool:
        return self.process is not None and self.process.poll() is None

    @property
    def returncode(self) -> int | None:
        return self.process.poll() if self.process is not None else None

    def log_text(self, *, current_only: bool = False) -> str:
        """Everything the server printed (all starts, or only the current one)."""
        try:
            data = self.log_path.read_bytes()
        except OSError:
            return ""
        if current_only:
            data = data[self._log_offset :]
        return data.decode("utf-8", errors="replace")

    def client(self, **kwargs):
        """An ``httpx.Client`` with ``base_url`` set (ignores proxy variables)."""
        import httpx

        kwargs.setdefault("timeout", 10.0)
        kwargs.setdefault("trust_env", False)
        return httpx.Client(base_url=self.url, **kwargs)

    # -- lifecycle -------------------------------------------------------
    def argv(self) -> list[str]:
        if self.command is not None:
            fields = {"host": self.host, "port": str(self.port), "database": self.database}
            return [part.format(**fields) for part in self.command] + self.args
        return [
            sys.executable,
            "-m",
            "leastwise",
            "serve",
            "--host",
            self.host,
            "--port",
            str(self.port),
            "--database",
            self.database,
            *self.args,
        ]

    def environment(self) -> dict[str, str]:
        env = {k: v for k, v in os.environ.items() if not k.startswith("LEASTWISE_")}
        env["PYTHONUNBUFFERED"] = "1"
        roots = _source_roots()
        if roots:
            env["PYTHONPATH"] = os.pathsep.join(roots + [p for p in [env.get("PYTHONPATH")] if p])
        env.update(self.extra_env)
        return env

    def start(self) -> "LeastwiseServer":
        """Start and wait for ``/healthz``; on a first start, retry if the port was taken."""
        if self.running:
            raise RuntimeError(f"server already running (pid {self.pid})")
        attempts = 1 if (self._port_fixed or self.starts) else 3
        for attempt in range(attempts):
            try:
                self._spawn()
                self._wait_healthy()
                self.starts += 1
                return self
            except ServerStartError as exc:
                self._reap(signal.SIGKILL)
                lost_port = "address already in use" in str(exc).lower() or "errno 98" in str(exc).lower()
                if lost_port and attempt + 1 < attempts:
                    self.port = free_port(self.host)
                    continue
                raise
        raise AssertionError("unreachable")

    def _spawn(self) -> None:
        argv = self.argv()
        with open(self.log_path, "ab") as log:
            self._log_offset = log.tell()
            log.write(f"--- start {self.starts + 1}: {' '.join(argv)}\n".encode())
            log.flush()
            self._log_offset = log.tell()
            self.process = subprocess.Popen(
                argv,
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
                cwd=self.workdir,
                env=self.environment(),
                start_new_session=True,  # own process group: kill() takes any workers too
            )

    def _wait_healthy(self) -> None:
        import httpx

        deadline = time.monotonic() + self.startup_timeout
        last = "no answer yet"
        with httpx.Client(timeout=2.0, trust_env=False) as http:
            while True:
                code = self.process.poll()
                if code is not None:
                    raise ServerStartError(
                        f"leastwise server exited with code {code} during start-up\n"
                        f"command: {' '.join(self.argv())}\n"
                        f"--- server output ---\n{self.log_text(current_only=True)[-6000:]}"
                    )
                try:
                    response = http.get(f"{self.url}/healthz")
                    if response.status_code == 200 and self.process.poll() is None:
                        return
                    last = f"HTTP {response.status_code}: {response.text[:200]}"
                except httpx.HTTPError as exc:
                    last = f"{type(exc).__name__}: {exc}"
                if time.monotonic() >= deadline:
                    output = self.log_text(current_only=True)[-6000:]
                    self._reap(signal.SIGKILL)
                    raise ServerStartError(
                        f"leastwise server not healthy after {self.startup_timeout:.0f}s "
                        f"at {self.url}/healthz (last: {last})\n"
                        f"command: {' '.join(self.argv())}\n"
                        f"--- server output ---\n{output}"
                    )
                time.sleep(0.05)

    def _signal_group(self, sig: int) -> None:
        try:
            os.killpg(self.process.pid, sig)
        except (ProcessLookupError, PermissionError):
            try:
                self.process.send_signal(sig)
            except ProcessLookupError:
                pass

    def _reap(self, sig: int, timeout: float | None = None) -> int | None:
        """Send ``sig`` (to the group for SIGKILL), wait; escalate to SIGKILL."""
        if self.process is None:
            return None
        if self.process.poll() is None:
            if sig == signal.SIGKILL:
                self._signal_group(signal.SIGKILL)
            else:
                self.process.send_signal(sig)
            try:
                self.process.wait(timeout=self.stop_timeout if timeout is None else timeout)
            except subprocess.TimeoutExpired:
                self._signal_group(signal.SIGKILL)
                self.process.wait(timeout=30)
        # leftover children in the group (workers) go too
        try:
            os.killpg(self.process.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        return self.process.returncode

    def kill(self) -> int | None:
        """SIGKILL the server (and its process group) and reap it; returns the exit code."""
        return self._reap(signal.SIGKILL)

    def terminate(self, timeout: float | None = None) -> int | None:
        """SIGTERM, wait up to ``timeout`` (default ``stop_timeout``), then SIGKILL."""
        return self._reap(signal.SIGTERM, timeout)

    stop = terminate

    def restart(self, *, kill: bool = False) -> "LeastwiseServer":
        """Stop (SIGTERM, or SIGKILL with ``kill=True``) and start again on the same port and database."""
        if self.running:
            self.kill() if kill else self.terminate()
        return self.start()

    def __enter__(self) -> "LeastwiseServer":
        return self.start() if not self.running else self

    def __exit__(self, *exc) -> None:
        self.terminate()

    def __repr__(self) -> str:
        state = f"pid {self.pid}" if self.running else f"stopped ({self.returncode})"
        return f"<LeastwiseServer {self.url} db={self.database!r} {state}>"


def reap_all() -> None:
    """Kill every server still running (a last resort at interpreter exit)."""
    for server in list(_LIVE):
        try:
            if server.running:
                server.kill()
        except Exception:  # noqa: BLE001
            pass


atexit.register(reap_all)


def module_server(tmp_path_factory, label: str):
    """Generator for a module-scoped fixture: one ``leastwise serve`` on a fresh SQLite file."""
    workdir = tmp_path_factory.mktemp(label)
    server = LeastwiseServer(f"sqlite:///{workdir / 'leastwise.sqlite3'}", workdir=workdir)
    server.start()
    try:
        yield server
    finally:
        server.terminate(timeout=5)
