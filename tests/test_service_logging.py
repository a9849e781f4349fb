"""The service's log is JSON lines only: Python and numpy warnings go through the logger.

JSON Lines (jsonlines.org): one JSON value per line. numpy reports floating-point overflow
as a RuntimeWarning (numpy.seterr, default "warn"); a waveform at the float32 limit makes
one (issue 11), which used to reach stderr as plain text between the JSON lines.
"""

from __future__ import annotations

import base64
import io
import json
import logging
import signal
import sys
import threading
import warnings
from pathlib import Path

import numpy as np
import pytest
from broker import PrivateBroker, publish_many
from service_helpers import (
    measurement_count,
    plant_store,
    service_process,
    traffic,
    wait_for,
    wait_started,
)

from monitor.service.logs import configure_logging


def test_warnings_are_json_log_records() -> None:
    root = logging.getLogger()
    saved = (root.handlers[:], root.level, sys.excepthook, threading.excepthook)
    out = io.StringIO()
    try:
        with warnings.catch_warnings():  # puts warnings.showwarning back afterwards
            warnings.simplefilter("always")
            configure_logging("INFO", out)
            with np.errstate(over="warn"):
                # float32 holds at most about 3.4e38 (IEEE 754 binary32).
                product = np.float32(3.0e38) * np.float32(10.0)
            warnings.warn("a plain Python warning", UserWarning, stacklevel=1)
    finally:
        root.handlers[:], root.level = saved[0], saved[1]
        sys.excepthook, threading.excepthook = saved[2], saved[3]
    assert np.isinf(product)
    records = [json.loads(line) for line in out.getvalue().splitlines()]
    assert [(r["logger"], r["level"], r["category"]) for r in records] == [
        ("py.warnings", "warning", "RuntimeWarning"), ("py.warnings", "warning", "UserWarning")]
    assert "overflow" in records[0]["msg"] and records[1]["msg"] == "a plain Python warning"
    assert records[0]["where"].rsplit(":", 1)[1].isdigit()  # file:line of the warning


def at_float32_limit(message: tuple[str, bytes]) -> tuple[str, bytes]:
    """``message`` with its samples scaled so the largest is 3.4e38 (float32's maximum is
    about 3.40282e38, IEEE 754 binary32)."""
    topic, payload = message
    body = json.loads(payload)
    x = np.frombuffer(base64.b64decode(body["samples_f32"]), "<f4").astype(np.float64)
    body["samples_f32"] = base64.b64encode((x / np.abs(x).max() * 3.4e38).astype("<f4").tobytes()).decode()
    return topic, json.dumps(body).encode()


@pytest.mark.broker
def test_service_log_stays_json_lines_with_a_float32_limit_waveform(
    fresh_mosquitto: PrivateBroker, tmp_path: Path
) -> None:
    # Ingest refuses such a block before any arithmetic overflows (`samples_absurd`,
    # docs/mqtt.md); whatever the service says about it is JSON lines.
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    msgs = [m for m in traffic("ab-1", 0, 30) if m[0].endswith("/waveform")][-4:]
    msgs[-1] = at_float32_limit(msgs[-1])
    proc = service_process(fresh_mosquitto.url, url, tmp_path, client_id="svc-log")
    try:
        wait_started(tmp_path, "svc-log")
        publish_many(fresh_mosquitto, msgs)
        assert wait_for(lambda: measurement_count(url)[0] >= len(msgs) - 1, 30, 0.2)
        log_file = tmp_path / "svc-log.log"
        assert wait_for(lambda: "samples_absurd" in log_file.read_text(errors="replace"), 30, 0.2)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    lines = (tmp_path / "svc-log.log").read_text(errors="replace").splitlines()
    records = [json.loads(line) for line in lines]  # every line is one JSON object
    assert all(isinstance(r, dict) for r in records)
    rejected = [r for r in records if r["msg"] == "message rejected"]
    assert [r["reason"] for r in rejected] == ["samples_absurd"], rejected
    assert measurement_count(url) == (len(msgs) - 1, len(msgs) - 1)
