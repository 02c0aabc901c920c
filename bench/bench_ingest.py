"""Benchmark: load 1,000,000 defect events from CSV into shift counts.

Target: at most 15 s and 1 GB peak memory (2-core machine), and at least 20x faster than a
naive row-by-row ORM insert of the same file, measured in the same run.

How it is measured:

* a seeded generator writes an events CSV (strictly increasing instants over ~60 days
  with the plant offset, e.g. ``2026-02-16T06:00:04-0600``, across a clock change;
  4 lines, 6 categories, quantity mostly 1) and a plant config;
* the fast path (:func:`qcfit.ingest.load_events_file` on a fresh SQLite store made by
  ``init_store``) runs in a child process: wall time of the load call, and the child's
  peak resident memory (``ru_maxrss``: the whole process, interpreter and libraries
  included); best of three runs, each on its own fresh store;
* the naive path runs in another child on a fresh store: ``csv.DictReader``, one ORM object
  per event, a shift lookup and a count lookup per row, ``session.flush()`` after every row,
  one commit at the end (one transaction, like the fast path, so the ratio measures per-row
  work, not disk syncs). It is timed on the first ``naive_rows`` rows (default 20,000) and
  extrapolated linearly to the full file; the row says so.

Run alone: ``python bench/bench_ingest.py [N]``; ``python -m bench`` calls :func:`run`.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

N_EVENTS = 1_000_000
NAIVE_ROWS = 20_000
FAST_REPEATS = 3
TARGET_SECONDS = 15.0
TARGET_MB = 1024.0
TARGET_RATIO = 20.0
SEED = 20260216
LINES = ("L1", "L2", "L3", "L4")
CATEGORIES = ("SCR", "DNT", "FL", "SH", "BUR", "OTH")
ZONE = "America/Chicago"
FIRST = "2026-02-16T06:00:00"  # local; the window crosses the 2026-03-08 clock change

CONFIG = f"""\
[plant]
name = "Benchmark plant (invented)"
timezone = "{ZONE}"

[[shift]]
name = "A"
start = "06:00"
end = "14:00"

[[shift]]
name = "B"
start = "14:00"
end = "22:00"

[[shift]]
name = "C"
start = "22:00"
end = "06:00"

[lines]
{chr(10).join(f'{c} = "Line {c[1:]}"' for c in LINES)}

[categories]
{chr(10).join(f'{c} = "{c.lower()}"' for c in CATEGORIES)}
"""


def write_inputs(folder: Path, n: int, seed: int = SEED) -> tuple[Path, Path]:
    """The plant config and an events CSV of ``n`` rows (seeded)."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp(FIRST, tz=ZONE).tz_convert("UTC")
    mean_gap = 60 * 86400 / n
    gaps = 1 + np.floor(rng.exponential(max(mean_gap - 1, 0.001), n)).astype(np.int64)
    instants = start + pd.to_timedelta(np.cumsum(gaps), unit="s")
    stamps = pd.DatetimeIndex(instants).tz_convert(ZONE).strftime("%Y-%m-%dT%H:%M:%S%z")
    lines = np.asarray(LINES)[rng.integers(0, len(LINES), n)]
    cats = np.asarray(CATEGORIES)[
        rng.choice(len(CATEGORIES), n, p=[0.3, 0.25, 0.15, 0.12, 0.1, 0.08])
    ]
    qty = 1 + rng.binomial(2, 0.05, n)
    frame = pd.DataFrame({"timestamp": stamps, "line": lines, "category": cats, "quantity": qty})
    csv_path = folder / "events.csv"
    frame.to_csv(csv_path, index=False)
    config_path = folder / "plant.toml"
    config_path.write_text(CONFIG, encoding="utf-8")
    return config_path, csv_path


def _fresh_store(config_path: Path, db: Path):
    import datetime as dt

    from qcfit.config import load_config
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    config = load_config(config_path)
    engine = make_engine(f"sqlite:///{db}")
    init_store(engine, config, os_user="bench", now=dt.datetime(2026, 1, 1, tzinfo=dt.UTC))
    return config, engine


def child_fast(config_path: Path, csv_path: Path, db: Path) -> dict:
    """Time the library's load in this process (run in a child)."""
    import datetime as dt

    from qcfit.ingest import load_events_file

    config, engine = _fresh_store(config_path, db)
    t0, c0 = time.perf_counter(), time.process_time()
    report = load_events_file(
        engine,
        config,
        csv_path,
        now=dt.datetime(2026, 12, 1, tzinfo=dt.UTC),
        os_user="bench",
        host="bench",
    )
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    engine.dispose()
    return {
        "seconds": seconds,
        "cpu_seconds": cpu,
        "rows": report.rows_accepted,
        "events": report.events_added,
        "cells": report.cells_written,
        "shifts": len(report.shifts),
    }


def child_naive(config_path: Path, csv_path: Path, db: Path, rows: int) -> dict:
    """Row-by-row ORM insert of the first ``rows`` events (run in a child)."""
    import csv
    import datetime as dt

    from sqlalchemy import select
    from sqlalchemy.orm import Session, registry

    from qcfit.calendar import ShiftCalendar
    from qcfit.store import schema

    config, engine = _fresh_store(config_path, db)
    calendar = ShiftCalendar.from_config(config)
    reg = registry()

    class Shift:
        pass

    class Event:
        pass

    class Count:
        pass

    class Line:
        pass

    class Category:
        pass

    reg.map_imperatively(Shift, schema.shift)
    reg.map_imperatively(Event, schema.defect_event)
    reg.map_imperatively(Count, schema.defect_count)
    reg.map_imperatively(Line, schema.line)
    reg.map_imperatively(Category, schema.category)
    t0, c0 = time.perf_counter(), time.process_time()
    with Session(engine) as session:
        load = schema.load.insert().values(
            kind="events",
            source=str(csv_path),
            content_hash="naive",
            loaded_utc=dt.datetime(2026, 12, 1),
            os_user="bench",
            host="bench",
            rows_accepted=0,
            rows_rejected=0,
        )
        load_id = session.execute(load).inserted_primary_key[0]
        with open(csv_path, encoding="utf-8", newline="") as handle:
            for i, rec in enumerate(csv.DictReader(handle)):
                if i >= rows:
                    break
                ts = dt.datetime.fromisoformat(rec["timestamp"])
                if (
                    session.get(Line, rec["line"]) is None
                    or session.get(Category, rec["category"]) is None
                ):
                    raise ValueError(f"row {i + 2}: unknown code")
                inst = calendar.shift_at(ts)
                utc = ts.astimezone(dt.UTC).replace(tzinfo=None)
                shift = session.execute(
                    select(Shift).where(
                        Shift.shift_date == inst.date, Shift.shift_name == inst.name
                    )
                ).scalar_one_or_none()
                if shift is None:
                    shift = Shift(
                        shift_date=inst.date,
                        shift_name=inst.name,
                        start_utc=inst.start.astimezone(dt.UTC).replace(tzinfo=None),
                        end_utc=inst.end.astimezone(dt.UTC).replace(tzinfo=None),
                    )
                    session.add(shift)
                    session.flush()
                qty = int(rec["quantity"])
                session.add(
                    Event(
                        ts_utc=utc,
                        shift_id=shift.id,
                        line=rec["line"],
                        category=rec["category"],
                        quantity=qty,
                        load_id=load_id,
                    )
                )
                cell = session.get(Count, (shift.id, rec["line"], rec["category"]))
                if cell is None:
                    session.add(
                        Count(
                            shift_id=shift.id,
                            line=rec["line"],
                            category=rec["category"],
                            count=qty,
                            load_id=load_id,
                        )
                    )
                else:
                    cell.count += qty
                session.flush()
        session.commit()
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    engine.dispose()
    return {"seconds": seconds, "cpu_seconds": cpu, "rows": rows}


def _in_child(mode: str, *args: str) -> dict:
    """Run this file in a fresh interpreter; return its JSON result and peak RSS in MB."""
    before = _children_maxrss_kb()
    proc = subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--child", mode, *args],
        capture_output=True,
        text=True,
        check=False,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"benchmark child {mode} failed:\n{proc.stderr[-3000:]}")
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    result["peak_rss_mb"] = (
        float(result.get("maxrss_kb", max(_children_maxrss_kb(), before))) / 1024.0
    )
    return result


def _children_maxrss_kb() -> int:
    import resource

    return int(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)


def run(n: int = N_EVENTS, naive_rows: int = NAIVE_ROWS, repeats: int = FAST_REPEATS) -> list[dict]:
    """Both paths on the same generated file; one result row (fast path: best of ``repeats``
    fresh-store runs, each in its own child, to damp other load on the machine)."""
    naive_rows = min(naive_rows, n)
    with tempfile.TemporaryDirectory(prefix="qcfit-bench-ingest-") as tmp:
        folder = Path(tmp)
        config_path, csv_path = write_inputs(folder, n)
        size_mb = csv_path.stat().st_size / 1e6
        runs = [
            _in_child("fast", str(config_path), str(csv_path), str(folder / f"fast{k}.sqlite"))
            for k in range(max(1, repeats))
        ]
        fast = min(runs, key=lambda r: r["seconds"])
        naive = _in_child(
            "naive", str(config_path), str(csv_path), str(folder / "naive.sqlite"), str(naive_rows)
        )
    naive_full = naive["seconds"] / naive["rows"] * n
    naive_full_cpu = naive["cpu_seconds"] / naive["rows"] * n
    ratio = naive_full / fast["seconds"]
    load_avg = os.getloadavg()[0]
    peak = max(r["peak_rss_mb"] for r in runs)
    ok = fast["seconds"] <= TARGET_SECONDS and peak <= TARGET_MB and ratio >= TARGET_RATIO
    return [
        {
            "bench": "ingest_events_csv",
            "what": f"load {n:,} events from CSV ({size_mb:.0f} MB) into shift counts (SQLite)",
            "events": n,
            "seconds": round(fast["seconds"], 2),
            "seconds_all_runs": [round(r["seconds"], 2) for r in runs],
            "cpu_seconds": round(fast["cpu_seconds"], 2),
            "target_seconds": TARGET_SECONDS,
            "events_per_second": round(n / fast["seconds"]),
            "peak_rss_mb": round(max(r["peak_rss_mb"] for r in runs), 1),
            "target_mb": TARGET_MB,
            "count_cells": fast["cells"],
            "shifts": fast["shifts"],
            "naive_rows_timed": naive["rows"],
            "naive_seconds_timed": round(naive["seconds"], 2),
            "naive_seconds_extrapolated": round(naive_full, 1),
            "naive_cpu_seconds_extrapolated": round(naive_full_cpu, 1),
            "ratio": round(ratio, 1),
            "ratio_cpu": round(naive_full_cpu / fast["cpu_seconds"], 1),
            "load_average_1min": round(load_avg, 2),
            "target_ratio": TARGET_RATIO,
            "ok": bool(ok),
            "note": f"naive path (row-by-row ORM, flush per row, one commit) timed on the first "
            f"{naive['rows']:,} rows and extrapolated linearly to {n:,}; peak memory is the "
            "fast child's whole-process max RSS; seconds are wall time (cpu_seconds: the child's "
            f"CPU time, for a busy machine); cpus: {os.cpu_count()}",
        }
    ]


def _child_main(argv: list[str]) -> None:
    import resource

    mode, config_path, csv_path, db = argv[:4]
    if mode == "fast":
        result = child_fast(Path(config_path), Path(csv_path), Path(db))
    else:
        result = child_naive(Path(config_path), Path(csv_path), Path(db), int(argv[4]))
    result["maxrss_kb"] = int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
    print(json.dumps(result))


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        _child_main(sys.argv[2:])
    else:
        count = int(sys.argv[1]) if len(sys.argv) > 1 else N_EVENTS
        for row in run(count):
            print(json.dumps(row, indent=2))
