"""``leastwise demo``: the service on an embedded database, simulated gateways, a live view, a summary.

The service runs in this process (uvicorn in a background thread) on an
SQLite file in a temporary folder (or ``database``). One simulated gateway
per chiller posts its readings through :class:`leastwise_client.Client`,
in accelerated plant time: every ``tick`` of plant time each gateway sends
the readings it collected as one batch, then the view reads each model back
(``GET /v1/models/{name}``: coefficients and drift status).
"""

from __future__ import annotations

import math
import signal
import socket
import tempfile
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

from leastwise_client import Client, Reading

from .plant import FEATURES, PLANT_NAME, Plant
from .view import LineView, LiveView, QuietView, clock

__all__ = ["DemoResult", "Detection", "run_demo", "EmbeddedService"]


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def _port_free(host: str, port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        try:
            s.bind((host, port))
        except OSError:
            return False
        return True


def _free_port(host: str) -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((host, 0))
        return s.getsockname()[1]


class EmbeddedService:
    """The leastwise API served by uvicorn in a background thread of this process."""

    def __init__(self, database: str, host: str = "127.0.0.1", port: int | None = None) -> None:
        import uvicorn

        from leastwise.api import create_app
        from leastwise.settings import Settings

        if port is None:
            port = 8622 if _port_free(host, 8622) else _free_port(host)
        self.host, self.port, self.database = host, port, database
        self.app = create_app(Settings(host=host, port=port, database=database, log_level="warning"))
        config = uvicorn.Config(self.app, host=host, port=port, access_log=False, log_config=None,
                                log_level="warning", timeout_graceful_shutdown=2, server_header=False)
        self.server = uvicorn.Server(config)
        self.thread = threading.Thread(target=self.server.run, name="leastwise-demo-service", daemon=True)

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}"

    def start(self, timeout: float = 30.0) -> "EmbeddedService":
        self.thread.start()
        deadline = time.monotonic() + timeout
        while not self.server.started:
            if not self.thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError(f"the demo service did not start on {self.url} (is the port taken?)")
            time.sleep(0.02)
        return self

    def stop(self) -> None:
        self.server.should_exit = True
        self.thread.join(timeout=10)
        try:
            self.app.state.registry.store.close()
        except Exception:  # noqa: BLE001 - best effort at shutdown
            pass


@dataclass
class Detection:
    """When a chiller's drift status first reached a level (plant seconds since the start, readings so far)."""

    level: str
    at: float
    reading: int
    reasons: list[str]


@dataclass
class ChillerTrack:
    name: str
    label: str
    fouls: bool
    readings: int = 0
    residuals: deque = field(default_factory=lambda: deque(maxlen=60))
    status: str = "ok"
    reasons: list[dict[str, Any]] = field(default_factory=list)
    coefficients: dict[str, float | None] = field(default_factory=dict)
    sigma: float | None = None
    first: dict[str, Detection] = field(default_factory=dict)

    @property
    def bias(self) -> float | None:
        r = [v for v in self.residuals if v is not None]
        return sum(r) / len(r) if r else None

    @property
    def rms(self) -> float | None:
        r = [v for v in self.residuals if v is not None]
        return math.sqrt(sum(v * v for v in r) / len(r)) if r else None


@dataclass
class DemoResult:
    url: str
    database: str
    plant_seconds: float
    readings: int
    fouling_chiller: str
    fouling_begins: float
    fouling_full: float
    fouling_loss: float
    tracks: dict[str, ChillerTrack]
    summary: list[str]

    def detection(self, name: str) -> dict[str, Detection]:
        return self.tracks[name].first


_RANK = {"ok": 0, "watch": 1, "alarm": 2}


def _duration(seconds: float) -> str:
    minutes = int(round(seconds / 60.0))
    h, m = divmod(abs(minutes), 60)
    return f"{h} h {m:02d} min" if h else f"{m} min"


def run_demo(
    *,
    hours: float = 24.0,
    readings: int | None = None,
    speed: float = 3600.0,
    interval: float = 60.0,
    tick: float = 300.0,
    seed: int = 4,
    fouling: float = 0.05,
    database: str | None = None,
    port: int | None = None,
    keep_running: bool = False,
    headless: bool = False,
    tty: bool = False,
    echo: Callable[[str], None] = print,
    write: Callable[[str], None] | None = None,
) -> DemoResult:
    """Run the demo; returns what was detected. ``readings`` (per chiller) overrides ``hours``."""
    duration = readings * interval if readings is not None else hours * 3600.0
    plant = Plant(duration=duration, interval=interval, seed=seed, fouling_loss=fouling)
    tmp = None
    if database is None:
        tmp = tempfile.TemporaryDirectory(prefix="leastwise-demo-")
        database = f"sqlite:///{Path(tmp.name) / 'demo.sqlite3'}"
    elif "://" not in database:
        database = f"sqlite:///{Path(database).resolve()}"
    service = EmbeddedService(database, port=port).start()
    start = datetime.now(timezone.utc).replace(hour=0, minute=0, second=0, microsecond=0)
    tracks = {c.name: ChillerTrack(c.name, c.label, c.fouls) for c in plant.chillers}
    if headless:
        view: Any = QuietView()
    elif tty:
        view = LiveView(write or (lambda s: print(s, end="", flush=True)))
    else:
        view = LineView(echo)
    try:
        with Client(service.url, timeout=30.0) as lw:
            for c in plant.chillers:
                lw.create_model(c.name, list(FEATURES))
                if lw.model(c.name).n:  # an earlier demo in the same database: start afresh
                    lw.reset(c.name)
            view.begin(PLANT_NAME, service.url, plant, speed)
            wall0 = time.monotonic()
            per_tick = max(int(tick // interval), 1)
            i = 0
            while i < plant.count:
                batch_end = min(i + per_tick, plant.count)
                t_end = batch_end * interval
                for c in plant.chillers:
                    batch = []
                    for j in range(i, batch_end):
                        t, x, y = plant.reading(j, c)
                        batch.append(Reading(x, y, start + timedelta(seconds=t)))
                    # the gateway reads its residuals only; the dashboard below GETs the model
                    answer = lw.observe_batch(c.name, batch, minimal=True)
                    tr = tracks[c.name]
                    tr.readings += answer.applied
                    tr.residuals.extend(r.residual for r in answer.results if tr.readings > 10)
                for c in plant.chillers:
                    tr = tracks[c.name]
                    m = lw.model(c.name)
                    tr.coefficients, tr.sigma = m.coefficients, m.sigma
                    tr.reasons = list(m.drift.reasons)
                    status = m.drift.status
                    if _RANK.get(status, 0) > _RANK.get(tr.status, 0):
                        for level in ("watch", "alarm"):
                            if _RANK[level] <= _RANK[status] and level not in tr.first:
                                names = sorted({str(r.get("statistic")) for r in tr.reasons if r.get("level") == level}
                                               or {str(r.get("statistic")) for r in tr.reasons})
                                tr.first[level] = Detection(level, t_end, tr.readings, names)
                                view.event(t_end, tr, level, names)
                    tr.status = status
                i = batch_end
                view.frame(t_end, tracks, i)
                if speed > 0 and not headless:
                    lag = wall0 + t_end / speed - time.monotonic()
                    if lag > 0:
                        time.sleep(lag)
            summary = _summary(plant, tracks, start)
            view.end(tracks, summary)
        result = DemoResult(service.url, database, plant.count * interval, plant.count,
                            next(c.name for c in plant.chillers if c.fouls), plant.fouling_begins, plant.fouling_full,
                            fouling, tracks, summary)
        if keep_running:
            echo("")
            echo(f"The service keeps running at {service.url} (database {database}).")
            echo(f"  try: leastwise list --url {service.url}")
            echo(f"       leastwise drift --url {service.url}")
            echo(f"       curl {service.url}/v1/models/ch-3")
            echo("Press Ctrl-C to stop.")
            previous = None
            if threading.current_thread() is threading.main_thread():
                previous = signal.signal(signal.SIGTERM, _interrupt)  # a service manager's stop, like Ctrl-C
            try:
                while service.thread.is_alive():
                    time.sleep(0.5)
            except KeyboardInterrupt:
                echo("stopping")
            finally:
                if previous is not None:
                    signal.signal(signal.SIGTERM, previous)
        return result
    finally:
        service.stop()
        if tmp is not None:
            tmp.cleanup()


def _summary(plant: Plant, tracks: dict[str, ChillerTrack], start: datetime) -> list[str]:
    fouler = next(c for c in plant.chillers if c.fouls)
    lines = [
        f"Summary: {plant.count} readings per chiller over {_duration(plant.count * plant.interval)} of plant time.",
        f"{fouler.label} began to foul at {clock(plant.fouling_begins)}; by {clock(plant.fouling_full)} it drew "
        f"{plant.fouling_loss:.0%} more power at the same duty.",
    ]
    for c in plant.chillers:
        tr = tracks[c.name]
        if not tr.first:
            lines.append(f"{c.label}: drift ok throughout.")
            continue
        parts = []
        for level in ("watch", "alarm"):
            d = tr.first.get(level)
            if d is None:
                continue
            when = f"{level} at {clock(d.at)} (reading {d.reading}"
            if c.fouls:
                when += f", {_duration(d.at - plant.fouling_begins)} after fouling began" \
                    if d.at >= plant.fouling_begins else ", before fouling began"
            parts.append(when + f"; {', '.join(d.reasons)})")
        verdict = "" if c.fouls else " (no fault was simulated: a false alarm)" if "alarm" in tr.first else \
            " (no fault was simulated: a chance excursion)"
        lines.append(f"{c.label}: " + "; ".join(parts) + verdict + ".")
    return lines
