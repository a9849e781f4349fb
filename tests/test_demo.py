"""``whirlwatch demo`` runs to completion on a fresh folder and stops by itself."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest
from broker import find_mosquitto

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def test_demo_runs_and_stops_by_itself(tmp_path: Path) -> None:
    if find_mosquitto() is None:
        pytest.skip("the mosquitto binary is not installed (apt-get install mosquitto)")
    data = tmp_path / "demo"
    proc = subprocess.run(
        [sys.executable, "-c", "from monitor.cli import main; main()", "demo", "--for", "15",
         "--data-dir", str(data), "--port", "0"],
        capture_output=True, text=True, timeout=90, cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    assert (data / "whirlwatch.sqlite").is_file()
    assert re.search(r"login: demo-\w+ / \S+ \(engineer\)", out)
    # the console keeps to progress; the JSON-line logs go to the data folder
    assert (data / "whirlwatch.log").is_file() and '"logger":' not in out
    m = re.search(r"done: (\d+) messages published, (\d+) measurements", out)
    assert m and int(m.group(1)) > 0 and int(m.group(2)) > 0, out
