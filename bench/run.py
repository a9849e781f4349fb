"""Benchmark runner: prints the project's figures beside floors measured in the same run.

Usage: ``python bench/run.py [SECTION ...]`` (default: every section). Each section is a
module ``bench/bench_<name>.py`` with a ``run(quick: bool) -> list[dict]`` function; each
row has ``name``, ``value``, ``unit`` and optionally ``floor``, ``ratio``, ``range`` (the
lowest and highest of the ratio, or of the value, over the turns of one run), ``target``.
Machines here are noisy, so targets are ratios to a floor measured in the same run.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _sections() -> dict[str, Path]:
    return {p.stem.removeprefix("bench_"): p for p in sorted(HERE.glob("bench_*.py"))}


def _load(path: Path):
    spec = importlib.util.spec_from_file_location(path.stem, path)
    mod = importlib.util.module_from_spec(spec)
    assert spec.loader is not None
    spec.loader.exec_module(mod)
    return mod


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("sections", nargs="*", help=f"any of: {', '.join(_sections())}")
    ap.add_argument("--quick", action="store_true", help="fewer repetitions (smoke run)")
    ap.add_argument("--json", action="store_true", help="print rows as JSON lines")
    args = ap.parse_args(argv)
    available = _sections()
    chosen = args.sections or list(available)
    unknown = [s for s in chosen if s not in available]
    if unknown:
        ap.error(f"unknown section {unknown[0]!r}; choose from {', '.join(available)}")
    failed = False
    for name in chosen:
        print(f"== {name}", flush=True)
        for row in _load(available[name]).run(quick=args.quick):
            if args.json:
                print(json.dumps(row))
                continue
            line = f"  {row['name']:<58} {row['value']:>12.4g} {row.get('unit', '')}"
            if "floor" in row:
                line += f"   floor {row['floor']:.4g} {row.get('unit', '')}"
            if "ratio" in row:
                line += f"   ratio {row['ratio']:.3g}"
            if "range" in row:
                line += f"   range {row['range'][0]:.3g}-{row['range'][1]:.3g}"
            if "target" in row:
                if "met" not in row:
                    raise ValueError(f"bench row {row['name']!r} states a target but no verdict")
                ok = bool(row["met"])
                line += f"   target {row['target']}  {'MET' if ok else 'NOT MET'}"
                failed |= not ok
            print(line, flush=True)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
