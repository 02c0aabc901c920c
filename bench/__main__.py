"""Run every ``bench_*`` module's ``run()`` and print its rows as a table.

Usage: ``python -m bench [NAME ...]`` runs only modules whose name contains a NAME.
Exit code 1 if a module raised or any row reports a missed target (``ok`` or ``met`` false);
the others still run, and the missed rows are listed at the end.
"""

from __future__ import annotations

import importlib
import pkgutil
import sys
import time
import traceback
from pathlib import Path


def discover(filters: list[str]) -> list[str]:
    here = Path(__file__).resolve().parent
    names = sorted(m.name for m in pkgutil.iter_modules([str(here)])
                   if m.name.startswith("bench_"))
    return [n for n in names if not filters or any(f in n for f in filters)]


def format_table(rows: list[dict]) -> str:
    """Columns are the union of the rows' keys, in order of first appearance."""
    columns: list[str] = []
    for row in rows:
        columns += [k for k in row if k not in columns]
    cells = [[str(row.get(c, "")) for c in columns] for row in rows]
    widths = [max([len(c)] + [len(r[i]) for r in cells]) for i, c in enumerate(columns)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(columns, widths, strict=True))]
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)) for r in cells]
    return "\n".join(lines)


def missed(rows: list[dict]) -> list[dict]:
    """Rows whose own verdict (``ok`` or ``met``) says the target was not reached."""
    return [r for r in rows if r.get("ok", r.get("met", True)) is False]


def main(argv: list[str]) -> int:
    failed = 0
    short: list[str] = []
    for name in discover(argv):
        print(f"== {name}", flush=True)
        t0 = time.perf_counter()
        try:
            rows = importlib.import_module(f"bench.{name}").run()
        except Exception:  # a broken benchmark must not hide the others
            traceback.print_exc()
            failed += 1
            continue
        rows = list(rows or [])
        print(format_table(rows))
        print(f"({time.perf_counter() - t0:.1f} s)\n", flush=True)
        short += [f"{name}: {r}" for r in missed(rows)]
    if short:
        print("Targets missed:\n" + "\n".join(f"  {line}" for line in short))
    return 1 if failed or short else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
