"""Benchmark of the write path in one process (not a test): ``python tests/bench/writer.py [--d 8] [--models 1]``.

Over HTTP this machine's drift hides effects under ~10 %; driven in one
process the same code shows them. ``--concurrency`` coroutines on one event
loop (uvloop) post single observations, each with its own idempotency key,
through the service's ASGI application (``--via app``: the whole middleware
stack, as uvicorn would call it) or straight to ``Registry.observe_async``
(``--via registry``), on a fresh SQLite file with the service's settings
(WAL, ``synchronous=FULL``, the background WAL copier), so groups form as
they do under wrk. Each line gives the requests per group, the writer
thread's CPU a group and a request (``GroupWriter.cpu_seconds``) and the rest
of the process's CPU a request (the event loop: parsing, answers, the ASGI
layers). ``--models N`` spreads the posts over N models (created in one
transaction, each past its warm-up, as in ``service.py``). For A/B work run
it alternately on two trees (``PYTHONPATH=<tree>/service``) and compare
medians.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "service")]


def _scope(path: str, body: bytes) -> dict:
    return {"type": "http", "asgi": {"version": "3.0", "spec_version": "2.3"}, "http_version": "1.1",
            "server": ("127.0.0.1", 8622), "client": ("127.0.0.1", 50000), "scheme": "http", "method": "POST",
            "root_path": "", "path": path, "raw_path": path.encode(), "query_string": b"",
            "headers": [(b"host", b"127.0.0.1:8622"), (b"content-type", b"application/json"),
                        (b"content-length", str(len(body)).encode())], "state": {}}


def run_once(args: argparse.Namespace, work: Path, round_: int) -> dict:
    import orjson

    from leastwise.api.app import build_registry, create_app
    from leastwise.serve import _ThreadLimit
    from leastwise.settings import Settings

    from tests.bench.service import create_many, features, warm_rows

    db = work / f"w{round_}.sqlite3"
    names = [f"u{i}" for i in range(args.models)]
    if args.models > 1:
        create_many(f"sqlite:///{db}", "u", args.models, args.d)
    settings = Settings(database=f"sqlite:///{db}", request_log="errors")
    registry = build_registry(settings)
    app = _ThreadLimit(create_app(settings, registry), settings.threads)
    if args.models == 1:
        registry.create(names[0], features(args.d))
        registry.observe(names[0], {"observations": warm_rows(args.d)})
    for name in names:
        registry.get(name)  # in memory, as the HTTP bench's warm-up leaves them
    counter = 0

    async def post(run: str, worker: int, i: int) -> None:
        nonlocal counter
        counter += 1
        c = counter
        name = names[(c * 7919) % len(names)]
        doc = {"x": [((c * 31 + j * 13) % 1000) / 97.0 - 5.0 for j in range(args.d)], "y": (c % 113) / 7.0,
               "key": f"{run}-{worker}-{i}"}
        if args.via == "registry":
            await registry.observe_async(name, doc, minimal=args.minimal)
            return
        body = orjson.dumps(doc)
        scope = _scope(f"/v1/models/{name}/observations", body)
        if args.minimal:
            scope["headers"].append((b"prefer", b"return=minimal"))
        messages = [{"type": "http.request", "body": body, "more_body": False}]
        sent: list[dict] = []

        async def receive() -> dict:
            return messages.pop() if messages else {"type": "http.disconnect"}

        async def send(message: dict) -> None:
            sent.append(message)

        await app(scope, receive, send)
        assert sent[0]["status"] == 200, sent

    async def burst(run: str, per_worker: int) -> None:
        async def worker(w: int) -> None:
            for i in range(per_worker):
                await post(run, w, i)
        await asyncio.gather(*(worker(w) for w in range(args.concurrency)))

    async def measure() -> dict:
        await burst("warm", max(1, 3000 // args.concurrency))
        writer = registry._group_writer()
        groups, jobs, cpu = writer.groups, writer.jobs, writer.cpu_seconds
        started = time.process_time()
        await burst("run", max(1, args.requests // args.concurrency))
        total = time.process_time() - started
        groups, jobs, cpu = writer.groups - groups, writer.jobs - jobs, writer.cpu_seconds - cpu
        return {"bench": "writer", "via": args.via, "d": args.d, "models": args.models, "minimal": args.minimal,
                "concurrency": args.concurrency, "round": round_, "requests": jobs,
                "requests_per_group": round(jobs / groups, 1),
                "writer_cpu_us_per_group": round(1e6 * cpu / groups, 1),
                "writer_cpu_us_per_request": round(1e6 * cpu / jobs, 1),
                "loop_cpu_us_per_request": round(1e6 * (total - cpu) / jobs, 1)}

    try:
        import uvloop
        return uvloop.run(measure())
    finally:
        registry.close()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--d", type=int, default=8)
    ap.add_argument("--models", type=int, default=1)
    ap.add_argument("--concurrency", type=int, default=15, help="posts in flight (15: a group at 16 connections)")
    ap.add_argument("--requests", type=int, default=6000)
    ap.add_argument("--via", choices=("app", "registry"), default="app")
    ap.add_argument("--minimal", action="store_true", help="Prefer: return=minimal (no solution for the answers)")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    from leastwise.serve import single_threaded_blas

    single_threaded_blas()  # as the server runs
    work = Path(tempfile.mkdtemp(prefix="leastwise-writer-bench-"))
    try:
        lines = [run_once(args, work, r + 1) for r in range(args.repeat)]
        for line in lines:
            print(json.dumps(line), flush=True)
        keys = ("requests_per_group", "writer_cpu_us_per_group", "writer_cpu_us_per_request", "loop_cpu_us_per_request")
        print(json.dumps({"bench": "writer", "summary_of": len(lines),
                          **{f"{k}_median": statistics.median(line[k] for line in lines) for k in keys},
                          "cpu_count": os.cpu_count(), "python": platform.python_version()}), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
