"""A sender that stops half-way through a body gets 408 problem details; the others are served meanwhile."""

from __future__ import annotations

import json
import socket

import httpx


def _read_response(sock: socket.socket) -> tuple[int, dict[str, str], bytes]:
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = sock.recv(65536)
        assert chunk, "the connection closed without an answer"
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    headers = {k.strip().lower(): v.strip() for k, v in (line.split(":", 1) for line in lines[1:])}
    length = int(headers.get("content-length", "0"))
    while len(body) < length:
        chunk = sock.recv(65536)
        assert chunk, "the connection closed inside the answer"
        body += chunk
    return status, headers, body


def test_a_stalled_body_is_answered_408_and_the_service_goes_on(server_factory):
    server = server_factory(env={"LEASTWISE_BODY_TIMEOUT": "1"})
    model = "/v1/models/press-3-energy"
    with httpx.Client(base_url=server.url, trust_env=False, timeout=30) as http:
        assert http.put(model, json={"features": ["load"]}).status_code == 201
        with socket.create_connection(("127.0.0.1", server.port), timeout=30) as sock:
            body = b'{"x": [1.0], "y": 2.0}'
            sock.sendall(b"POST " + model.encode() + b"/observations HTTP/1.1\r\nHost: localhost\r\n"
                         b"Content-Type: application/json\r\nContent-Length: " + str(len(body)).encode()
                         + b"\r\n\r\n" + body[:9])  # then nothing more
            # Meanwhile other requests are served (the stalled read blocks nobody).
            assert http.post(f"{model}/observations", json={"x": [1.0], "y": 2.0}).status_code == 200
            status, headers, answer = _read_response(sock)
        assert status == 408
        assert headers["content-type"].startswith("application/problem+json")
        assert headers.get("connection") == "close"
        problem = json.loads(answer)
        assert problem["status"] == 408 and problem["type"].endswith("request-timeout")
        # Nothing of the stalled request was applied; the service still answers.
        state = http.get(model).json()
        assert state["n"] == 1
        assert http.post(f"{model}/observations", json={"x": [2.0], "y": 4.0}).json()["n"] == 2
