"""``whirlwatch demo``: runs on a fresh folder, serves until interrupted (``--for`` still
stops it), prints an engineer and an admin login and the command that opens its data
again, and that command serves the demo's store."""

from __future__ import annotations

import re
import shlex
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import pytest
from broker import find_mosquitto
from dashboard_signin import dashboard_server, raw_sign_in, request

from monitor.demo import run_demo

pytestmark = [pytest.mark.broker, pytest.mark.slow]

DEMO = [sys.executable, "-c", "from monitor.cli import main; main()", "demo"]


@pytest.fixture(autouse=True)
def _needs_mosquitto() -> None:
    if find_mosquitto() is None:
        pytest.skip("the mosquitto binary is not installed (apt-get install mosquitto)")


def test_demo_stops_after_for_and_its_data_opens_again(tmp_path: Path) -> None:
    data = tmp_path / "demo"
    proc = subprocess.run([*DEMO, "--for", "15", "--data-dir", str(data), "--port", "0"],
                          capture_output=True, text=True, timeout=90, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    assert (data / "whirlwatch.sqlite").is_file()
    engineer = re.search(r"login: (demo-\w+) / (\S+) \(engineer", out)
    admin = re.search(r"login: (demo-admin-\w+) / (\S+) \(admin", out)
    assert engineer and admin, out
    # the console keeps to progress; the JSON-line logs go to the data folder
    assert (data / "whirlwatch.log").is_file() and '"logger":' not in out
    m = re.search(r"done: (\d+) messages published, (\d+) measurements", out)
    assert m and int(m.group(1)) > 0 and int(m.group(2)) > 0, out
    # Before: the obvious next command opened an empty store in the current folder.
    again = re.search(r"open the dashboard on this data again: (whirlwatch dashboard .+)", out)
    assert again, out
    args = shlex.split(again.group(1))
    assert args[:3] == ["whirlwatch", "dashboard", "--database"]
    assert args[3] == f"sqlite:///{(data / 'whirlwatch.sqlite').resolve()}"
    with dashboard_server(args[3]) as port:
        cookie = raw_sign_in(port, admin.group(1), admin.group(2))
        status, _, html = request(port, "GET", "/users", headers={"Cookie": cookie})
        # The admin login reaches the admin pages and sees both demo users.
        assert status == 200
        assert f'data-user="{admin.group(1)}"' in html and f'data-user="{engineer.group(1)}"' in html


def test_demo_serves_after_the_replay_until_stopped(tmp_path: Path) -> None:
    lines: list[str] = []
    stop = threading.Event()
    result: dict = {}

    def go() -> None:
        result["demo"] = run_demo(data_dir=tmp_path / "demo", port=0, say=lines.append, stop=stop,
                                  replay_s=3.0)

    runner = threading.Thread(target=go, name="demo-under-test")
    runner.start()
    try:
        deadline = time.monotonic() + 90
        while not any(line.startswith("replay finished") for line in lines):
            assert runner.is_alive() and time.monotonic() < deadline, lines
            time.sleep(0.2)
        url = next(line.split(" ", 1)[1] for line in lines if line.startswith("dashboard: "))
        assert "serving until Ctrl-C" in lines
        # Before: the demo stopped serving after its fixed 120 s; now nothing stops it but
        # the stop signal. Still serving well after the replay ended:
        time.sleep(6)
        assert runner.is_alive()
        with urllib.request.urlopen(url + "login", timeout=5) as resp:
            assert resp.status == 200
    finally:
        stop.set()
        runner.join(60)
    assert not runner.is_alive()
    assert result["demo"].published > 0 and result["demo"].measurements > 0


def test_ctrl_c_stops_the_demo_cleanly(tmp_path: Path) -> None:
    data = tmp_path / "demo"
    proc = subprocess.Popen([*DEMO, "--data-dir", str(data), "--port", "0"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    try:
        assert proc.stdout is not None
        seen = []
        deadline = time.monotonic() + 60
        for line in proc.stdout:  # bounded: the demo prints a line at least every 5 s
            seen.append(line)
            if line.startswith("serving until Ctrl-C") or time.monotonic() > deadline:
                break
        assert seen and seen[-1].startswith("serving until Ctrl-C"), seen
        proc.send_signal(signal.SIGINT)
        rest, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err[-2000:]
    assert re.search(r"done: \d+ messages published", rest), rest
