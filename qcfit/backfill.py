"""Helper processes for long runs of shifts (a backfill, a catch-up after a long stop).

In a run of many shifts most of the CPU time goes to the per-shift tests, which need only
the counts, the baselines and the thresholds. Helper processes read and test later chunks
of the run while the process that owns the run writes the current one: the chart stage, the
alarm decisions and every write stay in that process and in shift order, so the store ends up
exactly as after a run in one process. A helper's results are plain rows and findings; if a
helper fails or dies, the owning process evaluates that chunk (and the rest of the run)
itself.

Helpers are started with the ``spawn`` method (the same on Windows and POSIX, and no store
connection is inherited), run at a lower scheduling priority than the run's own process so a
plant PC's other programs are not slowed down, and end when the run ends or when the process
that started them is gone (they check for it every second).
"""

from __future__ import annotations

import concurrent.futures as cf
import gc
import logging
import multiprocessing
import os
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from typing import Any

log = logging.getLogger(__name__)

#: helper processes for a long run (at most one fewer than the CPUs, at least one)
MAX_HELPERS = 2
#: a run needs at least this many chunks before helpers are worth starting (a helper costs
#: about a second of CPU time to start: imports and its store connection)
MIN_CHUNKS = 4
#: how much lower the helpers' scheduling priority is (POSIX nice increment)
NICE = 5

_HELPER: dict[str, Any] = {}  # in a helper process: its engine, config, versions, memo


def helpers_for(chunks: int, cpus: int | None = None) -> int:
    """How many helper processes a run of ``chunks`` chunks gets (0: the run stays in one
    process): none below :data:`MIN_CHUNKS` chunks or on a single CPU."""
    if cpus is None:
        cpus = os.cpu_count() or 1
    if chunks < MIN_CHUNKS or cpus < 2:
        return 0
    return max(1, min(MAX_HELPERS, cpus - 1, chunks - 1))


class HelperPool:
    """Helper processes that run ``work(engine, config, versions, shifts, memo)`` for chunks
    of a run, each with its own store connection (the URL of ``engine``)."""

    def __init__(self, engine: Any, config: Any, versions: Mapping[str, int], processes: int,
                 *, gc_threshold: int | None = None) -> None:
        from qcfit.store.engine import store_info

        url = engine.url.render_as_string(hide_password=False)
        busy = store_info(engine).busy_timeout_s
        self._pool = cf.ProcessPoolExecutor(
            max_workers=processes, mp_context=multiprocessing.get_context("spawn"),
            initializer=_start_helper, initargs=(url, busy, config, dict(versions), os.getpid(), gc_threshold))

    def submit(self, work: Callable[..., Any], shifts: Sequence[Any]) -> cf.Future[Any]:
        return self._pool.submit(_run_in_helper, work, list(shifts))

    def close(self) -> None:
        """Stop the helpers: queued chunks are dropped, a chunk being tested is abandoned."""
        self._pool.shutdown(wait=False, cancel_futures=True)


def _start_helper(url: str, busy_timeout_s: float, config: Any, versions: dict[str, int],
                  parent: int, gc_threshold: int | None) -> None:
    from qcfit.store.engine import make_engine

    if gc_threshold is not None:  # as in the run's own process (see service._few_collections)
        gc.set_threshold(gc_threshold, *gc.get_threshold()[1:])
    if hasattr(os, "nice"):
        try:
            os.nice(NICE)
        except OSError:  # not allowed: run at the same priority
            pass
    threading.Thread(target=_end_with_parent, args=(parent,), name="qcfit-helper-watch",
                     daemon=True).start()
    _HELPER.update(engine=make_engine(url, busy_timeout_s=busy_timeout_s), config=config,
                   versions=versions, memo={})


def _end_with_parent(parent: int) -> None:
    """End this helper once the process that started it is gone (killed, for example)."""
    while True:
        time.sleep(1.0)
        if os.getppid() != parent:
            os._exit(1)


def _run_in_helper(work: Callable[..., Any], shifts: list[Any]) -> Any:
    h = _HELPER
    return work(h["engine"], h["config"], h["versions"], shifts, h["memo"])
