"""Benchmarks of shift evaluation (run by ``python -m bench``; ``run()`` returns rows).

* one shift of 500 lines x 12 categories, from store rows to alarms committed
  (``service.evaluate_shift``); target at most 1 s;
* a one-year backfill (3 shifts a day, 50 lines, 10 categories; ``service.evaluate_shifts``,
  what ``qcfit evaluate --since`` runs); target at most 60 s and at least 10x faster than a
  naive evaluation measured in the same run.

The 10x ratio compares like with like: the per-shift tests, their stored findings and the
alarm log, without the sequential-chart stage (``extra`` set to no findings), which the naive
baseline does not do either (the charts have their own benchmark). A further row runs the
backfill as ``qcfit evaluate --since`` runs it, WITH the chart stage (fresh store, same
counts): the 60 s target applies to it, and its ratio to the naive figure is shown for
information. A third row, for information only, runs the year without charts and with no line
sent to the Monte Carlo refinement near a decision level (the naive loop computes no Monte
Carlo p-values at all): what that refinement costs. Each row with a target has ``ok``.

A year is long enough for the helper processes of :mod:`qcfit.backfill` (one on a 2-CPU
machine): "faster" is taken on wall seconds, what a plant engineer waits for, both sides
measured in the same run. CPU seconds are shown beside them, qcfit's including its helpers'
(``cpu_speedup``: by CPU time spent, qcfit's work is that many times smaller than the naive
loop's; the helpers cost some CPU time of their own: start-up, sending answers back).

The naive baseline does the same tests and stores the same fields the plain way: per line
``scipy.stats.chisquare`` against the baseline, ``chi2_contingency`` of the line against the
pooled rest, ``poisson.sf`` for the rate, power from ``ncx2``/``poisson``, adjusted residuals
and the top categories with numpy, one ``chi2_contingency`` of all lines, Benjamini-Hochberg
with ``scipy.stats.false_discovery_control``; then it writes the evaluation and each finding
(figures, top categories, details with observed, expected and residuals) through an ORM
session row by row (one flush per row). It skips Monte Carlo p-values and the alarm log, so it
still does less work than the real path. For the backfill it runs on a sample of shifts and
is scaled to the year (per-shift cost is flat). (Until 2026-12-02 the naive stored only the
statistic, p-value and effect size of each finding and skipped power, residuals and
multiplicity: about 44 ms a shift instead of about 60.)
"""

from __future__ import annotations

import concurrent.futures as cf
import datetime as dt
import math
import multiprocessing
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats as sps
from sqlalchemy import insert, select
from sqlalchemy.orm import Session, registry

from qcfit import backfill, service
from qcfit.calendar import ShiftCalendar
from qcfit.config import load_config
from qcfit.store.engine import make_engine, read_tx, to_utc_naive, write_tx
from qcfit.store.migrate import init_store
from qcfit.store.schema import defect_count, evaluation, finding, shift, units_inspected
from qcfit.store.shifts import ensure_shifts

SEED = 20260105
NOW = dt.datetime(2027, 6, 1, tzinfo=dt.UTC)
NAIVE_SAMPLE = 24  # backfill shifts evaluated the naive way, scaled to the year


def _no_charts(table, baselines):
    return ()


def _config_text(lines: int, categories: int) -> str:
    cats = [f"C{j:02d}" for j in range(categories)]
    raw = np.linspace(3.0, 1.0, categories)
    shares = [round(float(x), 6) for x in raw / raw.sum()]
    shares[0] = round(1.0 - sum(shares[1:]), 6)
    out = ['[plant]\nname = "Bench"\ntimezone = "Europe/Berlin"\n']
    for name, a, b in (("A", "06:00", "14:00"), ("B", "14:00", "22:00"), ("C", "22:00", "06:00")):
        out.append(f'[[shift]]\nname = "{name}"\nstart = "{a}"\nend = "{b}"\n')
    out.append("[lines]\n" + "".join(f'P{i:03d} = "Press {i}"\n' for i in range(lines)))
    out.append("[categories]\n" + "".join(f'{c} = "defect {c}"\n' for c in cats))
    out.append("[thresholds]\nmultiple_testing = \"bh\"\n")
    props = ", ".join(f"{c} = {s}" for c, s in zip(cats, shares, strict=True))
    out.append(f'[baseline.all]\nlines = "*"\neffective = 2025-01-01\n'
               f"proportions = {{ {props} }}\nrate = 0.012\n")
    return "\n".join(out)


def _store(folder: Path, lines: int, categories: int):
    path = folder / "bench.toml"
    path.write_text(_config_text(lines, categories), encoding="utf-8")
    config = load_config(path)
    engine = make_engine(f"sqlite:///{folder / 'bench.sqlite'}")
    init_store(engine, config, os_user="bench", now=NOW)
    return config, engine


def _fill(engine, config, shifts, rng: np.random.Generator) -> None:
    """Counts ~ Poisson(units x 0.012) split by the baseline mix; a few lines drift."""
    lines = list(config.lines)
    cats = list(config.categories)
    p = np.array([config.baselines[0].proportions[c] for c in cats])
    with write_tx(engine) as conn:
        ids = ensure_shifts(conn, shifts)
        count_rows, unit_rows = [], []
        for s in shifts:
            units = rng.integers(12_000, 18_000, size=len(lines))
            for i, line in enumerate(lines):
                mix = p
                if i % 17 == 3:  # a drifting line: category 1 up
                    mix = p.copy()
                    mix[1] *= 1.6
                    mix /= mix.sum()
                counts = rng.multinomial(rng.poisson(units[i] * 0.012), mix)
                unit_rows.append({"shift_id": ids[s.id], "line": line, "units": int(units[i])})
                count_rows += [{"shift_id": ids[s.id], "line": line, "category": c, "count": int(n)}
                               for c, n in zip(cats, counts, strict=True) if n]
        conn.execute(insert(defect_count), count_rows)
        conn.execute(insert(units_inspected), unit_rows)


# --------------------------------------------------------------------------- naive baseline


class _Evaluation:
    pass


class _Finding:
    pass


_mapper = registry()
_mapper.map_imperatively(_Evaluation, evaluation)
_mapper.map_imperatively(_Finding, finding)


W_FLOOR, V_FLOOR, RATE_FLOOR, ALPHA, POWER_NEEDED = 0.30, 0.15, 1.5, 0.01, 0.80


def _naive_residuals(obs: np.ndarray, expected: np.ndarray) -> np.ndarray:
    """Adjusted residuals of a two-way table, the textbook formula (Agresti 2007, sec. 2.4.5)."""
    n = obs.sum()
    row = obs.sum(axis=1, keepdims=True) / n
    col = obs.sum(axis=0, keepdims=True) / n
    return (obs - expected) / np.sqrt(expected * (1 - row) * (1 - col))


def _naive_top(codes, obs, expected, resid, reference) -> list[dict]:
    order = sorted(range(len(codes)), key=lambda j: -abs(resid[j]))
    return [{"code": codes[j], "direction": "up" if resid[j] > 0 else "down",
             "adjusted_residual": round(float(resid[j]), 4), "observed": int(obs[j]),
             "expected": round(float(expected[j]), 4),
             "share": round(float(obs[j] / max(obs.sum(), 1)), 6),
             "reference_share": round(float(reference[j]), 6)}
            for j in order[:3] if abs(resid[j]) >= 2.0]


def _naive_power(w: float, dof: int, n: int) -> float:
    return float(sps.ncx2.sf(sps.chi2.isf(ALPHA, dof), dof, n * w * w))


def _naive_row(kind, line, stat, dof, pv, eff, n, expected, power, method, top, cats, obs, resid,
               extra) -> dict:
    return {"kind": kind, "line": line, "statistic": float(stat), "dof": dof, "pvalue": float(pv),
            "effect_size": float(eff), "n": int(n), "power": power, "method": method,
            "min_expected": float(np.min(expected)), "top_categories": top,
            "details": {"reason": "", "effect_floor": extra.get("floor"), "alarm_level": ALPHA,
                        "power_needed": POWER_NEEDED, "extra": extra, "categories": list(cats),
                        "observed": [float(v) for v in np.ravel(obs)],
                        "expected": [float(v) for v in np.ravel(expected)],
                        "adjusted_residuals": [float(v) for v in np.ravel(resid)]}}


def _naive_shift(engine, config, s) -> None:
    """The same tests and the same stored fields as the real path, written the plain way: a
    loop over lines calling scipy per test, then one ORM object and one flush per row."""
    lines, cats = list(config.lines), list(config.categories)
    spec = config.baselines[0]
    p = np.array([spec.proportions[c] for c in cats])
    with read_tx(engine) as conn:
        sid = conn.execute(select(shift.c.id).where(shift.c.shift_date == s.date,
                                                    shift.c.shift_name == s.name)).scalar_one()
        table = np.zeros((len(lines), len(cats)), dtype=np.int64)
        units = np.zeros(len(lines))
        li, ci = {x: i for i, x in enumerate(lines)}, {x: j for j, x in enumerate(cats)}
        for line, cat, n in conn.execute(select(defect_count.c.line, defect_count.c.category,
                                                defect_count.c["count"]).where(defect_count.c.shift_id == sid)):
            table[li[line], ci[cat]] = n
        for line, u in conn.execute(select(units_inspected.c.line, units_inspected.c.units)
                                    .where(units_inspected.c.shift_id == sid)):
            units[li[line]] = u
    rows = []
    total = table.sum(axis=0)
    k = len(cats)
    for i, line in enumerate(lines):
        obs = table[i]
        n = int(obs.sum())
        expected = p * n
        gof = sps.chisquare(obs, expected)
        resid = (obs - expected) / np.sqrt(expected * (1 - p))
        rows.append(_naive_row(
            "baseline", line, gof.statistic, k - 1, gof.pvalue, math.sqrt(gof.statistic / n), n,
            expected, _naive_power(W_FLOOR, k - 1, n), "asymptotic",
            _naive_top(cats, obs, expected, resid, p), cats, obs, resid, {"floor": W_FLOOR}))
        pair = np.stack([obs, total - obs])
        keep = pair.sum(axis=0) > 0
        vs = sps.chi2_contingency(pair[:, keep], correction=False)
        r2 = _naive_residuals(pair[:, keep], vs.expected_freq)
        rest = pair[1, keep] / pair[1, keep].sum()
        kept = [c for c, x in zip(cats, keep, strict=True) if x]
        rows.append(_naive_row(
            "line-vs-rest", line, vs.statistic, int(vs.dof), vs.pvalue,
            math.sqrt(vs.statistic / pair.sum()), pair.sum(), vs.expected_freq[0],
            _naive_power(V_FLOOR, int(vs.dof), int(pair.sum())), "asymptotic",
            _naive_top(kept, pair[0, keep], vs.expected_freq[0], r2[0], rest), kept,
            pair[0, keep], r2[0], {"floor": V_FLOOR}))
        mu0 = units[i] * spec.rate
        crit = sps.poisson.isf(ALPHA, mu0)
        rows.append(_naive_row(
            "rate", line, n, None, sps.poisson.sf(n - 1, mu0), n / units[i] / spec.rate, n,
            [mu0], float(sps.poisson.sf(crit, mu0 * RATE_FLOOR)), "exact-poisson", [], [],
            [], [], {"floor": RATE_FLOOR, "units": float(units[i]), "expected_defects": mu0}))
    keep = total > 0
    g = sps.chi2_contingency(table[:, keep], correction=False)
    rows.append(_naive_row(
        "between-lines", None, g.statistic, int(g.dof), g.pvalue,
        math.sqrt(g.statistic / (table.sum() * (min(table.shape) - 1))), table.sum(),
        g.expected_freq, _naive_power(V_FLOOR * 3.0, int(g.dof), int(table.sum())), "asymptotic",
        [], [c for c, x in zip(cats, keep, strict=True) if x], [], [], {"floor": V_FLOOR}))
    rows[-1]["details"]["expected"] = []  # as stored by the real path: the table is in the store
    adjusted = sps.false_discovery_control([r["pvalue"] for r in rows])
    with Session(engine) as session:
        e = _Evaluation()
        e.shift_id, e.status, e.config_hash, e.code_version, e.seed = sid, "ok", config.hash, "naive", 0
        e.started_utc = e.finished_utc = to_utc_naive(NOW)
        e.is_current = False
        session.add(e)
        session.flush()
        for r, adj in zip(rows, adjusted, strict=True):
            f = _Finding()
            f.evaluation_id, f.verdict, f.adjusted_pvalue = e.id, "tested", float(adj)
            for key, value in r.items():
                setattr(f, key, value)
            session.add(f)
            session.flush()
        session.commit()


# --------------------------------------------------------------------------- benchmarks


def bench_one_shift(folder: Path) -> dict:
    config, engine = _store(folder, 500, 12)
    s = ShiftCalendar.from_config(config).from_id("2026-03-02_A")
    _fill(engine, config, [s], np.random.default_rng(SEED))
    versions = service.sync_versions(engine, config, now=NOW)
    service.evaluate_shift(engine, config, s, now=NOW, versions=versions, extra=_no_charts)
    best = math.inf
    for _ in range(3):
        t0 = time.perf_counter()
        summary = service.evaluate_shift(engine, config, s, now=NOW, versions=versions,
                                         extra=_no_charts)
        best = min(best, time.perf_counter() - t0)
    assert summary.ok, summary.error
    t0 = time.perf_counter()
    _naive_shift(engine, config, s)
    naive = time.perf_counter() - t0
    engine.dispose()
    return {"bench": "evaluate one shift 500 lines x 12 categories", "seconds": round(best, 3),
            "target_s": 1.0, "naive_s": round(naive, 3), "speedup": round(naive / best, 1),
            "findings": summary.findings, "alarms_opened": len(summary.opened),
            "ok": best <= 1.0}


def _year(folder: Path):
    folder.mkdir()
    config, engine = _store(folder, 50, 10)
    cal = ShiftCalendar.from_config(config)
    start = dt.datetime(2026, 1, 1, tzinfo=cal.tz)
    shifts = [x for x in cal.instances_between(start, start + dt.timedelta(days=365))]
    _fill(engine, config, shifts, np.random.default_rng(SEED + 1))
    return config, engine, shifts


def _cpu_with_helpers() -> float:
    """CPU seconds of this process and of its ended child processes (the helper processes
    of a long run end with it, see qcfit.backfill)."""
    import resource

    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return time.process_time() + kids.ru_utime + kids.ru_stime


def _timed_backfill(engine, config, shifts, **kw):
    t0, c0 = time.perf_counter(), _cpu_with_helpers()
    results = service.evaluate_shifts(engine, config, shifts, now=NOW, **kw)
    real, real_cpu = time.perf_counter() - t0, _cpu_with_helpers() - c0
    assert all(r.ok for r in results), [r.error for r in results if not r.ok][:3]
    return results, real, real_cpu


def _year_child(folder: str, variant: str) -> tuple[int, float, float]:
    """One year's backfill in a fresh process: (alarms opened, wall s, CPU s). ``variant``:
    "plain" (no charts), "charts" (as ``evaluate --since`` runs it), "one process" (no charts,
    no helper processes) or "unrefined" (no charts, no line sent to the Monte Carlo refinement
    near a decision level)."""
    import qcfit.evaluate.fits as fits

    if variant == "unrefined":
        fits.NEAR_FACTOR = 1.0  # "near" then means exactly at a level
    config, engine, shifts = _year(Path(folder))
    kw = {} if variant == "charts" else {"extra": _no_charts}
    if variant == "one process":
        kw["helpers"] = 0
    res, real, cpu = _timed_backfill(engine, config, shifts, **kw)
    engine.dispose()
    return sum(len(r.opened) for r in res), real, cpu


def _naive_child(folder: str) -> tuple[float, float, int]:
    """The naive loop on a sample of the year's shifts, in a fresh process, on the store the
    plain year was evaluated in (so it writes into a store of a year's findings, as a naive
    backfill would by then): (wall s, CPU s) scaled to the year, sample size."""
    config = load_config(Path(folder) / "bench.toml")
    engine = make_engine(f"sqlite:///{Path(folder) / 'bench.sqlite'}")
    cal = ShiftCalendar.from_config(config)
    start = dt.datetime(2026, 1, 1, tzinfo=cal.tz)
    shifts = list(cal.instances_between(start, start + dt.timedelta(days=365)))
    sample = shifts[:: max(1, len(shifts) // NAIVE_SAMPLE)][:NAIVE_SAMPLE]
    t0, c0 = time.perf_counter(), time.process_time()
    for s in sample:
        _naive_shift(engine, config, s)
    scale = len(shifts) / len(sample)
    engine.dispose()
    return (time.perf_counter() - t0) * scale, (time.process_time() - c0) * scale, len(sample)


def _fresh(fn, *args):
    """``fn(*args)`` in a new interpreter: runs in one process slow down one after another
    (10-20 % by the third year), which would favour whichever side runs first."""
    # a ProcessPoolExecutor's process is not a daemon, so it may start helper processes
    with cf.ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn")) as pool:
        return pool.submit(fn, *args).result()


def bench_backfill(folder: Path) -> list[dict]:
    plain = str(folder / "plain")
    opened, real, real_cpu = _fresh(_year_child, plain, "plain")
    naive, naive_cpu, sampled = _fresh(_naive_child, plain)
    c_opened, c_real, c_cpu = _fresh(_year_child, str(folder / "charts"), "charts")
    # for information, like for like with the naive loop, which computes no Monte Carlo
    # p-values (sparse lines still get theirs); not how qcfit runs: what that refinement costs
    u_opened, u_real, u_cpu = _fresh(_year_child, str(folder / "unrefined"), "unrefined")
    # for information: the same year without helper processes
    o_opened, o_real, o_cpu = _fresh(_year_child, str(folder / "one"), "one process")
    shifts = 1095

    helpers = backfill.helpers_for(-(-shifts // service.CHUNK))

    def row(label: str, res, wall: float, cpu: float, ratio_target: bool, helpers=helpers
            ) -> dict:
        # CPU seconds beside wall seconds: on a busy machine the wall ratio swings with the load
        return {"bench": f"backfill one year{label}: {shifts} shifts x 50 lines x 10 "
                         "categories",
                "seconds": round(wall, 2), "cpu_seconds_with_helpers": round(cpu, 2),
                "helper_processes": helpers, "target_s": 60.0,
                "naive_s_scaled": round(naive, 1), "naive_cpu_s_scaled": round(naive_cpu, 1),
                "naive_sample_shifts": sampled, "speedup": round(naive / wall, 1),
                "cpu_speedup": round(naive_cpu / cpu, 1),
                "target_speedup": 10.0 if ratio_target else None,
                "load_avg_1min": round(os.getloadavg()[0], 1),
                "alarms_opened": res,
                "ok": wall <= 60.0 and (naive / wall >= 10.0 or not ratio_target)}

    return [row(" (no charts)", opened, real, real_cpu, True),
            row(" WITH charts (as evaluate --since)", c_opened, c_real, c_cpu, False),
            row(" (no charts, no Monte Carlo refinement near levels: like the naive; "
                "information only)", u_opened, u_real, u_cpu, False),
            row(" (no charts, in ONE process: no helpers; information only)", o_opened, o_real,
                o_cpu, False, helpers=0)]


def bench_pvalue_share() -> dict:
    """How much of one 50-line shift's compute is the ``auto`` Monte Carlo of qcfit.stats."""
    from qcfit.stats import fit_to_baseline

    rng = np.random.default_rng(SEED)
    p = np.linspace(3.0, 1.0, 10)
    p /= p.sum()
    times = {}
    for mode in ("asymptotic", "auto"):
        t0 = time.perf_counter()
        for shift_no in range(20):
            obs = np.array([rng.multinomial(rng.poisson(180), p) for _ in range(50)])
            fit_to_baseline(obs, p, pvalue=mode, seed=shift_no, levels=(0.01, 0.05))
        times[mode] = (time.perf_counter() - t0) / 20
    return {"bench": "fit of 50 lines x 10 categories (n ~ 180) per shift, stats only",
            "asymptotic_ms": round(times["asymptotic"] * 1e3, 2),
            "auto_ms": round(times["auto"] * 1e3, 1)}


def run() -> list[dict]:
    rows = [bench_pvalue_share()]
    with tempfile.TemporaryDirectory(prefix="qcfit-bench-") as tmp:
        for name, fn in (("one", bench_one_shift), ("year", bench_backfill)):
            folder = Path(tmp) / name
            folder.mkdir()
            got = fn(folder)
            rows += got if isinstance(got, list) else [got]
    for r in rows:
        print("  ".join(f"{k}={v}" for k, v in r.items()))
    return rows


if __name__ == "__main__":
    run()
