"""
Run benchmarks: ``python -m bench`` runs every module of this package that defines ``main()``;
``python -m bench NAME [NAME ...]`` runs only those. Each module prints its own figures; every ratio
comes from interleaved repeats and is printed as median and spread, and again in a table at the end.

``--quick`` runs each bench in its smallest setting (fewer rows, fewer rounds): it shows the harness
works, its figures are not the ones to quote. ``--json PATH`` also writes the ratios as JSON.
"""

from __future__ import annotations

import argparse
import importlib
import inspect
import json
import os
import pkgutil
import platform
import sys
import time
from pathlib import Path

import bench
from bench import _repeat
from listenpost.core.logs import configure


def machine() -> str:
    """``nproc``, the CPU model and the date, as the README's table states them."""
    model = platform.processor() or "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{os.cpu_count()} CPUs ({model}), {time.strftime('%Y-%m-%d')}"


def main(argv: list[str] | None = None) -> int:
    names = sorted(m.name for m in pkgutil.iter_modules(bench.__path__) if not m.name.startswith("_"))
    p = argparse.ArgumentParser(prog="python -m bench", description="listenpost benchmarks")
    p.add_argument(
        "names", nargs="*", metavar="NAME", help=f"benchmarks to run (default all: {', '.join(names)})"
    )
    p.add_argument("--quick", action="store_true", help="smallest setting of each bench (a smoke run)")
    p.add_argument("--json", type=Path, metavar="PATH", help="also write every ratio to PATH as JSON")
    args = p.parse_args(argv)
    wanted = args.names or names
    unknown = sorted(set(wanted) - set(names))
    if unknown:
        print(f"bench: no benchmark named {', '.join(unknown)} (have: {', '.join(names)})", file=sys.stderr)
        return 2
    _repeat.QUICK = args.quick
    _repeat.RESULTS.clear()
    configure(
        "console", "error"
    )  # the figures are the output; components' logs (board state changes included) are noise here
    print(f"machine: {machine()}{'; --quick' if args.quick else ''}", flush=True)
    for name in wanted:
        module = importlib.import_module(f"bench.{name}")
        run = getattr(module, "main", None)
        if run is None:
            continue
        print(f"== bench.{name}", flush=True)
        params = inspect.signature(run).parameters
        run(quick=args.quick) if "quick" in params else run([]) if "argv" in params else run()
    if _repeat.RESULTS:
        print("== summary: ratio | median | spread min-max | IQR | repeats")
        for r in _repeat.RESULTS:
            q1, q3 = r.iqr
            print(
                f"| {r.bench}: {r.name} | {r.median:.2f} | {min(r.values):.2f}-{max(r.values):.2f} "
                f"| {q1:.2f}-{q3:.2f} | {len(r.values)} |"
            )
    if args.json is not None:
        args.json.write_text(
            json.dumps(
                {"machine": machine(), "quick": args.quick, "ratios": [r.as_dict() for r in _repeat.RESULTS]},
                indent=1,
            )
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
