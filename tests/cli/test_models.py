"""Model management, single readings, predictions, snapshots, drift view and exit codes, against a live server."""

from __future__ import annotations

import csv
import io
import subprocess
import sys


from tests.cli.conftest import out_json


def test_create_from_flags_show_list_delete(cli, name):
    r = cli("create", name, "-f", "load_kw", "-f", "condenser_c", "--forgetting", "0.999")
    assert r.exit_code == 0 and "created" in r.output
    r = cli("create", name, "--feature", "load_kw,condenser_c", "--forgetting", "0.999")
    assert r.exit_code == 0 and "unchanged" in r.output
    r = cli("create", name, "-f", "load_kw", "-f", "condenser_c")  # a different configuration
    assert r.exit_code == 1 and "different configuration" in r.output
    assert name in cli("list").output
    assert name in [m["name"] for m in out_json(cli("list", json_out=True))]
    shown = out_json(cli("show", name, json_out=True))
    assert shown["config"]["forgetting"] == 0.999 and shown["n"] == 0 and shown["drift"]["status"] == "ok"
    table = cli("show", name).output
    assert "condenser_c" in table and "drift" in table
    assert cli("delete", name, "--yes").exit_code == 0
    r = cli("show", name)
    assert r.exit_code == 3 and name in r.output


def test_create_from_toml_and_json_files(cli, name, tmp_path):
    toml = tmp_path / "ahu.toml"
    toml.write_text('features = ["supply_c", "fan_pct"]\nintercept = true\nridge = 0.01\n')
    assert cli("create", name, "--file", str(toml)).exit_code == 0
    assert out_json(cli("show", name, json_out=True))["config"]["ridge"] == 0.01
    js = tmp_path / "pump.json"
    js.write_text('{"features": ["flow_m3h"], "half_life": 86400}')
    assert cli("create", name + "-p", "--file", str(js)).exit_code == 0
    assert out_json(cli("show", name + "-p", json_out=True))["config"]["half_life"] == 86400
    bad = tmp_path / "bad.toml"
    bad.write_text("features = [")
    r = cli("create", name + "-x", "--file", str(bad))
    assert r.exit_code == 2 and "TOML" in r.output
    r = cli("create", name + "-y", "--file", str(js), "-f", "a")
    assert r.exit_code == 2


def test_post_predict_and_refused_values(cli, name):
    cli("create", name, "-f", "load_kw", "-f", "condenser_c")
    for load, cond, power in [(300, 22, 120.0), (500, 25, 160.0), (700, 28, 205.0), (400, 30, 150.0), (650, 21, 170.0)]:
        r = cli("post", name, f"load_kw={load}", f"condenser_c={cond}", "--y", str(power))
        assert r.exit_code == 0, r.output
    r = cli("post", name, "550", "26", "--y", "175", json_out=True)
    assert out_json(r)["n"] == 6
    r = cli("post", name, "load_kw=1", "pressure=2", "--y", "3")
    assert r.exit_code == 2 and "pressure" in r.output
    r = cli("post", name, "1", "2", "--y", "abc")
    assert r.exit_code == 2
    pred = out_json(cli("predict", name, "load_kw=550", "condenser_c=26", json_out=True))
    assert pred["lower"] < pred["mean"] < pred["upper"] and pred["level"] == 0.95
    assert "interval" in cli("predict", name, "550", "26", "--level", "0.9").output


def test_predict_csv_writes_csv(cli, name, tmp_path):
    cli("create", name, "-f", "a", "-f", "b")
    for a, b, y in [(1, 2, 5.1), (2, 1, 4.9), (3, 3, 9.2), (4, 1, 6.8), (0, 5, 10.1)]:
        cli("post", name, str(a), str(b), "--y", str(y))
    plan = tmp_path / "plan.csv"
    plan.write_text("tag,A,b\nx1,1.5,2\nx2,2.5,0.5\n")
    out = tmp_path / "out.csv"
    r = cli("predict", name, "--csv", str(plan), "-c", "a=A", "--out", str(out))
    assert r.exit_code == 0, r.output
    rows = list(csv.DictReader(out.open()))
    assert [row["tag"] for row in rows] == ["x1", "x2"]
    single = out_json(cli("predict", name, "a=1.5", "b=2", json_out=True))
    assert float(rows[0]["mean"]) == single["mean"]
    r = cli("predict", name, "--csv", str(plan))  # 'a' is not a column and not mapped
    assert r.exit_code == 2 and "'a'" in r.output
    r = cli("predict", name, "--csv", str(plan), "-c", "a=A")
    assert r.exit_code == 0 and list(csv.reader(io.StringIO(r.stdout)))[0][-5:] == [
        "mean", "lower", "upper", "se_fit", "se_prediction"]


def test_snapshot_restore_reset(cli, name):
    cli("create", name, "-f", "a")
    for i in range(5):
        cli("post", name, str(i), "--y", str(2 * i + 1))
    snap = out_json(cli("snapshot", name, "--label", "before cleaning", json_out=True))
    assert snap["n"] == 5
    assert "before cleaning" in cli("snapshots", name).output
    assert cli("reset", name, "--yes").exit_code == 0
    assert out_json(cli("show", name, json_out=True))["n"] == 0
    r = cli("restore", name, str(snap["id"]))
    assert r.exit_code == 0 and "5 observations" in r.output
    assert out_json(cli("show", name, json_out=True))["n"] == 5
    assert cli("delete-snapshot", name, str(snap["id"])).exit_code == 0
    r = cli("restore", name, str(snap["id"]))
    assert r.exit_code == 3 and "snapshot" in r.output
    r = cli("reset", name, input="n\n")  # declined at the prompt
    assert r.exit_code == 1 and out_json(cli("show", name, json_out=True))["n"] == 5


def test_drift_views(cli, name):
    cli("create", name, "-f", "a")
    for i in range(30):
        cli("post", name, str(i % 7), "--y", str(3.0 * (i % 7) + (0.1 if i % 2 else -0.1)))
    r = cli("drift", name)
    assert r.exit_code == 0 and "drift" in r.output and "mean CUSUM" in r.output
    report = out_json(cli("drift", name, json_out=True))
    assert report["status"] in ("ok", "watch", "alarm")
    every = cli("drift")
    assert every.exit_code == 0 and name in every.output
    assert name in [m["name"] for m in out_json(cli("drift", json_out=True))]
    assert cli("covariance", name).exit_code == 0


def test_exit_codes_unknown_model_and_server_down(cli):
    r = cli("show", "no-such-chiller")
    assert r.exit_code == 3 and "no-such-chiller" in r.output
    r = cli("list", url="http://127.0.0.1:9")
    assert r.exit_code == 4 and "http://127.0.0.1:9" in r.output


def test_real_console_script_exit_code_and_env_url(live_server):
    """The command as a shell runs it: a subprocess, the URL from LEASTWISE_URL."""
    import os

    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    env = {**os.environ, "LEASTWISE_URL": live_server.url,
           "PYTHONPATH": os.pathsep.join([str(root / "service"), str(root / "client")])}
    p = subprocess.run([sys.executable, "-m", "leastwise", "show", "ghost-chiller"], env=env, capture_output=True,
                       text=True, timeout=60)
    assert p.returncode == 3 and "ghost-chiller" in p.stderr
    p = subprocess.run([sys.executable, "-m", "leastwise", "list", "-o", "json"], env=env, capture_output=True,
                       text=True, timeout=60)
    assert p.returncode == 0 and isinstance(__import__("json").loads(p.stdout), list)
