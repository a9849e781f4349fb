"""Defaults are written once, in the code, and every doc that states one states it as the
code has it (docs/configuration.md whole: tests/test_config.py; the default column of the
marked tables of docs/mqtt.md and docs/alarms.md here: monitor/doc_tables.py); the deploy
files agree too (tests/test_broker_defaults.py). Regenerate with
``python -m monitor.doc_tables``.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from monitor.doc_tables import DOCS, SOURCES, fill

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.parametrize("path", DOCS)
def test_every_defaults_table_is_the_codes(path):
    text = (ROOT / path).read_text(encoding="utf-8")
    assert "<!-- defaults: " in text
    assert fill(text, path) == text, f"{path} states defaults the code does not have: run python -m monitor.doc_tables"


def test_each_source_has_a_table():
    marked = {line.split()[2] for path in DOCS for line in (ROOT / path).read_text(encoding="utf-8").splitlines()
              if line.startswith("<!-- defaults: ")}
    assert marked == set(SOURCES)


def test_a_table_missing_a_key_or_naming_another_is_refused():
    table = "<!-- defaults: ingest -->\n| limit | default | why |\n|---|---|---|\n| `max_samples` | 1 | x |\n"
    with pytest.raises(ValueError, match="lacks"):
        fill(table)
    with pytest.raises(ValueError, match="'max_sample'"):
        fill(table.replace("max_samples", "max_sample"))
