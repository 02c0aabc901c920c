"""Benchmark: the service's catch-up after an outage, and its footprint when idle.

Targets (from the service issue): catch-up after a 30-day outage on the demo plant in at
most 20 s; an idle service at most 150 MB resident and CPU near zero between wakes.

How it is measured:

* the demo plant (``sample_lines/plant.toml``, its ``shift_counts.csv``) in a fresh SQLite
  store; every shift that ended more than 30 days before now is evaluated first (setup,
  not timed), so the store looks like a PC that was off for 30 days;
* **catch-up**: ``python -m qcfit serve --once`` in a child process, timed from start to exit
  (interpreter start, imports, schema check, lock, evaluation of the 30 days, release), on a
  copy of that store. The same shifts evaluated in-process are timed twice more on fresh
  copies: as the service does it (``service.evaluate_due``) and naively, one
  ``service.evaluate_shift`` per shift (one transaction each); ``ratio`` = naive / service;
* **idle**: ``python -m qcfit serve`` on another copy of the store after the outage; it
  catches up by itself (in its evaluation child), and once every shift is evaluated and its
  heartbeat says idle, resident memory (``VmRSS`` and ``VmHWM`` from ``/proc``, Linux only) and CPU time
  (``utime + stime``) are read over a ``window_s`` window. The issue asks for a minute;
  ``python -m bench`` uses 20 s to keep the run short (``python bench/bench_service.py 60``
  for the full minute). The heartbeat job (every 30 s) and the 5 s main loop are the only
  work in that window.

Run alone: ``python bench/bench_service.py [WINDOW_S]``; ``python -m bench`` calls :func:`run`.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_lines"
OUTAGE_DAYS = 30
TARGET_CATCH_UP_S = 20.0
TARGET_RSS_MB = 150.0
TARGET_CPU_PERCENT = 1.0  # "near zero": common practice, no source
DEFAULT_WINDOW_S = 20.0


def _now() -> dt.datetime:
    from qcfit.scheduler import utc_now

    return utc_now()


def _prepare(folder: Path) -> tuple[Path, dt.datetime]:
    """Demo config + store with everything before the outage evaluated; returns the config
    path and the moment the outage started."""
    from qcfit import service
    from qcfit.config import load_config
    from qcfit.ingest import load_counts_file
    from qcfit.store.engine import make_engine
    from qcfit.store.migrate import init_store

    config_path = folder / "plant.toml"
    text = (DEMO / "plant.toml").read_text(encoding="utf-8")
    config_path.write_text(text, encoding="utf-8")
    config = load_config(config_path)
    engine = make_engine(f"sqlite:///{folder / 'plant.sqlite'}")
    now = _now()
    init_store(engine, config, os_user="bench", now=now)
    load_counts_file(engine, config, DEMO / "data" / "shift_counts.csv", now=now,
                     os_user="bench", host="bench")
    outage = now - dt.timedelta(days=OUTAGE_DAYS)
    service.evaluate_due(engine, config, now=outage)
    engine.dispose()
    return config_path, outage


def _copy_store(folder: Path, name: str) -> Path:
    target = folder / name
    target.mkdir()
    shutil.copy2(folder / "plant.toml", target / "plant.toml")
    shutil.copy2(folder / "plant.sqlite", target / "plant.sqlite")
    return target / "plant.toml"


def _child_catch_up(config_path: Path) -> tuple[float, str]:
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "qcfit", "--config", str(config_path), "serve",
                           "--once"], capture_output=True, text=True, timeout=600, cwd="/")
    seconds = time.perf_counter() - t0
    if done.returncode != 0:
        raise RuntimeError(f"serve --once failed ({done.returncode}): {done.stderr[-2000:]}")
    return seconds, done.stdout.strip().splitlines()[-1]


def _in_process(config_path: Path, *, naive: bool) -> tuple[float, int]:
    from qcfit import service
    from qcfit.config import load_config
    from qcfit.store.engine import make_engine

    config = load_config(config_path)
    engine = make_engine(f"sqlite:///{config_path.parent / 'plant.sqlite'}")
    now = _now()
    t0 = time.perf_counter()
    if naive:
        todo = service.due_shifts(engine, config, now=now)
        for shift in todo:
            service.evaluate_shift(engine, config, shift, now=now)
        n = len(todo)
    else:
        n = len(service.evaluate_due(engine, config, now=now))
    seconds = time.perf_counter() - t0
    engine.dispose()
    return seconds, n


def _proc_status(pid: int) -> dict[str, float]:
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            out[key] = float(value.split()[0]) / 1024.0  # kB -> MB
    return out


def _cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    return (int(fields[11]) + int(fields[12])) / ticks  # utime, stime


def _idle(config_path: Path, window_s: float) -> dict[str, float]:
    from qcfit import service
    from qcfit.config import load_config
    from qcfit.store.engine import make_engine
    from qcfit.store.heartbeat import read_heartbeat

    config = load_config(config_path)

    engine = make_engine(f"sqlite:///{config_path.parent / 'plant.sqlite'}")
    proc = subprocess.Popen([sys.executable, "-m", "qcfit", "--config", str(config_path),
                             "serve"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            cwd="/")
    try:
        deadline = time.monotonic() + 120
        while True:
            hb = read_heartbeat(engine)
            if (hb is not None and hb.pid == proc.pid and hb.status == "idle"
                    and hb.last_wake is not None
                    and not service.due_shifts(engine, config, now=_now())):
                break
            if time.monotonic() > deadline or proc.poll() is not None:
                raise RuntimeError("the service did not become idle")
            time.sleep(0.2)
        time.sleep(1.0)  # let the start catch-up's thread finish
        cpu0, t0 = _cpu_seconds(proc.pid), time.monotonic()
        time.sleep(window_s)
        cpu1, t1 = _cpu_seconds(proc.pid), time.monotonic()
        mem = _proc_status(proc.pid)
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(120)
        engine.dispose()
    return {"rss_mb": mem["VmRSS"], "peak_rss_mb": mem["VmHWM"], "cpu_seconds": cpu1 - cpu0,
            "window_s": t1 - t0, "exit_code": code}


def run(window_s: float = DEFAULT_WINDOW_S) -> list[dict]:
    """One row for the catch-up, one for the idle service."""
    with tempfile.TemporaryDirectory(prefix="qcfit-bench-service-") as tmp:
        folder = Path(tmp)
        _config_path, outage = _prepare(folder)
        child_cfg = _copy_store(folder, "child")
        fast_cfg = _copy_store(folder, "fast")
        naive_cfg = _copy_store(folder, "naive")
        idle_cfg = _copy_store(folder, "idle")
        seconds, said = _child_catch_up(child_cfg)
        fast_s, n = _in_process(fast_cfg, naive=False)
        naive_s, n_naive = _in_process(naive_cfg, naive=True)
        idle = _idle(idle_cfg, window_s)
    load_avg = os.getloadavg()[0]
    cpu_percent = 100.0 * idle["cpu_seconds"] / idle["window_s"]
    return [
        {
            "bench": "service_catch_up",
            "what": f"`qcfit serve --once` after a {OUTAGE_DAYS}-day outage, demo plant (SQLite)",
            "shifts": n,
            "service_said": said,
            "seconds": round(seconds, 2),
            "target_seconds": TARGET_CATCH_UP_S,
            "in_process_seconds": round(fast_s, 2),
            "naive_seconds": round(naive_s, 2),
            "naive_shifts": n_naive,
            "ratio": round(naive_s / fast_s, 2) if fast_s > 0 else None,
            "load_avg_1min": round(load_avg, 2),
            "ok": seconds <= TARGET_CATCH_UP_S,
            "outage_from": outage.isoformat(timespec="minutes"),
        },
        {
            "bench": "service_idle",
            "what": f"`qcfit serve` idle after its own {OUTAGE_DAYS}-day catch-up, "
                    f"{idle['window_s']:.0f} s window",
            "rss_mb": round(idle["rss_mb"], 1),
            "peak_rss_mb": round(idle["peak_rss_mb"], 1),
            "target_mb": TARGET_RSS_MB,
            "cpu_seconds": round(idle["cpu_seconds"], 3),
            "cpu_percent": round(cpu_percent, 3),
            "target_cpu_percent": TARGET_CPU_PERCENT,
            "sigterm_exit_code": idle["exit_code"],
            "load_avg_1min": round(load_avg, 2),
            "ok": idle["peak_rss_mb"] <= TARGET_RSS_MB and cpu_percent <= TARGET_CPU_PERCENT
            and idle["exit_code"] == 0,
        },
    ]


if __name__ == "__main__":  # pragma: no cover
    import json

    window = float(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_WINDOW_S
    for row in run(window):
        print(json.dumps(row, indent=2))
