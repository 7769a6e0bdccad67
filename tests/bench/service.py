"""Benchmark of the HTTP service (not a test): ``python tests/bench/service.py [--duration 5] [--postgres]``.

Starts a real ``leastwise serve`` (SQLite in a temporary folder, WAL,
synchronous=FULL: every 2xx is on disk) and, as the framework's ceiling, a bare
FastAPI endpoint on the same uvicorn settings (uvloop, httptools, one process)
that only reads and parses the same JSON body. wrk, in its own process, drives
both; a Lua script gives every observation its own idempotency key and prints
throughput, p50/p99 latency and errors. Every figure is printed absolute and
as a ratio to the ceiling, with the machine's core count; the ceiling is
measured right before and right after each run and the ratio taken to their
mean (both are printed: their spread shows how noisy the machine was).
Each line also gives the CPU time (all threads, from ``/proc``) the server
process spent per request, the service's and the ceiling's, and their
quotient ``cpu_ratio`` (ceiling over service): on a shared machine it moves
far less than throughput, so it is the figure to compare code changes by (on
PostgreSQL it leaves out the database server's own CPU). ``--postgres`` repeats the single-POST runs on a throwaway PostgreSQL
cluster (tests/support/postgres.py).

Runs (targets from issue 7):

- ``single``  d = 8, one observation per POST, 16 and 64 connections (and 16 with ``Prefer: return=minimal``)
- ``batch64`` d = 8, 64 observations per POST, 16 connections (observations/s)
- ``uniform`` d = 8, single POSTs spread uniformly over 10,000 models (full and minimal answers)
- ``get``     dashboard poll ``GET /v1/models/{name}``, plain and with ``If-None-Match``
- ``d64``     d = 64, single POST, 16 connections
- ``logged``  the single POST at 16 connections with the default request log (a line per request)
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "service")]

from tests.support.server import LeastwiseServer  # noqa: E402

LUA = r"""
local counter = 0
local threads = {}
function setup(thread)
  table.insert(threads, thread)
  thread:set("tid", #threads)
end
function init(args)
  batch = tonumber(args[1]) or 1
  run = args[2] or "r"
  dim = tonumber(args[3]) or 8
  models = tonumber(args[4]) or 0      -- 0: the URL's path; n: /v1/models/<prefix><i>, i uniform in 0..n-1; -n: in turn
  prefix = args[5] or "u"
  method = args[6] or "POST"
  etag = args[7] or ""
  start = tonumber(args[8]) or 0       -- warm-up: the model to begin with
  prefer = args[9] or ""               -- "return=minimal": the answer without the model (RFC 7240)
  math.randomseed(os.time() + tid * 7919)
end
local function one(i)
  local xs = {}
  for j = 1, dim do xs[j] = string.format("%.4f", ((counter * 31 + i * 17 + j * 13) % 1000) / 97.0 - 5.0) end
  return string.format('{"x":[%s],"y":%.4f,"key":"%s-%s-%d-%d"}',
    table.concat(xs, ","), ((counter + i) % 113) / 7.0, run, tostring(tid), counter, i)
end
function request()
  counter = counter + 1
  local path = wrk.path
  if models > 0 then
    path = "/v1/models/" .. prefix .. tostring(math.random(0, models - 1)) .. "/observations"
  elseif models < 0 then  -- warm-up: every model in turn (thread 1 the even, thread 2 the odd ones)
    path = "/v1/models/" .. prefix .. tostring((start + (counter - 1) * 2 + tid - 1) % -models) .. "/observations"
  end
  if method == "GET" then
    local headers = {}
    if etag ~= "" then headers["If-None-Match"] = etag end
    return wrk.format("GET", path, headers, nil)
  end
  local body
  if batch == 1 then
    body = one(0)
  else
    local parts = {}
    for i = 1, batch do parts[i] = one(i) end
    body = '{"observations":[' .. table.concat(parts, ",") .. ']}'
  end
  local headers = {["Content-Type"] = "application/json"}
  if prefer ~= "" then headers["Prefer"] = prefer end
  return wrk.format("POST", path, headers, body)
end
function done(summary, latency, requests)
  io.write(string.format("RESULT %d %d %d %d %d %d\n", summary.requests, summary.duration,
    latency:percentile(50), latency:percentile(99), summary.errors.status + summary.errors.connect + summary.errors.timeout
    + summary.errors.read + summary.errors.write, latency.max))
end
"""

BARE = r'''
import orjson, uvicorn
from fastapi import FastAPI, Request
from starlette.responses import Response
from leastwise.api.app import framework_options
app = FastAPI(**framework_options())  # the service's framework settings
STATE = orjson.dumps({"name": "m", "config": {"features": ["f%d" % i for i in range(8)], "intercept": False,
    "forgetting": 1.0, "half_life": None, "ridge": 0.0}, "version": 123, "created": "2026-01-01T00:00:00Z",
    "n": 122, "effective_n": 122.0, "identifiable": True, "rank": 8,
    "coefficients": {"f%d" % i: 0.123456789 * i for i in range(8)}, "sigma": 0.5, "rss": 12.5, "dof": 114.0,
    "unidentified_directions": [], "last_time": None, "drift": {"status": "ok", "reasons": [], "detectors": True}})
@app.post("/v1/models/{name}/observations")
async def parse(name: str, request: Request) -> Response:
    body = orjson.loads(await request.body())
    n = len(body["observations"]) if "observations" in body else 1
    return Response(orjson.dumps({"parsed": n}), media_type="application/json")
@app.get("/v1/models/{name}")
async def state(name: str, request: Request) -> Response:
    return Response(STATE, media_type="application/json", headers={"ETag": '"1.2"', "Cache-Control": "no-cache"})
@app.get("/healthz")
async def healthz():
    return {"status": "ok"}
if __name__ == "__main__":
    import sys
    from leastwise.serve import fast_loop_and_parser
    loop, http = fast_loop_and_parser()
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), access_log=False, log_level="warning", loop=loop,
                http=http, backlog=2048, server_header=False, date_header=False)
'''


def process_cpu_seconds(pid: int | None) -> float | None:
    """User + system CPU time of process ``pid``, all its threads (Linux ``/proc``; None elsewhere)."""
    if pid is None:
        return None
    try:
        with open(f"/proc/{pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime, stime (stat fields 14, 15)


def wrk(url: str, script: Path, connections: int, duration: float, *lua_args: object, pid: int | None = None) -> dict:
    """One wrk run; with ``pid``, also the CPU that server process spent per request (``cpu_us_per_request``)."""
    threads = 2 if connections >= 2 else 1
    cmd = ["wrk", "-t", str(threads), "-c", str(connections), "-d", f"{max(1, int(round(duration)))}s",
           "--timeout", "10s", "-s", str(script), url, "--", *map(str, lua_args)]
    cpu_before = process_cpu_seconds(pid)
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    cpu_after = process_cpu_seconds(pid)
    m = re.search(r"RESULT (\d+) (\d+) (\d+) (\d+) (\d+) (\d+)", out)
    assert m, out
    requests, micros, p50, p99, errors, worst = map(int, m.groups())
    non2xx = re.search(r"Non-2xx or 3xx responses: (\d+)", out)
    rps = requests / (micros / 1e6)
    line = {"requests": requests, "rps": round(rps, 1), "p50_ms": round(p50 / 1000, 3), "p99_ms": round(p99 / 1000, 3),
            "max_ms": round(worst / 1000, 1), "errors": errors + (int(non2xx.group(1)) if non2xx else 0)}
    if cpu_before is not None and cpu_after is not None and requests:
        line["cpu_us_per_request"] = round(1e6 * (cpu_after - cpu_before) / requests, 1)
    return line


def features(d: int) -> dict:
    return {"features": [f"f{i}" for i in range(d)], "intercept": False}


def warm_rows(d: int) -> list[dict]:
    """Observations that take a new model past its start-up phase: while fewer than d observations
    determine the coefficients, every update and answer takes the engine's minimum-norm (SVD) path."""
    return [{"x": [((i * 7 + j * 3) % 11) * 0.5 + (i == j) for j in range(d)], "y": i * 0.1} for i in range(2 * d + 8)]


def create_many(url: str, prefix: str, count: int, d: int) -> None:
    """``count`` models created in one transaction (10,000 PUTs would take one fsync each), each already
    past its start-up phase like the one-model runs: the same warm-up rows in its log and its checkpoint."""
    import numpy as np
    from sqlalchemy import insert

    from leastwise.engine import State
    from leastwise.models.config import ModelConfig
    from leastwise.models.drift import ResidualMonitor
    from leastwise.store import CheckpointRow, Store
    from leastwise.store import queries as q
    from leastwise.store.tables import observations

    config = ModelConfig.parse(features(d))
    state, monitor = State(config.spec()), ResidualMonitor.for_model(config)
    rows = warm_rows(d)
    for seq, r in enumerate(rows, start=1):
        monitor.advance(state, np.asarray(r["x"], dtype=np.float64), float(r["y"]), None, seq)
    monitor.take_events()
    cp = CheckpointRow(1, len(rows), state.to_bytes(), monitor.to_bytes())
    store = Store.open(url)
    try:
        with store.write() as conn:
            now = time.time()
            for i in range(count):
                model = q.insert_model(conn, f"{prefix}{i}", config.to_json(), now, cp)
                conn.execute(insert(observations), [
                    {"model_id": model.id, "seq": seq, "x": np.asarray(r["x"], dtype="<f8").tobytes(), "y": r["y"],
                     "t": None, "key": None, "status": "applied", "received": now}
                    for seq, r in enumerate(rows, start=1)])
    finally:
        store.close()


class Bench:
    def __init__(self, args: argparse.Namespace, tmp: Path) -> None:
        self.args, self.tmp = args, tmp
        self.script = tmp / "post.lua"
        self.script.write_text(LUA)
        self.lines: list[dict] = []
        self.ceilings = 0

    def emit(self, line: dict) -> None:
        self.lines.append(line)
        print(json.dumps(line), flush=True)

    def ceiling(self, bare: LeastwiseServer, kind: str, conns: int, batch: int, d: int) -> dict:
        """One measurement of the bare endpoint (see :meth:`run`: one right before and one right after each run)."""
        self.ceilings += 1
        if kind == "get":
            return wrk(f"{bare.url}/v1/models/m", self.script, conns, self.args.duration, 1, "bare", d, 0, "u", "GET",
                       pid=bare.pid)
        return wrk(f"{bare.url}/v1/models/m/observations", self.script, conns, self.args.duration, batch,
                   f"bare{self.ceilings}", d, pid=bare.pid)

    def run(self, server: LeastwiseServer, bare: LeastwiseServer, database: str, bench: str, conns: int,
            **kwargs) -> dict:
        """:meth:`run_once` ``--repeat`` times; with more than one, a summary line of the medians follows."""
        lines = [self.run_once(server, bare, database, bench, conns, round_=i + 1, **kwargs)
                 for i in range(self.args.repeat)]
        if len(lines) == 1:
            return lines[0]
        ratios = sorted(line["ratio"] for line in lines)
        summary = {"bench": lines[0]["bench"], "database": database, "connections": conns,
                   "summary_of": len(lines), "ratio_median": round(statistics.median(ratios), 3),
                   "ratio_min": ratios[0], "ratio_max": ratios[-1],
                   "rps_median": round(statistics.median(line["rps"] for line in lines), 1),
                   "ceiling_rps_median": round(statistics.median(line["ceiling_rps"] for line in lines), 1),
                   "p99_ms_median": round(statistics.median(line["p99_ms"] for line in lines), 3),
                   **({"cpu_ratio_median": round(statistics.median(line["cpu_ratio"] for line in lines), 3)}
                      if all("cpu_ratio" in line for line in lines) else {}),
                   "errors": sum(line["errors"] for line in lines), "cpu_count": os.cpu_count()}
        self.emit(summary)
        return summary

    def run_once(self, server: LeastwiseServer, bare: LeastwiseServer, database: str, bench: str, conns: int, *,
                 batch: int = 1, d: int = 8, name: str | None = None, models: int = 0, method: str = "POST",
                 etag: str = "", check_n: bool = True, prefer: str = "", round_: int = 1) -> dict:
        import httpx

        tag = f"{bench}-{database}-c{conns}-b{batch}-d{d}" + ("-minimal" if prefer else "")
        path = f"/v1/models/{name or tag}" + ("/observations" if method == "POST" else "")
        if name is None and round_ == 1:
            with httpx.Client(base_url=server.url, trust_env=False, timeout=120) as http:
                http.put(f"/v1/models/{tag}", json=features(d)).raise_for_status()
                http.post(f"/v1/models/{tag}/observations", json={"observations": warm_rows(d)}).raise_for_status()
        counted = method == "POST" and check_n and not models
        n_before = model_n(server, name or tag) if counted else 0
        # The ceiling brackets the run (machines here drift by tens of percent within minutes):
        # the ratio is to the mean of the measurement just before and the one just after.
        kind = "get" if method == "GET" else "post"
        before = self.ceiling(bare, kind, conns, batch, d)
        writer_before = writer_counts(server) if method == "POST" else None
        svc = wrk(f"{server.url}{path}", self.script, conns, self.args.duration, batch, f"{tag}-r{round_}", d, models, "u",
                  method, etag, 0, prefer, pid=server.pid)
        writer_after = writer_counts(server) if method == "POST" else None
        after = self.ceiling(bare, kind, conns, batch, d)
        ceil = {"rps": round((before["rps"] + after["rps"]) / 2, 1),
                "p99_ms": round((before["p99_ms"] + after["p99_ms"]) / 2, 3)}
        line = {"bench": bench + ("_minimal" if prefer else ""), "database": database, "connections": conns,
                **({"round": round_} if self.args.repeat > 1 else {}),
                "batch": batch, "d": d, **svc,
                "observations_per_s": round(svc["rps"] * batch, 1) if method == "POST" else None,
                "ceiling_rps": ceil["rps"], "ceiling_before_after_rps": [before["rps"], after["rps"]],
                "ceiling_p99_ms": ceil["p99_ms"],
                "ratio": round(svc["rps"] / ceil["rps"], 3), "cpu_count": os.cpu_count()}
        cpus = [c.get("cpu_us_per_request") for c in (before, after)]
        if svc.get("cpu_us_per_request") and all(cpus):
            # CPU a request, the ceiling's over the service's: less noisy than throughput on a shared machine
            ceiling_cpu = (cpus[0] + cpus[1]) / 2
            line["ceiling_cpu_us_per_request"] = round(ceiling_cpu, 1)
            line["cpu_ratio"] = round(ceiling_cpu / svc["cpu_us_per_request"], 3)
        if writer_before is not None and writer_after is not None:
            line.update(writer_figures(writer_before, writer_after, self.args.duration, svc["requests"]))
        if counted:  # every key is new: >= requests * batch (2xx means applied)
            line["applied_n"] = model_n(server, name or tag) - n_before
        self.emit(line)
        return line


_WRITER_SERIES = ("leastwise_write_group_size_count", "leastwise_write_group_size_sum",
                  "leastwise_write_group_duration_seconds_sum", "leastwise_write_cpu_seconds_total")


def writer_counts(server: LeastwiseServer) -> dict[str, float]:
    """The group writer's counters from the service's own ``GET /v1/metrics`` (parsed by prometheus_client)."""
    import httpx
    from prometheus_client.parser import text_string_to_metric_families

    with httpx.Client(base_url=server.url, trust_env=False, timeout=120) as http:
        text = http.get("/v1/metrics").text
    found = {sample.name: sample.value for family in text_string_to_metric_families(text)
             for sample in family.samples if not sample.labels}
    return {name: found.get(name, 0.0) for name in _WRITER_SERIES}


def writer_figures(before: dict[str, float], after: dict[str, float], seconds: float, requests: int) -> dict:
    """What the writer did during a run: requests per group, the share of the run it was busy with groups
    (``writer_busy``; well below 1 with the server's CPU not saturated says the run waits on latency),
    and its own CPU time a request (the rest of ``cpu_us_per_request`` is the event loop's and the kernel's)."""
    delta = {name: after[name] - before[name] for name in _WRITER_SERIES}
    groups = delta["leastwise_write_group_size_count"]
    return {"requests_per_group": round(delta["leastwise_write_group_size_sum"] / groups, 1) if groups else None,
            "writer_busy": round(delta["leastwise_write_group_duration_seconds_sum"] / seconds, 3),
            "writer_cpu_us_per_request": round(1e6 * delta["leastwise_write_cpu_seconds_total"] / max(1, requests), 1)}


def model_n(server: LeastwiseServer, name: str) -> int:
    """The model's observation count, as the service reports it."""
    import httpx

    with httpx.Client(base_url=server.url, trust_env=False, timeout=120) as http:
        return http.get(f"/v1/models/{name}").json()["n"]


def serve(database: str, tmp: Path, extra: dict | None = None) -> LeastwiseServer:
    """The service as measured: request lines only for answers of status >= 400 (``LEASTWISE_REQUEST_LOG=errors``,
    the setting the README recommends at these rates; the ``logged`` run measures the default, a line per request)."""
    env = {"LEASTWISE_REQUEST_LOG": "errors", **(extra or {})}
    return LeastwiseServer(database, workdir=tmp, env=env, startup_timeout=120)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--repeat", type=int, default=1,
                    help="runs of each configuration (each bracketed by its ceiling); >1 adds a line of medians")
    ap.add_argument("--only", default="single,batch64,uniform,get,d64,logged", help="comma-separated runs")
    ap.add_argument("--models", type=int, default=10_000)
    ap.add_argument("--postgres", action="store_true", help="also the single-POST runs on PostgreSQL")
    args = ap.parse_args()
    if shutil.which("wrk") is None:
        sys.exit("wrk is not installed (apt-get install -y wrk)")
    only = set(args.only.split(","))
    tmp = Path(tempfile.mkdtemp(prefix="leastwise-bench-"))
    (tmp / "bare.py").write_text(BARE)
    bench = Bench(args, tmp)
    sqlite_url = f"sqlite:///{tmp / 'bench.sqlite3'}"
    if "uniform" in only:
        create_many(sqlite_url, "u", args.models, 8)
    server = serve(sqlite_url, tmp)
    bare = LeastwiseServer("unused", workdir=tmp / "bare", command=[sys.executable, str(tmp / "bare.py"), "{port}"])
    pg = None
    try:
        server.start()
        bare.start()
        if "single" in only:
            for conns in (16, 64):
                bench.run(server, bare, "sqlite", "single", conns)
            # the same with "Prefer: return=minimal": no model (so no solution) in the answers
            bench.run(server, bare, "sqlite", "single", 16, prefer="return=minimal")
        if "batch64" in only:
            bench.run(server, bare, "sqlite", "batch64", 16, batch=64)
        if "uniform" in only:
            # warm-up: every model loaded once (checkpoint read) before the measured run; wrk's
            # two threads post to the models in turn, each run carrying on where the last one ended
            start = 0
            while start < args.models:
                done = wrk(f"{server.url}/", bench.script, 16, 2.0, 1, f"warm{start}", 8, -args.models, "u", "POST",
                           "", start)
                start += max(1, int(done["requests"] * 0.8))  # the two threads need not keep pace exactly
            for conns in (16, 64):
                bench.run(server, bare, "sqlite", "uniform", conns, name="u0", models=args.models)
            for conns in (16, 64):
                bench.run(server, bare, "sqlite", "uniform", conns, name="u0", models=args.models,
                          prefer="return=minimal")
        if "get" in only:
            import httpx

            name = "get-model"
            with httpx.Client(base_url=server.url, trust_env=False, timeout=120) as http:
                http.put(f"/v1/models/{name}", json=features(8)).raise_for_status()
                for i in range(200):
                    http.post(f"/v1/models/{name}/observations",
                              json={"x": [((i * 7 + j * 3) % 11) * 0.5 for j in range(8)], "y": i * 0.1})
                etag = http.get(f"/v1/models/{name}").headers["etag"]
            bench.run(server, bare, "sqlite", "get", 16, name=name, method="GET")
            bench.run(server, bare, "sqlite", "get_if_none_match", 16, name=name, method="GET", etag=etag)
        if "d64" in only:
            bench.run(server, bare, "sqlite", "d64", 16, d=64)
        server.terminate()
        if "logged" in only:  # the default request log: one JSON line per request on stderr (here a file)
            logged = serve(f"sqlite:///{tmp / 'logged.sqlite3'}", tmp / "logged", {"LEASTWISE_REQUEST_LOG": "all"})
            logged.start()
            try:
                bench.run(logged, bare, "sqlite", "logged", 16)
            finally:
                logged.terminate()
        if args.postgres:
            from tests.support.postgres import PostgresServer, PostgresUnavailable, ThrowawayCluster, find_pg_bindir

            bindir = find_pg_bindir()
            if bindir is None:
                raise PostgresUnavailable("no PostgreSQL binaries")
            pg = ThrowawayCluster(bindir)
            pg.start()
            admin = PostgresServer(pg.url, pg)
            admin.check()
            url = admin.create_database("lw_bench")
            pserver = serve(url, tmp / "pg")
            pserver.start()
            try:
                for conns in (16, 64):
                    bench.run(pserver, bare, "postgresql", "single", conns)
            finally:
                pserver.terminate()
        print(json.dumps({"bench": "machine", "cpu_count": os.cpu_count(), "python": platform.python_version(),
                          "platform": platform.platform(), "duration_s": args.duration, "repeat": args.repeat}), flush=True)
    finally:
        server.terminate()
        bare.terminate()
        if pg is not None:
            pg.stop()
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
