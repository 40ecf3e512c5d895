"""Run every benchmark (or the named ones) and print their tables.

Usage: ``python -m benchmarks [--quick] [--json FILE] [NAME ...]`` where NAME is e.g.
``measure`` for ``benchmarks/bench_measure.py``.
"""

from __future__ import annotations

import argparse
import importlib
import json
import pkgutil
import sys
import time
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    here = Path(__file__).parent
    names = sorted(m.name[len("bench_"):] for m in pkgutil.iter_modules([str(here)])
                   if m.name.startswith("bench_"))
    p = argparse.ArgumentParser(prog="python -m benchmarks")
    p.add_argument("names", nargs="*", help=f"benchmarks to run: {', '.join(names)} (default all)")
    p.add_argument("--quick", action="store_true", help="fewer trials and smaller inputs")
    p.add_argument("--json", metavar="FILE", help="write all numbers to FILE")
    args = p.parse_args(argv)
    selected = args.names or names
    unknown = [n for n in selected if n not in names]
    if unknown:
        p.error(f"unknown benchmark(s) {', '.join(unknown)}; choose from {', '.join(names)}")
    results = {}
    for name in selected:
        mod = importlib.import_module(f"benchmarks.bench_{name}")
        print(f"\n=== {name} ===", flush=True)
        t0 = time.perf_counter()
        results[name] = mod.run(quick=args.quick)
        print(f"({name}: {time.perf_counter() - t0:.1f} s)", flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=2, default=float))
    return 0


if __name__ == "__main__":
    sys.exit(main())
