"""Benchmark of the shift report (run by ``python -m bench``; ``run()`` returns rows).

One report of a 50-line x 10-category plant with 30 evaluated shifts behind it and sequential
chart rows for every line, from the store to the HTML file on disk
(:func:`qcfit.report.write.write_shift_report`); target at most 3 s (warm: matplotlib already
imported, as in the running service; best of 5 runs, with the median and the CPU time beside
it, since a busy machine inflates wall time). The first, cold run is reported too.

The naive baseline draws what the page draws the plain way: one pyplot figure per line and
chart (observed vs expected, mix test over time, rate over time, sequential charts) with the
automatic tight layout, saved to SVG, for every line, plus the map and the Pareto. It runs on a
sample of lines and is scaled to 50 (its cost per line is flat).
"""

from __future__ import annotations

import datetime as dt
import io
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlalchemy import insert

from qcfit import service
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.store.engine import make_engine, write_tx
from qcfit.store.migrate import init_store
from qcfit.store.schema import defect_count, units_inspected
from qcfit.store.shifts import ensure_shifts

SEED = 20260601
LINES = 50
CATEGORIES = 10
SHIFTS = 30
TARGET_S = 3.0
NAIVE_SAMPLE = 5  # lines drawn the naive way, scaled to LINES
NOW = dt.datetime(2026, 2, 1, tzinfo=dt.UTC)


def _config_text(lines: int, categories: int, folder: Path) -> str:
    cats = [f"C{j:02d}" for j in range(categories)]
    raw = np.linspace(3.0, 1.0, categories)
    shares = [round(float(x), 6) for x in raw / raw.sum()]
    shares[0] = round(1.0 - sum(shares[1:]), 6)
    out = ['[plant]\nname = "Bench"\ntimezone = "Europe/Berlin"\n']
    for name, a, b in (("A", "06:00", "14:00"), ("B", "14:00", "22:00"), ("C", "22:00", "06:00")):
        out.append(f'[[shift]]\nname = "{name}"\nstart = "{a}"\nend = "{b}"\n')
    out.append("[lines]\n" + "".join(f'P{i:03d} = "Press {i}"\n' for i in range(lines)))
    out.append("[categories]\n" + "".join(f'{c} = "defect {c}"\n' for c in cats))
    props = ", ".join(f"{c} = {s}" for c, s in zip(cats, shares, strict=True))
    out.append(f'[baseline.all]\nlines = "*"\neffective = 2025-01-01\n'
               f"proportions = {{ {props} }}\nrate = 0.012\n")
    out.append(f'[report]\nfolder = "{folder.as_posix()}"\nkeep = 5\n')
    return "\n".join(out)


def _plant(folder: Path):
    path = folder / "bench.toml"
    path.write_text(_config_text(LINES, CATEGORIES, folder / "reports"), encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{folder / 'bench.sqlite'}")
    init_store(engine, config, os_user="bench", now=NOW)
    cal = ShiftCalendar.from_config(config)
    start = dt.datetime(2026, 1, 5, 6, tzinfo=cal.tz)
    shifts = cal.instances_between(start, start + dt.timedelta(days=14))[:SHIFTS]
    _fill(engine, config, shifts, np.random.default_rng(SEED))
    results = service.evaluate_shifts(engine, config, shifts, now=NOW)
    assert all(r.ok for r in results), [r.error for r in results if not r.ok][:3]
    return config, engine, shifts


def _fill(engine, config, shifts, rng: np.random.Generator) -> None:
    """Counts ~ Poisson(units x 0.012) split by the baseline mix; every 7th line drifts (the
    service's sequential charts store their rows as they run)."""
    lines, cats = list(config.lines), list(config.categories)
    p = np.array([config.baselines[0].proportions[c] for c in cats])
    with write_tx(engine) as conn:
        ids = ensure_shifts(conn, shifts)
        counts, units = [], []
        for k, s in enumerate(shifts):
            u = rng.integers(12_000, 18_000, size=len(lines))
            for i, line in enumerate(lines):
                mix = p.copy()
                if i % 7 == 3 and k >= SHIFTS // 2:
                    mix[2] *= 1.8
                    mix /= mix.sum()
                n = rng.multinomial(rng.poisson(u[i] * 0.012), mix)
                units.append({"shift_id": ids[s.id], "line": line, "units": int(u[i])})
                counts += [{"shift_id": ids[s.id], "line": line, "category": c, "count": int(x)}
                           for c, x in zip(cats, n, strict=True)]
        conn.execute(insert(defect_count), counts)
        conn.execute(insert(units_inspected), units)


def _naive(data, lines) -> None:
    """One pyplot figure per line and chart, tight layout, SVG (what a first version does)."""
    import matplotlib.pyplot as plt

    x = np.arange(len(data.history))
    hist = {h.line: h for h in data.line_history}
    for line in lines:
        f = data.finding("baseline", line)
        for kind in ("bars", "p", "w", "rate", "sequential"):
            fig, ax = plt.subplots(figsize=(3, 2.2))
            if kind == "bars" and f is not None:
                ax.barh(range(len(f.observed)), f.observed)
                ax.scatter(f.expected, range(len(f.expected)), marker="|")
            elif kind == "p":
                ax.semilogy(x, hist[line].mix_adjusted_p, "o-")
                ax.axhline(0.01)
            elif kind == "w":
                ax.plot(x, hist[line].mix_effect, "o-")
            elif kind == "rate":
                ax.plot(x, hist[line].rate, "o-")
                ax.step(x, hist[line].rate_limit)
            else:
                for s in data.charts:
                    if s.line == line:
                        ax.plot(x, s.statistic)
            ax.set_title(line)
            fig.tight_layout()
            fig.savefig(io.StringIO(), format="svg")
            plt.close(fig)


def run() -> list[dict]:
    from qcfit.report.data import gather
    from qcfit.report.write import write_shift_report

    with tempfile.TemporaryDirectory(prefix="qcfit-bench-report-") as tmp:
        folder = Path(tmp)
        config, engine, shifts = _plant(folder)
        last = shifts[-1].id
        out = folder / "report.html"
        t0 = time.perf_counter()
        write_shift_report(engine, config, last, now=NOW, out=out)
        cold = time.perf_counter() - t0
        warm, cpu = [], []
        for _ in range(5):
            t0, c0 = time.perf_counter(), time.process_time()
            write_shift_report(engine, config, last, now=NOW, out=out)
            warm.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
        seconds = min(warm)  # best of 5: the least disturbed by other work on the machine
        data = gather(engine, config, last, now=NOW)
        assert data.charts, "no sequential chart rows: the bench would not draw that section"
        sample = [c for c, _ in data.lines[:NAIVE_SAMPLE]]
        t0 = time.perf_counter()
        _naive(data, sample)
        naive = (time.perf_counter() - t0) / len(sample) * LINES
        size_kb = out.stat().st_size / 1e3
        engine.dispose()
    row = {"bench": f"shift report: {LINES} lines x {CATEGORIES} categories, {SHIFTS} shifts "
                    "of history, sequential charts",
           "seconds": round(seconds, 2), "median_s": round(float(np.median(warm)), 2),
           "cpu_s": round(float(np.median(cpu)), 2), "cold_s": round(cold, 2),
           "target_s": TARGET_S,
           "ok": seconds <= TARGET_S, "naive_s_scaled": round(naive, 1),
           "naive_sample_lines": len(sample), "speedup": round(naive / seconds, 1),
           "page_kb": round(size_kb)}
    print("  ".join(f"{k}={v}" for k, v in row.items()))
    return [row]


if __name__ == "__main__":
    run()
