"""``leastwise import``: exactness against a batch solve, resuming without double counting, column errors.

Reference: ``numpy.linalg.lstsq`` (SVD-based, backward stable) on the full
design matrix ``[1, load, cond]`` of the same rows, read back from the CSV
text so both sides see identical doubles.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from leastwise.commands import file_digest
from leastwise_client import Client
from tests.cli.conftest import out_json

ROOT = Path(__file__).resolve().parents[2]


def _write_csv(path: Path, n: int, seed: int = 11) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    load = rng.uniform(150.0, 950.0, n)
    cond = rng.uniform(19.0, 33.0, n)
    power = 13.5 + 0.158 * load + 2.31 * cond + rng.normal(0.0, 2.5, n)
    with path.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["stamp", "Load (kW)", "cond_in", "meter_kw"])
        for i in range(n):
            w.writerow([f"2025-04-01T{i // 60 % 24:02d}:{i % 60:02d}:00Z" if n <= 1440 else 1.7e9 + 60 * i,
                        repr(float(load[i])), repr(float(cond[i])), repr(float(power[i]))])
    # what the CSV holds, parsed back as the command parses it
    rows = list(csv.DictReader(path.open()))
    X = np.array([[1.0, float(r["Load (kW)"]), float(r["cond_in"])] for r in rows])
    y = np.array([float(r["meter_kw"]) for r in rows])
    return X, y


def _coefficients(cli, name) -> np.ndarray:
    body = out_json(cli("show", name, json_out=True))
    return np.array([body["coefficients"][t] for t in ("intercept", "load_kw", "condenser_c")]), body["n"]


IMPORT = ["--target", "meter_kw", "-c", "load_kw=Load (kW)", "-c", "condenser_c=cond_in"]


def test_import_equals_batch_solve(cli, name, tmp_path):
    path = tmp_path / "ch2-april.csv"
    X, y = _write_csv(path, 1000)
    cli("create", name, "-f", "load_kw", "-f", "condenser_c")
    r = cli("import", name, str(path), *IMPORT, "--time-column", "stamp", "--batch-size", "128")
    assert r.exit_code == 0, r.output
    assert "1000 rows: 1000 applied" in r.output
    got, n = _coefficients(cli, name)
    ref = np.linalg.lstsq(X, y, rcond=None)[0]
    assert n == 1000
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=0)


def test_resume_after_a_partial_import_does_not_double_count(cli, name, tmp_path):
    path = tmp_path / "ch1.csv"
    X, y = _write_csv(path, 700, seed=5)
    cli("create", name, "-f", "load_kw", "-f", "condenser_c")
    first = out_json(cli("import", name, str(path), *IMPORT, "--limit", "250", "--batch-size", "100", json_out=True))
    assert (first["applied"], first["n"]) == (250, 250)
    again = out_json(cli("import", name, str(path), *IMPORT, "--batch-size", "64", json_out=True))
    assert (again["applied"], again["duplicates"], again["n"]) == (450, 250, 700)
    assert again["key_prefix"] == f"csv-{file_digest(path)}"
    got, n = _coefficients(cli, name)
    np.testing.assert_allclose(got, np.linalg.lstsq(X, y, rcond=None)[0], rtol=1e-10, atol=0)
    # a third run changes nothing
    third = out_json(cli("import", name, str(path), *IMPORT, json_out=True))
    assert (third["applied"], third["duplicates"], third["n"]) == (0, 700, 700)


def test_killed_import_resumes_exactly(live_server, cli, name, tmp_path):
    """The import process is killed (SIGKILL) mid-file; the same command run again completes it, each row once."""
    path = tmp_path / "big.csv"
    X, y = _write_csv(path, 6000, seed=8)
    cli("create", name, "-f", "load_kw", "-f", "condenser_c")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "service"), str(ROOT / "client")]),
           "LEASTWISE_URL": live_server.url}
    argv = [sys.executable, "-m", "leastwise", "import", name, str(path), *IMPORT, "--batch-size", "20"]
    proc = subprocess.Popen(argv, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    with Client(live_server.url, trust_env=False) as lw:
        deadline = time.monotonic() + 60
        while lw.model(name).n < 400 and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.02)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        # A batch the importer sent just before it died may still be committed: wait until n settles.
        done, previous = lw.model(name).n, -1
        while done != previous:
            time.sleep(0.3)
            previous, done = done, lw.model(name).n
    assert 0 < done < 6000, done
    resumed = out_json(cli("import", name, str(path), *IMPORT, json_out=True))
    assert resumed["duplicates"] == done and resumed["applied"] == 6000 - done and resumed["n"] == 6000
    got, _ = _coefficients(cli, name)
    np.testing.assert_allclose(got, np.linalg.lstsq(X, y, rcond=None)[0], rtol=1e-10, atol=0)


def test_bad_column_and_bad_value(cli, name, tmp_path):
    path = tmp_path / "x.csv"
    _write_csv(path, 20)
    cli("create", name, "-f", "load_kw", "-f", "condenser_c")
    r = cli("import", name, str(path), "--target", "meter_kw", "-c", "load_kw=Load (kW)")  # condenser_c unmapped
    assert r.exit_code == 2 and "'condenser_c'" in r.output and "cond_in" in r.output  # names it, lists the columns
    r = cli("import", name, str(path), *IMPORT[2:], "--target", "power")
    assert r.exit_code == 2 and "'power'" in r.output
    r = cli("import", name, str(path), *IMPORT, "-c", "humidity=stamp")
    assert r.exit_code == 2 and "humidity" in r.output
    bad = tmp_path / "bad.csv"
    bad.write_text(path.read_text().replace("\n", "\nnot-a-time,1.0,oops,3.0\n", 1).replace("\r", ""))
    r = cli("import", name, str(bad), *IMPORT)
    assert r.exit_code == 2 and "row 1" in r.output and "'cond_in'" in r.output and "oops" in r.output
    assert out_json(cli("show", name, json_out=True))["n"] == 0  # checked before anything was sent
    r = cli("import", "no-such-model", str(path), *IMPORT)
    assert r.exit_code == 3 and "no-such-model" in r.output
