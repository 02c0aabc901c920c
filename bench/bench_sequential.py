"""Benchmarks of the sequential charts (run by ``python -m bench``).

* calibration of 50 lines (k = 6..10, 10 lines each) to ARL0 370 at the default 300 paths,
  serially and split over 2 processes (same limits either way: per-line seed streams);
  target: at most 10 s on 2 cores;
* the service's own path: ``qcfit.charts.calibrate_plan`` of 50 lines (k = 6..10) with two
  concern CUSUMs each ("category up by 1.5x / 2x"; the MEWMA + bank pair then runs at twice
  the target ARL0, the concern chains at four times it), CPU seconds in one process;
  target: at most 10 s;
* one shift's update of 2,000 lines, vectorized vs a per-line loop of the same function
  (ratio; the naive baseline runs in the same process);
* the Brook-Evans calibration of one concern CUSUM.
"""

from __future__ import annotations

import os
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from qcfit.stats.sequential import (
    concern_move,
    init_state,
    make_design,
    make_limits,
    update,
)
from qcfit.stats.sequential_calibration import calibrate
from qcfit.stats.sequential_markov import calibrate_llr_cusum

N_PROFILE = [150, 200, 250]
SERVICE_LEVEL = 200  # typical defects per shift of the service-path lines
SEED = 7


def _p0(k: int, lines: int) -> np.ndarray:
    rng = np.random.default_rng(k)
    p = np.maximum(rng.dirichlet(np.full(k, 3.0), size=lines), 0.01)
    return p / p.sum(axis=1, keepdims=True)


def _designs():
    return [make_design(_p0(k, 10), concerns=[concern_move(_p0(k, 10), 0, 1, 0.1)])
            for k in range(6, 11)]


def _calibrate_part(args):
    k_index, lines = args
    d = _designs()[k_index].select(lines)
    cal = calibrate(d, N_PROFILE, seed=SEED + k_index, line_ids=lines)
    return k_index, lines, cal.limits.bank.tolist(), float(np.max(cal.omnibus_se
                                                                   / cal.omnibus_arl0))


def bench_calibration() -> list[dict]:
    designs = _designs()
    t0 = time.perf_counter()
    c0 = time.process_time()
    serial = {}
    rel_se = 0.0
    for ki, d in enumerate(designs):
        cal = calibrate(d, N_PROFILE, seed=SEED + ki)
        serial[ki] = cal.limits.bank.tolist()
        rel_se = max(rel_se, float(np.max(cal.omnibus_se / cal.omnibus_arl0)))
    t_serial = time.perf_counter() - t0
    cpu_serial = time.process_time() - c0
    jobs = [(ki, list(range(h, 10, 2))) for ki in range(len(designs)) for h in (0, 1)]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=2) as ex:
        parts = list(ex.map(_calibrate_part, jobs))
    t_par = time.perf_counter() - t0
    same = all(serial[ki][j] == b for ki, lines, bank, _ in parts for j, b in zip(lines, bank,
                                                                               strict=True))
    return [
        {"bench": "sequential", "case": "calibrate 50 lines k=6..10, 1 process",
         "seconds": round(t_serial, 2), "cpu_seconds": round(cpu_serial, 2),
         "max_rel_mc_se": round(rel_se, 3), "load_avg_1min": round(os.getloadavg()[0], 1)},
        {"bench": "sequential", "case": "calibrate 50 lines k=6..10, 2 processes",
         "seconds": round(t_par, 2), "target_seconds": 10.0, "met": t_par <= 10.0,
         "same_limits_as_serial": same},
    ]


def _service_plans():
    from types import SimpleNamespace

    from qcfit.charts import plan_line

    settings = SimpleNamespace(ewma_lambda=0.2, concerns=[
        SimpleNamespace(category="C0", factor=1.5), SimpleNamespace(category="C1", factor=2.0)])
    plans = []
    for k in range(6, 11):
        for i, p in enumerate(_p0(k, 10)):
            codes = tuple(f"C{j}" for j in range(k))
            b = SimpleNamespace(proportions=tuple(p), categories=codes, version_id=1, name="b")
            plans.append(plan_line(f"L{k}{i}", b, settings))
    return plans


def bench_service_calibration() -> list[dict]:
    from qcfit.charts import calibrate_plan

    plans = _service_plans()
    t0 = time.perf_counter()
    c0 = time.process_time()
    for j, plan in enumerate(plans):
        calibrate_plan(plan, SERVICE_LEVEL, 370.0, SEED + j)
    cpu = time.process_time() - c0
    return [{"bench": "sequential", "case": "service calibration 50 lines, 2 concerns each",
             "seconds": round(time.perf_counter() - t0, 2), "cpu_seconds": round(cpu, 2),
             "target_seconds": 10.0, "met": cpu <= 10.0,
             "load_avg_1min": round(os.getloadavg()[0], 1)}]


def bench_update(lines: int = 2000, k: int = 8, shifts: int = 20) -> list[dict]:
    p0 = _p0(k, lines)
    d = make_design(p0, concerns=[concern_move(p0, 0, 1, 0.1)])
    lim = make_limits(d, ewma=20.0, concerns=4.0, bank=8.0)
    x = np.random.default_rng(1).multinomial(np.full((shifts, lines), 200), p0[0])
    t0 = time.perf_counter()
    st = init_state(d)
    for t in range(shifts):
        st, _ = update(st, x[t], d, lim)
    t_vec = time.perf_counter() - t0
    per = [d.select([i]) for i in range(200)]  # naive: one line at a time (200 lines, scaled)
    lims = [make_limits(di, ewma=20.0, concerns=4.0, bank=8.0) for di in per]
    t0 = time.perf_counter()
    for i, di in enumerate(per):
        s = init_state(di)
        for t in range(shifts):
            s, _ = update(s, x[t, i : i + 1], di, lims[i])
    t_naive = (time.perf_counter() - t0) * lines / 200
    return [{"bench": "sequential", "case": f"update {lines} lines x {shifts} shifts, k={k}",
             "seconds": round(t_vec, 3), "naive_seconds": round(t_naive, 2),
             "speedup": round(t_naive / t_vec, 1)}]


def bench_markov() -> list[dict]:
    p0 = _p0(8, 1)[0]
    c = concern_move(p0, 0, 1, 0.1)
    t0 = time.perf_counter()
    cal = calibrate_llr_cusum(p0, np.log(c.p1 / p0), N_PROFILE, 370.0)
    return [{"bench": "sequential", "case": "Markov-chain limit of one concern CUSUM (k=8)",
             "seconds": round(time.perf_counter() - t0, 3), "h": round(cal.h, 4),
             "arl0": round(cal.arl0, 1)}]


def run() -> list[dict]:
    rows = (bench_calibration() + bench_service_calibration() + bench_update()
            + bench_markov())
    for r in rows:
        print("  ".join(f"{k}={v}" for k, v in r.items()))
    return rows


if __name__ == "__main__":
    run()
