"""The defaults the docs state, written from the code that holds them.

docs/configuration.md is generated whole from the settings registry
(:func:`monitor.config.render_docs`). The other docs keep their own words and let the code
fill the default of each row: a table right after a line
``<!-- defaults: NAME ... -->`` has its rows keyed by the first column (a name in
backticks), and its ``default`` column is written from :data:`SOURCES` ``[NAME]``:

- ``broker``: the service file's ``[broker]`` settings (:data:`monitor.settings.SETTINGS`);
- ``ingest``: the plausibility limits of inbound messages
  (:class:`monitor.io.ingest_limits.IngestLimits`);
- ``detection``: a machine's detection settings
  (:class:`monitor.model.detection_settings.DetectionSettings`).

``python -m monitor.doc_tables`` rewrites the docs; tests/test_doc_tables.py fails when a
doc and the code differ, or a table misses a key the code has or names one it lacks.
"""

from __future__ import annotations

import dataclasses
import re
import sys
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
#: The docs whose tables are filled (paths relative to the repository).
DOCS = ("docs/mqtt.md", "docs/alarms.md")
_MARK = re.compile(r"^<!-- defaults: (?P<name>[a-z_]+)\b.*-->$")


def shown(value: Any) -> str:
    """A default as a table cell: TOML's spelling (what a file would hold), ``none`` for
    no value."""
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "`true`" if value else "`false`"
    if isinstance(value, tuple | list):
        return "`[" + ", ".join(repr(v) for v in value) + "]`"
    if isinstance(value, str):
        return f'`"{value}"`'
    return f"`{value!r}`"


def _broker() -> dict[str, Any]:
    from monitor.settings import SETTINGS

    return {s.name: s.default for s in SETTINGS if s.section == "broker"}


def _dataclass_defaults(cls: type) -> dict[str, Any]:
    return {f.name: f.default for f in dataclasses.fields(cls)}


def _ingest() -> dict[str, Any]:
    from monitor.io.ingest_limits import IngestLimits

    return _dataclass_defaults(IngestLimits)


def _detection() -> dict[str, Any]:
    from monitor.model.detection_settings import DetectionSettings

    return _dataclass_defaults(DetectionSettings)


#: Where each table's defaults come from, by the name its marker gives.
SOURCES: Mapping[str, Callable[[], dict[str, Any]]] = {
    "broker": _broker, "ingest": _ingest, "detection": _detection,
}


def _cells(line: str) -> list[str]:
    return [c.strip() for c in line.strip().strip("|").split("|")]


def fill(text: str, where: str = "doc") -> str:
    """``text`` with the default column of every marked table written from the code;
    ValueError naming the doc and the key for a row the code lacks or a key no row has."""
    lines = text.split("\n")
    i = 0
    while i < len(lines):
        m = _MARK.match(lines[i])
        i += 1
        if not m:
            continue
        name = m.group("name")
        if name not in SOURCES:
            raise ValueError(f"{where}: the defaults table {name!r} has no source; one of {', '.join(SOURCES)}.")
        defaults = SOURCES[name]()
        header = _cells(lines[i])
        col = header.index("default")
        seen = set()
        i += 2  # the header and its rule
        while i < len(lines) and lines[i].startswith("|"):
            cells = _cells(lines[i])
            key = cells[0].strip("`")
            if key not in defaults:
                raise ValueError(f"{where}: the {name} table names {key!r}, which the code does not have.")
            cells[col] = shown(defaults[key])
            lines[i] = "| " + " | ".join(cells) + " |"
            seen.add(key)
            i += 1
        missing = sorted(set(defaults) - seen)
        if missing:
            raise ValueError(f"{where}: the {name} table lacks {', '.join(missing)}.")
    return "\n".join(lines)


def main(root: Path = ROOT) -> list[str]:
    """Rewrite every doc of :data:`DOCS` (and docs/configuration.md); the paths changed."""
    from monitor.config import render_docs

    changed = []
    targets = {path: fill((root / path).read_text(encoding="utf-8"), path) for path in DOCS}
    targets["docs/configuration.md"] = render_docs()
    for path, new in targets.items():
        file = root / path
        if file.read_text(encoding="utf-8") != new:
            file.write_text(new, encoding="utf-8")
            changed.append(path)
    return changed


if __name__ == "__main__":  # pragma: no cover
    for path in main():
        print(f"rewrote {path}", file=sys.stderr)
