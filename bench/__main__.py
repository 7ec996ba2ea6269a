"""
Run benchmarks: ``python -m bench`` runs every module of this package that defines ``main()``;
``python -m bench NAME [NAME ...]`` runs only those. Each module prints its own figures.
"""

from __future__ import annotations

import importlib
import pkgutil
import sys

import bench
from listenpost.core.logs import configure


def main(argv: list[str] | None = None) -> int:
    names = sorted(m.name for m in pkgutil.iter_modules(bench.__path__) if not m.name.startswith("_"))
    wanted = (argv if argv is not None else sys.argv[1:]) or names
    unknown = sorted(set(wanted) - set(names))
    if unknown:
        print(f"bench: no benchmark named {', '.join(unknown)} (have: {', '.join(names)})", file=sys.stderr)
        return 2
    configure("console", "warning")  # the figures are the output; the components' info logs are noise here
    for name in wanted:
        module = importlib.import_module(f"bench.{name}")
        run = getattr(module, "main", None)
        if run is None:
            continue
        print(f"== bench.{name}", flush=True)
        run()
    return 0


if __name__ == "__main__":
    sys.exit(main())
