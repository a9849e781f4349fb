"""``whirlwatch demo --embedded-broker``: the in-process amqtt broker (MQTT 3.1.1) instead of
Mosquitto, end to end, and the flag's place in the command line."""

from __future__ import annotations

import re
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from monitor.cli import main as cli

pytest.importorskip("amqtt", reason="the embedded broker is the `embedded-broker` extra (amqtt)")


def test_flag_is_documented_and_excludes_a_broker_url() -> None:
    runner = CliRunner()
    help_text = runner.invoke(cli, ["demo", "--help"]).output
    assert "--embedded-broker" in help_text
    res = runner.invoke(cli, ["demo", "--embedded-broker", "--broker", "mqtt://127.0.0.1:1"])
    assert res.exit_code == 2  # click's usage error
    assert "--embedded-broker" in res.output and "--broker" in res.output


@pytest.mark.slow
def test_demo_on_the_embedded_broker_stores_readings_and_alarms(tmp_path: Path) -> None:
    data = tmp_path / "demo"
    proc = subprocess.run(
        [sys.executable, "-c", "from monitor.cli import main; main()", "demo", "--embedded-broker",
         "--for", "20", "--data-dir", str(data), "--port", "0"],
        capture_output=True, text=True, timeout=90, cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    assert "embedded amqtt broker (MQTT 3.1.1)" in out, out
    assert "Mosquitto" not in out
    # No broker errors: a refused login or a failed session would be logged at WARNING+.
    log = (data / "whirlwatch.log").read_text()
    assert '"logger": "amqtt' not in proc.stderr, proc.stderr[-2000:]
    broker_trouble = [
        line for line in log.splitlines()
        if '"logger": "amqtt' in line and ('"level": "warning"' in line or '"level": "error"' in line)
    ]
    assert broker_trouble == [], broker_trouble[:5]
    m = re.search(r"done: (\d+) messages published, (\d+) measurements and (\d+) alarms", out)
    assert m, out
    db = data / "whirlwatch.sqlite"
    with sqlite3.connect(db) as conn:
        n_meas = conn.execute("SELECT count(*) FROM measurements").fetchone()[0]
        n_distinct = conn.execute(
            "SELECT count(*) FROM (SELECT DISTINCT machine_id, point_id, ts FROM measurements)").fetchone()[0]
        n_alarms = conn.execute("SELECT count(*) FROM alarms").fetchone()[0]
    assert (int(m.group(2)), int(m.group(3))) == (n_meas, n_alarms)
    assert int(m.group(1)) > 0
    assert n_meas > 0 and n_meas == n_distinct  # each reading once, through QoS 1 at least once
    assert n_alarms >= 1
