"""What the demo shows: a live table redrawn in place on a terminal, plain lines otherwise, or nothing."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

__all__ = ["LiveView", "LineView", "QuietView", "clock"]

_RED, _YELLOW, _GREEN, _BOLD, _DIM, _OFF = "\x1b[31m", "\x1b[33m", "\x1b[32m", "\x1b[1m", "\x1b[2m", "\x1b[0m"


def clock(seconds: float) -> str:
    """Plant time since the demo's midnight as ``HH:MM`` (``day 2 HH:MM`` after the first day)."""
    minutes = int(round(seconds / 60.0))
    day, rest = divmod(minutes, 24 * 60)
    text = f"{rest // 60:02d}:{rest % 60:02d}"
    return text if day == 0 else f"day {day + 1} {text}"


def _f(v: float | None, fmt: str) -> str:
    return "-" if v is None else format(v, fmt)


def _rows(tracks: dict[str, Any]) -> list[list[str]]:
    rows = [["chiller", "readings", "intercept", "load_kw", "condenser_c", "sigma", "bias kW", "rms kW", "drift"]]
    for tr in tracks.values():
        c = tr.coefficients
        reasons = sorted({str(r.get("statistic")) for r in tr.reasons})
        drift = tr.status + (f" ({', '.join(reasons)})" if reasons else "")
        rows.append([tr.label, str(tr.readings), _f(c.get("intercept"), ".2f"), _f(c.get("load_kw"), ".4f"),
                     _f(c.get("condenser_c"), ".3f"), _f(tr.sigma, ".2f"), _f(tr.bias, "+.2f"), _f(tr.rms, ".2f"),
                     drift])
    return rows


def _table(rows: list[list[str]], color: bool) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    out = []
    for k, r in enumerate(rows):
        cells = [c.rjust(w) if 0 < i < len(r) - 1 else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths))]
        line = "  ".join(cells).rstrip()
        if color and k > 0:
            status = r[-1].split(" ", 1)[0]
            tint = {"alarm": _RED + _BOLD, "watch": _YELLOW}.get(status)
            if tint:
                line = line[: len(line) - len(r[-1])] + tint + r[-1] + _OFF
        if color and k == 0:
            line = _DIM + line + _OFF
        out.append(line)
    return out


class QuietView:
    """``--headless``: nothing while running; the summary at the end."""

    def __init__(self, echo: Callable[[str], None] | None = None) -> None:
        self.echo = echo

    def begin(self, plant_name: str, url: str, plant: Any, speed: float) -> None:
        pass

    def event(self, t: float, track: Any, level: str, reasons: list[str]) -> None:
        pass

    def frame(self, t: float, tracks: dict[str, Any], done: int) -> None:
        pass

    def end(self, tracks: dict[str, Any], summary: list[str]) -> None:
        pass


class LineView(QuietView):
    """Not a terminal: a header, one line per drift change, a progress table every sixth of the run, the summary."""

    def __init__(self, echo: Callable[[str], None]) -> None:
        super().__init__(echo)
        self.next_report = 0.0
        self.step = 1.0

    def begin(self, plant_name: str, url: str, plant: Any, speed: float) -> None:
        self.step = max(plant.count * plant.interval / 6.0, plant.interval)
        self.next_report = self.step
        pace = "as fast as possible" if speed <= 0 else f"{speed:g}x real time"
        self.echo(f"{plant_name}: {len(plant.chillers)} chillers, power_kw ~ intercept + load_kw + condenser_c")
        self.echo(f"service {url}; {plant.count} readings per chiller, one a minute of plant time, {pace}")

    def event(self, t: float, track: Any, level: str, reasons: list[str]) -> None:
        self.echo(f"{clock(t)}  {track.label} drift {level.upper()} ({', '.join(reasons)})")

    def frame(self, t: float, tracks: dict[str, Any], done: int) -> None:
        if t + 1e-9 >= self.next_report:
            self.next_report += self.step
            self.echo(f"-- plant time {clock(t)}")
            for line in _table(_rows(tracks), False):
                self.echo("   " + line)

    def end(self, tracks: dict[str, Any], summary: list[str]) -> None:
        self.echo("")
        for line in summary:
            self.echo(line)


class LiveView(QuietView):
    """A terminal: the table redrawn in place (ANSI), the drift events below it, then the summary."""

    def __init__(self, write: Callable[[str], None]) -> None:
        super().__init__(None)
        self.write = write
        self.drawn = 0
        self.header: list[str] = []
        self.events: list[str] = []

    def begin(self, plant_name: str, url: str, plant: Any, speed: float) -> None:
        pace = "as fast as possible" if speed <= 0 else f"{speed:g}x real time"
        self.header = [f"{_BOLD}{plant_name}{_OFF}: power_kw ~ intercept + load_kw + condenser_c, "
                       f"one reading a minute per chiller, {pace}",
                       f"service {url}   (Ctrl-C stops)"]
        self.total = plant.count

    def event(self, t: float, track: Any, level: str, reasons: list[str]) -> None:
        tint = _RED + _BOLD if level == "alarm" else _YELLOW
        self.events.append(f"  {clock(t)}  {tint}{track.label} drift {level.upper()}{_OFF} ({', '.join(reasons)})")

    def frame(self, t: float, tracks: dict[str, Any], done: int) -> None:
        lines = self.header + [f"plant time {_BOLD}{clock(t)}{_OFF}   readings {done}/{self.total} per chiller", ""]
        lines += _table(_rows(tracks), True)
        lines += ["", "drift events:" if self.events else "drift events: none yet"] + self.events[-8:]
        up = f"\x1b[{self.drawn}F" if self.drawn else ""
        self.write(up + "\x1b[J" + "\n".join(lines) + "\n")
        self.drawn = len(lines)

    def end(self, tracks: dict[str, Any], summary: list[str]) -> None:
        self.write("\n" + "\n".join(summary) + "\n")
