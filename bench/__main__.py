"""``python -m bench [NAME ...]`` runs the benchmarks (all, or those named)."""

from __future__ import annotations

import importlib
import pkgutil
import sys

import bench


def main(argv: list[str]) -> None:
    names = argv or sorted(
        m.name for m in pkgutil.iter_modules(bench.__path__) if m.name.startswith("bench_")
    )
    for name in names:
        module = name if name.startswith("bench_") else f"bench_{name}"
        mod = importlib.import_module(f"bench.{module}")
        print(f"== {mod.__name__}")
        mod.main()


if __name__ == "__main__":
    main(sys.argv[1:])
