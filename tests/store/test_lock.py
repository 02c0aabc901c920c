"""The service lock: one holder per store, named to the next one, gone with its process."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from collections.abc import Iterator

import pytest
import sqlalchemy as sa

from qcfit.errors import AlreadyRunningError, StoreError
from qcfit.store.engine import make_engine, store_info
from qcfit.store.lock import lock_holder, store_lock

NOW = dt.datetime(2026, 1, 5, 6, 0, tzinfo=dt.UTC)

HOLDER = textwrap.dedent(
    """
    import datetime as dt, sys
    from qcfit.store.engine import make_engine
    from qcfit.store.lock import store_lock
    lock = store_lock(make_engine(sys.argv[1]), now=dt.datetime(2026, 1, 5, 6, 0, tzinfo=dt.UTC),
                      host="pc-holder")
    lock.acquire()
    print("locked", flush=True)
    sys.stdin.readline()  # hold until told to stop (or killed)
    lock.check()
    lock.release()
    print("released", flush=True)
    """
)


class Holder:
    """A real second process holding the store's lock."""

    def __init__(self, url: str) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-c", HOLDER, url],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        line = self.proc.stdout.readline().strip()
        assert line == "locked", self.proc.stderr.read()

    def release(self) -> None:
        self.proc.stdin.write("\n")
        self.proc.stdin.flush()
        assert self.proc.stdout.readline().strip() == "released"
        assert self.proc.wait(timeout=30) == 0

    def kill(self) -> None:
        os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait(timeout=30)

    def close(self) -> None:
        if self.proc.poll() is None:
            self.kill()
        for stream in (self.proc.stdin, self.proc.stdout, self.proc.stderr):
            stream.close()


@pytest.fixture
def engine(store_url: str) -> Iterator[sa.Engine]:
    engine = make_engine(store_url)
    yield engine
    engine.dispose()


@pytest.fixture
def holder(store_url: str) -> Iterator[Holder]:
    h = Holder(store_url)
    yield h
    h.close()


def acquire_within(lock, seconds: float = 20.0) -> bool:
    stop = threading.Event()
    give_up = threading.Timer(seconds, stop.set)
    give_up.start()
    try:
        return lock.acquire(wait=True, poll_s=0.1, stop=stop)
    finally:
        give_up.cancel()


def test_second_instance_is_refused_with_the_holder(engine: sa.Engine, holder: Holder) -> None:
    with pytest.raises(
        AlreadyRunningError, match=f"already running: pid {holder.proc.pid} on pc-holder"
    ):
        store_lock(engine, now=NOW).acquire(poll_s=0.2)
    who = lock_holder(engine)
    assert who is not None and (who.pid, who.host) == (holder.proc.pid, "pc-holder")
    if store_info(engine).dialect == "sqlite":
        assert who.since == NOW
    else:  # the refused attempt left no session of its own behind
        assert sessions_named_for_me_end(engine)


def sessions_named_for_me_end(engine: sa.Engine, within_s: float = 10.0) -> bool:
    """True once no PostgreSQL session carries this process's lock name.

    A server backend ends shortly after its client disconnects, so a session closed by an
    earlier test of this worker may still be listed for a moment; a leaked one stays.
    """
    deadline = time.monotonic() + within_s
    while True:
        with engine.connect() as conn:
            mine = conn.execute(
                sa.text("SELECT count(*) FROM pg_stat_activity WHERE application_name LIKE :me"),
                {"me": f"qcfit-service pid={os.getpid()} %"},
            ).scalar_one()
        if mine == 0:
            return True
        if time.monotonic() > deadline:
            return False
        time.sleep(0.05)


def test_restart_after_kill_9_succeeds(engine: sa.Engine, holder: Holder) -> None:
    holder.kill()
    lock = store_lock(engine, now=NOW)
    assert acquire_within(lock)  # PostgreSQL ends the dead client's session, freeing it
    lock.check()
    assert lock_holder(engine).pid == os.getpid()
    lock.release()
    assert lock_holder(engine) is None


def test_standby_takes_over_when_the_holder_stops(engine: sa.Engine, holder: Holder) -> None:
    lock = store_lock(engine, now=NOW)
    stop = threading.Event()
    result: list[bool] = []
    waiter = threading.Thread(
        target=lambda: result.append(lock.acquire(wait=True, poll_s=0.1, stop=stop))
    )
    waiter.start()
    waiter.join(0.5)
    assert waiter.is_alive() and not lock.held  # still waiting as standby
    holder.release()
    waiter.join(20)
    assert result == [True]
    lock.check()
    lock.release()


def test_standby_gives_up_when_asked_to_stop(engine: sa.Engine, holder: Holder) -> None:
    stop = threading.Event()
    stop.set()
    assert store_lock(engine, now=NOW).acquire(wait=True, poll_s=0.1, stop=stop) is False


def test_lost_lock_is_detected(engine: sa.Engine, store_url: str) -> None:
    lock = store_lock(engine, now=NOW)
    lock.acquire()
    lock.check()
    info = store_info(engine)
    if info.dialect == "sqlite":
        (info.path.parent / f"{info.path.name}.lock").unlink()
        expected = "was deleted"
    else:
        with engine.connect() as conn:  # an operator (or a server restart) ends the session
            conn.execute(
                sa.text(
                    "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                    "WHERE application_name LIKE :mine AND pid <> pg_backend_pid()"
                ),
                {"mine": f"qcfit-service pid={os.getpid()} %"},
            )
            conn.commit()
        expected = "lock connection failed|no longer held"
    with pytest.raises(StoreError, match=f"lost the service lock on the store: .*({expected})"):
        lock.check()
    assert not lock.held


def test_lock_is_released_on_exit_and_reusable(engine: sa.Engine) -> None:
    with store_lock(engine, now=NOW) as lock:
        assert lock.held
        with pytest.raises(AlreadyRunningError):
            store_lock(engine, now=NOW).acquire(poll_s=0.1)
    again = store_lock(engine, now=NOW)
    again.acquire(poll_s=0.1)
    again.release()


def test_in_memory_store_has_no_lock() -> None:
    engine = make_engine("sqlite://")
    with pytest.raises(StoreError, match="needs a store file or a PostgreSQL store"):
        store_lock(engine, now=NOW)
    engine.dispose()
