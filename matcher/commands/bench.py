"""``matcher bench NAME``: benchmarks an operator runs to size a machine.

Each benchmark lives in :mod:`matcher.bench` as a module with
``register(subparsers)``; each prints its figures and the ratio against a
baseline measured in the same run (never a fixed time budget).
"""

from __future__ import annotations

import importlib
import pkgutil

__all__ = ["register"]


def register(sub) -> None:
    parser = sub.add_parser("bench", help="benchmarks that print ratios against a baseline run alongside")
    bench_sub = parser.add_subparsers(dest="bench", metavar="BENCHMARK")
    bench_sub.required = True
    import matcher.bench as benches

    for info in sorted(pkgutil.iter_modules(benches.__path__), key=lambda m: m.name):
        if info.name.startswith("_"):
            continue
        importlib.import_module(f"matcher.bench.{info.name}").register(bench_sub)
