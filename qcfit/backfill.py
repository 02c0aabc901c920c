"""Helper processes for long runs of shifts (a backfill, a catch-up after a long stop).

In a run of many shifts most of the CPU time goes to the per-shift tests, which need only
the counts, the baselines and the thresholds. Helper processes read and test later chunks
of the run while the process that owns the run writes the current one: the chart stage, the
alarm decisions and every write stay in that process and in shift order, so the store ends up
exactly as after a run in one process. A helper's results are plain rows and findings; if a
helper fails, the owning process evaluates that chunk itself (and, if a helper died, every
later one).

Helpers are started with the ``spawn`` method (the same on Windows and POSIX, and no store
connection is inherited), run at a lower scheduling priority than the run's own process so a
plant PC's other programs are not slowed down, and end when the run ends or when the process
that started them is gone (they check for it every second).
"""

from __future__ import annotations

import concurrent.futures as cf
import gc
import importlib
import logging
import multiprocessing
import os
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures.process import BrokenProcessPool
from typing import Any

log = logging.getLogger(__name__)

#: helper processes for a long run (at most one fewer than the CPUs, at least one)
MAX_HELPERS = 2
#: a run needs at least this many chunks before helpers are worth starting (a helper costs
#: about a second of CPU time to start: imports and its store connection)
MIN_CHUNKS = 4
#: how much lower the helpers' scheduling priority is (POSIX nice increment)
NICE = 5

#: modules a helper imports before it counts as started (what a chunk's tests need)
PRELOAD = ("qcfit.service",)

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
            initializer=_start_helper,
            initargs=(url, busy, config, dict(versions), os.getpid(), gc_threshold))

    def submit(self, work: Callable[..., Any], shifts: Sequence[Any]) -> cf.Future[Any]:
        return self._pool.submit(_run_in_helper, work, list(shifts))

    def started(self) -> cf.Future[Any]:
        """Done once a helper has started (its answer: True)."""
        return self._pool.submit(_started)

    def close(self, wait: bool = False) -> None:
        """Stop the helpers: queued chunks are dropped; ``wait``: until they have ended (else a
        chunk being tested is abandoned and they end by themselves)."""
        self._pool.shutdown(wait=wait, cancel_futures=True)


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
    for name in PRELOAD:  # before the helper counts as started: the first chunk is not slower
        importlib.import_module(name)


def _end_with_parent(parent: int) -> None:
    """End this helper once the process that started it is gone (killed, for example)."""
    while True:
        time.sleep(1.0)
        if os.getppid() != parent:
            os._exit(1)


def _started() -> bool:
    return True


def _run_in_helper(work: Callable[..., Any], shifts: list[Any]) -> Any:
    h = _HELPER
    return work(h["engine"], h["config"], h["versions"], shifts, h["memo"])


class Lookahead:
    """The chunks of a run that helpers test ahead of the writing.

    Until a helper has started (a second or so) the run's process tests the chunks itself.
    Then the chunks are handed out in order, two per helper ahead of the one being written.
    When the run's process would wait for a helper's answer, it tests the next chunk not
    handed out yet itself instead and keeps the answer until that chunk's turn: both sides
    stay busy however the cost of chunks varies (a chunk with lines near a decision level
    costs several times another, for their Monte Carlo p-values). A chunk whose helper
    failed is tested here; after a helper died, every later one is.

    ``prepare(engine, config, versions, shifts, memo)`` tests a chunk (in a helper, or here
    with the run's own engine); its answer is what :meth:`take` returns.
    """

    def __init__(self, engine: Any, config: Any, versions: Mapping[str, int],
                 parts: Sequence[Sequence[Any]], helpers: int, prepare: Callable[..., Any],
                 *, gc_threshold: int | None = None) -> None:
        self.engine, self.config, self.versions = engine, config, versions
        self.gc_threshold = gc_threshold
        self.parts, self.helpers, self.prepare = parts, max(0, helpers), prepare
        self.pool: HelperPool | None = None
        self.ready: cf.Future[Any] | None = None
        self.pending: dict[int, cf.Future[Any]] = {}
        self.here: dict[int, Any] = {}  # answers tested in this process while waiting
        self.memo: dict[Any, Any] = {}
        self.next = 1

    def __enter__(self) -> Lookahead:
        if self.helpers and len(self.parts) > 1:
            try:
                self.pool = HelperPool(self.engine, self.config, self.versions, self.helpers,
                                       gc_threshold=self.gc_threshold)
                self.ready = self.pool.started()
            except Exception as exc:  # no helpers: the run goes on in this process
                log.warning("could not start helper processes (%s)", _why(exc))
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        self._stop(wait=exc_type is None)  # after a whole run they are idle: end them now

    def take(self, k: int) -> Any | None:
        """Chunk ``k`` tested ahead (by a helper, or here while waiting for one), or None
        when the caller is to test it."""
        self._hand_out(k)
        if k in self.here:
            return self.here.pop(k)
        future = self.pending.pop(k, None)
        if future is None:
            return None
        while not future.done() and self._test_one_here(k):
            pass
        try:
            return future.result()
        except Exception as exc:
            log.warning("a helper process failed on %d shifts (%s); testing them here",
                        len(self.parts[k]), _why(exc))
            if isinstance(exc, BrokenProcessPool):
                self._stop()
            return None

    def _test_one_here(self, k: int) -> bool:
        """Test the next chunk not handed out yet in this process; False if there is none."""
        if self.next >= len(self.parts):
            return False
        j, self.next = self.next, self.next + 1
        try:
            self.here[j] = self.prepare(self.engine, self.config, self.versions, self.parts[j],
                                        self.memo)
        except Exception as exc:  # the chunk is evaluated the ordinary way in its turn
            log.warning("testing %d shifts ahead failed (%s)", len(self.parts[j]), _why(exc))
        return True

    def _hand_out(self, k: int) -> None:
        if self.pool is None or self.ready is None or not self.ready.done():
            return
        if self.ready.exception() is not None:
            log.warning("helper processes did not start (%s)", _why(self.ready.exception()))
            self._stop()
            return
        self.next = max(self.next, k + 1)  # chunks up to k were tested here meanwhile
        waiting = sum(1 for j, f in self.pending.items() if j > k and not f.done())
        while self.next < len(self.parts) and waiting < 2 * self.helpers:
            try:
                self.pending[self.next] = self.pool.submit(self.prepare, self.parts[self.next])
            except Exception as exc:  # the pool is broken or shut down
                log.warning("helper processes stopped (%s)", _why(exc))
                self._stop()
                return
            self.next += 1
            waiting += 1

    def _stop(self, wait: bool = False) -> None:
        if self.pool is not None:
            self.pool.close(wait)
        self.pool = None
        for future in self.pending.values():
            future.cancel()
        self.pending.clear()


def _why(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}"[:300]
