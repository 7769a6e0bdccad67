"""A loopback HTTP/1.1 proxy that forwards requests to a leastwise server and can drop answers.

``DroppingProxy(upstream_port, drop=lambda method, path, body: ...)``: for a
request where ``drop`` returns True, the proxy forwards it, waits for the
server's complete answer (so the server has committed), then closes the
client's connection without replying: what a gateway sees when a link goes
down between the service's commit and its answer.
"""

from __future__ import annotations

import socket
import threading
from collections.abc import Callable


def _read_message(sock: socket.socket, buf: bytearray) -> tuple[bytes, bytes] | None:
    """One HTTP message (head, body) framed by Content-Length; None at EOF."""
    while b"\r\n\r\n" not in buf:
        chunk = sock.recv(65536)
        if not chunk:
            return None
        buf += chunk
    end = buf.index(b"\r\n\r\n") + 4
    head = bytes(buf[:end])
    length = 0
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value.strip())
    while len(buf) < end + length:
        chunk = sock.recv(65536)
        if not chunk:
            return None
        buf += chunk
    body = bytes(buf[end:end + length])
    del buf[:end + length]
    return head, body


class DroppingProxy:
    def __init__(self, upstream_port: int, drop: Callable[[str, str, bytes], bool]) -> None:
        self.upstream = ("127.0.0.1", upstream_port)
        self.drop = drop
        self.requests: list[tuple[str, str, bytes]] = []
        self.dropped: list[tuple[str, str, bytes]] = []
        self._listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self._listener.bind(("127.0.0.1", 0))
        self._listener.listen(16)
        self.port = self._listener.getsockname()[1]
        self._closed = False
        self._thread = threading.Thread(target=self._accept, daemon=True)
        self._thread.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def close(self) -> None:
        self._closed = True
        self._listener.close()

    def _accept(self) -> None:
        while not self._closed:
            try:
                conn, _ = self._listener.accept()
            except OSError:
                return
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        buf = bytearray()
        with conn:
            while True:
                try:
                    msg = _read_message(conn, buf)
                except OSError:
                    return
                if msg is None:
                    return
                head, body = msg
                method, path, _ = head.split(b"\r\n", 1)[0].decode().split(" ", 2)
                self.requests.append((method, path, body))
                with socket.create_connection(self.upstream) as up:
                    up.sendall(head + body)
                    answer = _read_message(up, bytearray())
                if answer is None:
                    return
                if self.drop(method, path, body):
                    self.dropped.append((method, path, body))
                    conn.shutdown(socket.SHUT_RDWR)
                    return
                conn.sendall(answer[0] + answer[1])
