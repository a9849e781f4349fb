"""axe-core (the npm package pinned in tests/browser/package.json) run inside a page of a
playwright browser: the accessibility check of the browser tests.

axe-core judges a page against WCAG 2.0/2.1 A and AA and its own best-practice rules and
gives each violation an impact (minor, moderate, serious, critical); the tests fail on
serious and critical ones. ``.ci/run`` installs the package with ``npm ci``; without it
:func:`axe_source` names what is missing and the tests skip.
"""

from __future__ import annotations

from pathlib import Path

#: Where ``npm ci`` in tests/browser puts the script.
AXE_JS = Path(__file__).resolve().parent / "browser" / "node_modules" / "axe-core" / "axe.min.js"
#: Impacts that fail a page (axe-core's two highest of four).
FAILING = ("serious", "critical")


def axe_source() -> tuple[str | None, str]:
    """The text of axe.min.js, or None and why it is missing."""
    if not AXE_JS.exists():
        return None, (f"axe-core is not installed at {AXE_JS}: run `npm ci` in tests/browser "
                      "(.ci/run does when npm is installed)")
    return AXE_JS.read_text(encoding="utf-8"), ""


def audit(page, source: str) -> list[dict]:
    """Every axe-core violation on ``page`` as it is now (all rules axe-core runs by
    default), each with its id, impact, help, helpUrl and nodes (target, summary)."""
    if not page.evaluate("() => typeof window.axe === 'object'"):
        # Evaluated through the browser's debugging protocol, which the page's Content
        # Security Policy (script-src 'self') does not govern; a <script> tag it would block.
        page.evaluate(source + "\n;undefined")
    return page.evaluate("""async () => {
        const r = await axe.run(document, { resultTypes: ["violations"] });
        return r.violations.map(v => ({ id: v.id, impact: v.impact, help: v.help, helpUrl: v.helpUrl,
            nodes: v.nodes.map(n => ({ target: n.target.join(" "), summary: n.failureSummary })) }));
    }""")


def failing(violations: list[dict]) -> list[dict]:
    """The violations whose impact fails a page."""
    return [v for v in violations if v["impact"] in FAILING]


def describe(name: str, violations: list[dict]) -> str:
    """One line per violation and one indented line per element it found: what a failing
    test prints."""
    lines = []
    for v in violations:
        lines.append(f"{name}: {v['impact']} {v['id']} ({len(v['nodes'])}): {v['help']} <{v['helpUrl']}>")
        for n in v["nodes"][:10]:
            lines.append(f"    {n['target']}: {(n['summary'] or '').splitlines()[-1].strip()}")
        if len(v["nodes"]) > 10:
            lines.append(f"    ... and {len(v['nodes']) - 10} more")
    return "\n".join(lines)
