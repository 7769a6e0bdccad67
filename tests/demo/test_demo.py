"""The demo runs headless (full speed) and reports the fouling chiller's drift alarm."""

from __future__ import annotations

import re

from click.testing import CliRunner

from leastwise.cli import main
from leastwise.demo import run_demo


def test_headless_demo_detects_the_fouling_chiller(tmp_path):
    db = tmp_path / "demo.sqlite3"
    result = run_demo(hours=12, headless=True, database=str(db))
    assert db.exists()  # a given database is kept
    fouled = result.detection("ch-3")
    assert "alarm" in fouled, result.summary
    assert result.fouling_begins < fouled["watch"].at <= fouled["alarm"].at < result.plant_seconds
    assert fouled["alarm"].at - result.fouling_begins < 3 * 3600  # within three plant hours of the onset
    for healthy in ("ch-1", "ch-2"):
        assert "alarm" not in result.detection(healthy), result.summary
    assert any(line.startswith("CH-3: watch at") and "alarm at" in line for line in result.summary)


def test_demo_command_headless_prints_the_summary():
    r = CliRunner().invoke(main, ["demo", "--headless", "--hours", "6"])
    assert r.exit_code == 0, r.output
    line = next(x for x in r.output.splitlines() if x.startswith("CH-3:"))
    assert re.search(r"alarm at \d\d:\d\d \(reading \d+, .* after fouling began", line), r.output
    assert "CH-1: drift ok throughout." in r.output


def test_live_view_on_a_terminal_redraws_in_place():
    frames: list[str] = []
    run_demo(readings=90, speed=0, tty=True, write=frames.append)
    assert len(frames) > 5
    assert "\x1b[J" in frames[0] and "CH-3" in frames[0]
    assert frames[1].startswith("\x1b[")  # cursor moved up over the previous frame
    assert frames[-1].lstrip("\n").startswith("Summary:")


def test_plain_lines_when_not_a_terminal():
    lines: list[str] = []
    run_demo(readings=120, speed=0, echo=lines.append)
    text = "\n".join(lines)
    assert "Alder Bank cooling plant" in text and "-- plant time" in text and "Summary:" in text
    assert "\x1b[" not in text
