"""Benchmark of the HTTP service (not a test): ``python tests/bench/service.py [--duration 5]``.

Starts a real ``leastwise serve`` (SQLite in a temporary folder, WAL,
synchronous=FULL) and, as the framework's ceiling, a bare FastAPI endpoint on
the same uvicorn settings that only reads and parses the same JSON body. wrk
(another process) posts single observations and batches of 64 at 1, 16 and 64
connections; a Lua script gives every observation its own idempotency key.
Prints one JSON line per run plus ratio lines.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
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
end
local function one(i)
  return string.format('{"x":[%d.5,%d.25],"y":%d.125,"key":"%s-%s-%d-%d"}',
    (counter + i) % 97, (counter * 7 + i) % 89, (counter + i) % 13, run, tostring(tid), counter, i)
end
function request()
  counter = counter + 1
  local body
  if batch == 1 then
    body = one(0)
  else
    local parts = {}
    for i = 1, batch do parts[i] = one(i) end
    body = '{"observations":[' .. table.concat(parts, ",") .. ']}'
  end
  return wrk.format("POST", wrk.path, {["Content-Type"] = "application/json"}, body)
end
function done(summary, latency, requests)
  io.write(string.format("RESULT %d %d %d %d %d\n", summary.requests, summary.duration,
    latency:percentile(50), latency:percentile(99), summary.errors.status + summary.errors.connect + summary.errors.timeout))
end
"""

BARE = r'''
import orjson, uvicorn
from fastapi import FastAPI, Request
from starlette.responses import Response
app = FastAPI()
@app.post("/v1/models/{name}/observations")
async def parse(name: str, request: Request) -> Response:
    body = orjson.loads(await request.body())
    n = len(body["observations"]) if "observations" in body else 1
    return Response(orjson.dumps({"parsed": n}), media_type="application/json")
@app.get("/healthz")
async def healthz():
    return {"status": "ok"}
if __name__ == "__main__":
    import sys
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), access_log=False, log_level="warning", loop="auto", http="auto")
'''


def wrk(url: str, script: Path, connections: int, duration: float, batch: int, run: str) -> dict:
    threads = max(1, min(connections, 2))
    cmd = ["wrk", "-t", str(threads), "-c", str(connections), "-d", f"{max(1, int(round(duration)))}s", "--timeout", "10s",
           "-s", str(script), url, "--", str(batch), run]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    m = re.search(r"RESULT (\d+) (\d+) (\d+) (\d+) (\d+)", out)
    assert m, out
    requests, micros, p50, p99, errors = map(int, m.groups())
    rps = requests / (micros / 1e6)
    return {"requests": requests, "rps": round(rps, 1), "observations_per_s": round(rps * batch, 1),
            "p50_ms": round(p50 / 1000, 3), "p99_ms": round(p99 / 1000, 3), "errors": errors}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--duration", type=float, default=5.0)
    ap.add_argument("--connections", default="1,16,64")
    args = ap.parse_args()
    if shutil.which("wrk") is None:
        sys.exit("wrk is not installed (apt-get install -y wrk)")
    tmp = Path(tempfile.mkdtemp(prefix="leastwise-bench-"))
    script = tmp / "post.lua"
    script.write_text(LUA)
    bare_py = tmp / "bare.py"
    bare_py.write_text(BARE)
    server = LeastwiseServer(f"sqlite:///{tmp / 'bench.sqlite3'}", workdir=tmp, env={"LEASTWISE_LOG_LEVEL": "warning"})
    bare = LeastwiseServer("unused", workdir=tmp / "bare", command=[sys.executable, str(bare_py), "{port}"])
    server.start()
    bare.start()
    try:
        import httpx

        runs = []
        with httpx.Client(base_url=server.url, trust_env=False) as http:
            for batch in (1, 64):
                for conns in map(int, args.connections.split(",")):
                    name = f"bench-b{batch}-c{conns}"
                    http.put(f"/v1/models/{name}", json={"features": ["load_kw", "condenser_c"]}).raise_for_status()
                    svc = wrk(f"{server.url}/v1/models/{name}/observations", script, conns, args.duration, batch, name)
                    ceil = wrk(f"{bare.url}/v1/models/{name}/observations", script, conns, args.duration, batch, name)
                    n = http.get(f"/v1/models/{name}").json()["n"]
                    line = {"bench": "service_post", "database": "sqlite", "batch": batch, "connections": conns,
                            **svc, "applied_n": n, "bare_fastapi_rps": ceil["rps"], "bare_p50_ms": ceil["p50_ms"],
                            "bare_p99_ms": ceil["p99_ms"], "ratio_to_bare": round(svc["rps"] / ceil["rps"], 3)}
                    runs.append(line)
                    print(json.dumps(line), flush=True)
        print(json.dumps({"bench": "summary", "cpu_count": os.cpu_count(), "duration_s": args.duration,
                          "best_single_rps": max(r["rps"] for r in runs if r["batch"] == 1),
                          "best_batch64_obs_per_s": max(r["observations_per_s"] for r in runs if r["batch"] == 64)}))
    finally:
        server.terminate()
        bare.terminate()
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
