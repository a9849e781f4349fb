"""The API description (dashboard/openapi.json) is a valid OpenAPI 3.1 document, states the
bounds and forms the server checks, and the live dashboard answers as it says.

- openapi-spec-validator checks the document against the OpenAPI 3.1.0 specification.
- Its bounds and patterns are the code's own: mode bounds (docs/registry.md, "Bounds, and
  why"), ids (BIGINT, ISO/IEC 9075, from memory), query times (RFC 3339 section 5.6),
  cursors, machine ids and non-blank texts.
- schemathesis runs against `whirlwatch dashboard` on a seeded store with every check
  (server errors, status codes and response schemas as documented, headers, content
  types, negative and positive data, authentication ignored, methods not allowed with
  their Allow header: RFC 9110 section 15.5.6), 25 examples per operation and round, a
  fixed seed, two minutes; any failure fails the test with schemathesis's report.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from dashboard_signin import dashboard_server, seed_template, seeded_copy
from openapi_spec_validator import validate

from dashboard.alarms import EPOCH_PATTERN, MAX_LIMIT
from dashboard.api import MAX_TREND_POINTS
from dashboard.ids import CURSOR_PATTERN, MAX_ID
from monitor.model.bounds import ID_PATTERN, MAX_TEXT, MODE_FREQUENCY_RANGE_HZ, NOT_BLANK
from monitor.store import Store
from monitor.store.auth import create_api_token

ROOT = Path(__file__).resolve().parent.parent
DOC = json.loads((ROOT / "dashboard" / "openapi.json").read_text(encoding="utf-8"))
SCHEMAS = DOC["components"]["schemas"]
#: Generated cases per operation and the seed (reproducible in CI; set WHIRLWATCH_API_FUZZ_SEED
#: to explore others).
MAX_EXAMPLES = 25
SEED = os.environ.get("WHIRLWATCH_API_FUZZ_SEED", "20261204")
#: Seconds schemathesis spends (its fuzzing and stateful phases repeat until they are
#: spent; some 4,000 cases on the CI host), and the hard limit of the whole run.
BUDGET_S = 120
TIME_LIMIT_S = 600


def parameters(name: str) -> list[dict]:
    return [p["schema"] for ops in DOC["paths"].values() for op in ops.values()
            for p in op.get("parameters", []) if p["name"] == name]


def test_the_document_is_valid_openapi_3_1():
    assert DOC["openapi"].startswith("3.1")
    validate(DOC)  # raises with the first violation of the OpenAPI 3.1 schema


def test_mode_bounds_are_the_registry_bounds():
    lo, hi = MODE_FREQUENCY_RANGE_HZ
    for name in ("ModeInput", "ModePatch"):
        p = SCHEMAS[name]["properties"]
        assert (p["frequency_hz"]["minimum"], p["frequency_hz"]["maximum"]) == (lo, hi) and lo > 0
        assert (p["damping_ratio"]["exclusiveMinimum"], p["damping_ratio"]["exclusiveMaximum"]) == (0, 1)
        assert p["amplification_factor"]["minimum"] == 1
        assert (p["required_margin_pct"]["minimum"], p["required_margin_pct"]["exclusiveMaximum"]) == (0, 100)
        assert p["name"]["pattern"] == NOT_BLANK and p["name"]["maxLength"] == MAX_TEXT
        assert SCHEMAS[name]["additionalProperties"] is False
    assert SCHEMAS["BaselineRestartInput"]["properties"]["comment"]["pattern"] == NOT_BLANK
    # An acknowledgement's comment is required and not blank (docs/alarms.md).
    ack = DOC["paths"]["/alarms/{alarm_id}/acknowledge"]["post"]["requestBody"]
    ack_schema = ack["content"]["application/json"]["schema"]
    assert ack["required"] is True and ack_schema["required"] == ["comment"]
    assert ack_schema["properties"]["comment"]["pattern"] == NOT_BLANK


def test_ids_times_and_cursors_are_stated_as_the_server_reads_them():
    for name in ("alarm_id", "spectrum_id", "mode_id"):
        for s in parameters(name):
            assert s == {"type": "integer", "format": "int64", "minimum": 1, "maximum": MAX_ID}
    for s in parameters("machine_id"):
        assert s["pattern"] == ID_PATTERN.pattern
    for name in ("from", "to"):
        for s in parameters(name):
            forms = s["anyOf"]
            assert {"format": "date-time"} in forms and {"format": "date"} in forms
            assert {"pattern": f"^{EPOCH_PATTERN}$"} in forms and {"maxLength": 0} in forms
    for s in parameters("cursor"):
        assert {"pattern": f"^{CURSOR_PATTERN.pattern}$"} in s["anyOf"]
    for s in parameters("limit"):
        assert s["maximum"] in (MAX_LIMIT,) and s["minimum"] == 1
    for s in parameters("max_points"):
        assert s["maximum"] == MAX_TREND_POINTS
    for name in ("Mode", "BaselineRestart", "AuditEvent", "Spectrum"):
        assert SCHEMAS[name]["properties"]["id"]["format"] == "int64"


@pytest.mark.slow
def test_the_live_api_answers_as_described(tmp_path_factory, tmp_path):
    tool = shutil.which("schemathesis", path=str(Path(sys.executable).parent)) or shutil.which("schemathesis")
    if tool is None:
        pytest.skip("schemathesis is not installed (the test extra has it)")
    url = seeded_copy(seed_template(tmp_path_factory.mktemp("fuzz")), tmp_path)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "ada", "api fuzzing")  # admin: every route
    finally:
        store.close()
    with dashboard_server(url) as port:
        done = subprocess.run(
            [tool, "--config-file", str(ROOT / "tests" / "schemathesis.toml"), "run",
             f"http://127.0.0.1:{port}/api/v1/openapi.json", "--checks", "all",
             "--max-examples", str(MAX_EXAMPLES), "--max-time", str(BUDGET_S), "--seed", SEED,
             "--workers", "1", "--no-color", "-H", f"Authorization: Bearer {token}"],
            capture_output=True, text=True, timeout=TIME_LIMIT_S, cwd=tmp_path)
    report = done.stdout + done.stderr
    tail = report[-6000:]
    assert done.returncode == 0, tail
    assert "passed" in report and " failures" not in report.split("SUMMARY")[-1], tail
