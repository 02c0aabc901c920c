"""The one place that wires the stages together: store -> counts -> findings -> policy -> log.

:func:`evaluate_shift` evaluates one shift:

1. read (one read transaction): the shift's counts and units inspected per line;
2. compute (pure, no transaction open): the baselines in force, :func:`qcfit.evaluate.evaluate_table`;
3. write (ONE write transaction): the alarms in the log and the k-of-m history are read, the
   policy decides, the previous evaluation of the shift (if any) is marked superseded, the new
   evaluation, its findings and the alarm changes are written. Nothing is visible before the
   commit, and a failure leaves the store as it was.

If anything fails, a ``failed`` evaluation row (with the error) and a ``service-fault`` alarm
are written in their own transaction; a failed shift is retried by the next
:func:`evaluate_due`. A failed re-evaluation of a shift that has a good evaluation leaves the
good one current (unless the run had already marked it due, see below).

Re-evaluation runs forward (:func:`evaluate_shifts`). A shift's sequential chart values rest
on the chart rows of the shift before it, so after the shifts asked for, every later shift
that has chart rows is re-evaluated too, in start order (``forward`` on its summary); its
alarm decisions then follow in order as well. A retry is a re-evaluation like any other: a
failed shift in the middle of the history is due, and retrying it redoes every later shift,
so their charts include its counts. A run is written :data:`CHUNK` shifts per write
transaction, and its first commit also marks every shift of the run not reached yet as due
(their current evaluations superseded, kept for the record): a run killed or stopped midway
leaves no shift whose results rest on an outdated past, and the next :func:`evaluate_due`
(the service's next catch-up) finishes it from the first shift not rewritten. After a shift
fails, the run goes on from the chart rows in the store (a new chart stage), so no committed
chart value rests on values that were never committed.

Reproducibility: the evaluation records the config hash, the code version and the Monte Carlo
seed, derived from ``[thresholds] seed`` and the shift id (:func:`shift_seed`), so evaluating
the same shift on the same data gives the same numbers. The baseline version of every test is
on its finding row.

:func:`evaluate_due` is the catch-up: every ended shift (end <= now) since the earliest shift in
the store that has no current ``ok`` evaluation (the store is the watermark).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import gc
import logging
import math
import time
from collections import Counter
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np

import qcfit
from qcfit import alarmlog, backfill, charts, policy
from qcfit import evaluate as ev
from qcfit.baselines import baseline_in_force
from qcfit.calendar import ShiftCalendar
from qcfit.errors import BaselineError, InvalidArgumentError
from qcfit.model import BaselineRef, CountTable, ShiftInstance
from qcfit.store import evaluations as esql
from qcfit.store.baselines import sync_baseline_versions
from qcfit.store.engine import from_utc_naive, read_tx, run_write, to_utc_naive, write_tx
from qcfit.store.shifts import ensure_shifts, shift_row

log = logging.getLogger(__name__)

DEFAULT_USER = "qcfit"
OK = "ok"
FAILED = "failed"
MAX_ERROR = 2000

# Sequential charts (a later stage) plug in here: a function that gets the count table and the
# baselines in force and returns extra per-line findings for the same evaluation.
ExtraFindings = Callable[[CountTable, Mapping[str, BaselineRef | None]], Sequence[ev.Finding]]
Progress = Callable[[int, int, "EvaluationSummary"], None]


@dataclass(frozen=True, slots=True)
class EvaluationSummary:
    """What one evaluation did. ``verdicts`` counts findings by final verdict."""

    shift_id: str
    evaluation_id: int | None
    status: str
    seed: int
    error: str | None = None
    superseded_id: int | None = None
    findings: int = 0
    verdicts: tuple[tuple[str, int], ...] = ()
    opened: tuple[int, ...] = ()
    updated: tuple[int, ...] = ()
    cleared: tuple[int, ...] = ()
    seconds: float = 0.0
    #: not asked for: re-evaluated because an earlier shift of the run changes what its
    #: sequential chart values rest on (see :func:`evaluate_shifts`)
    forward: bool = False

    @property
    def ok(self) -> bool:
        return self.status == OK


def shift_seed(base_seed: int, shift_id: str) -> int:
    """The Monte Carlo seed of one shift: a stable 63-bit hash of the base seed and shift id."""
    return ev.derive_seed(base_seed, "shift", shift_id)


# ---------------------------------------------------------------------------------------
# reading


def _tables_in(conn: Any, config: Any, shifts: Sequence[ShiftInstance]) -> list[CountTable]:
    from qcfit.store.defects import shift_tables
    from qcfit.store.shifts import shift_rows_of

    lines = tuple(config.lines)
    categories = tuple(config.categories)
    rows = shift_rows_of(conn, [s.id for s in shifts])
    stored = shift_tables(conn, [r.row_id for r in rows.values()], lines, categories)
    empty_counts = np.zeros((len(lines), len(categories)), dtype=np.int64)
    empty_units = np.full(len(lines), np.nan)
    for a in (empty_counts, empty_units):
        a.setflags(write=False)
    out = []
    for s in shifts:
        row = rows.get(s.id)
        counts, units = stored[row.row_id] if row is not None else (empty_counts, empty_units)
        out.append(CountTable(s, lines, categories, counts, units))
    return out


def _read_tables(engine: Any, config: Any, shifts: Sequence[ShiftInstance]) -> list[CountTable]:
    """The count tables of ``shifts``, read in one read transaction."""
    with read_tx(engine) as conn:
        return _tables_in(conn, config, shifts)


BaselineMemo = dict[tuple[str, dt.date], tuple[BaselineRef | None, str | None]]


def _baselines(config: Any, versions: Mapping[str, int], table: CountTable,
               memo: BaselineMemo | None = None
               ) -> tuple[dict[str, BaselineRef | None], dict[str, str]]:
    """Each line's baseline in force for the table's shift (``memo``: a run's answers by line
    and shift date, so the shifts of one day share them and their BaselineRef objects)."""
    found: dict[str, BaselineRef | None] = {}
    problems: dict[str, str] = {}
    memo = {} if memo is None else memo
    day = table.shift.date
    for line in table.lines:
        hit = memo.get((line, day))
        if hit is None:
            try:
                hit = (baseline_in_force(config, versions, line, table.shift), None)
            except BaselineError as exc:
                hit = (None, str(exc))
            memo[(line, day)] = hit
        found[line] = hit[0]
        if hit[1] is not None:
            problems[line] = hit[1]
    return found, problems


def _with_problems(findings: Sequence[ev.Finding], problems: Mapping[str, str]) -> list[ev.Finding]:
    out = []
    for f in findings:
        if f.verdict == ev.NO_BASELINE and f.line in problems:
            f = dataclasses.replace(f, reason=f"baseline for line {f.line}: {problems[f.line]}")
        out.append(f)
    return out


def sync_versions(engine: Any, config: Any, *, now: dt.datetime, os_user: str = DEFAULT_USER
                  ) -> dict[str, int]:
    """Record the config's baseline versions (idempotent); content hash -> version id."""
    with write_tx(engine) as conn:
        return dict(sync_baseline_versions(conn, config, os_user=os_user, now=now))


# ---------------------------------------------------------------------------------------
# writing


def _opt_float(value: Any) -> float | None:
    """A float column's value: None for missing or non-finite, numpy scalars made plain."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _opt_int(value: Any) -> int | None:
    return None if value is None else int(value)


def finding_values(f: ev.Finding) -> tuple[Any, ...]:
    """A finding as the values of a ``finding`` table row, in the order of
    :data:`qcfit.store.evaluations.FINDING_COLUMNS` (reason, figures and words go into
    ``details``; the JSON columns as Python values).

    The JSON columns are handed to the store's JSON text writer
    (:mod:`qcfit.store.jsontext`), which writes numpy values as plain numbers and non-finite
    floats as null.
    """
    details = {
        "reason": f.reason,
        "severity": f.severity,
        "effect_name": f.effect_name,
        "effect_floor": f.effect_floor,
        "alarm_level": f.alarm_level,
        "watch_level": f.watch_level,
        "power_needed": f.power_needed,
        "mc_se": f.mc_se,
        "extra": f.details,
        "categories": list(f.categories),
        "observed": list(map(float, f.observed)),
        "expected": list(map(float, f.expected)),
        "adjusted_residuals": list(map(float, f.adjusted_residuals)),
    }
    return (f.kind, f.line, _opt_int(f.baseline_version_id), f.verdict, _opt_float(f.statistic),
            _opt_int(f.dof), _opt_float(f.pvalue), _opt_float(f.adjusted_pvalue),
            _opt_float(f.effect_size), f.method, f.method_reason, _opt_int(f.n),
            _opt_float(f.min_expected), _opt_float(f.power),
            [c.as_json() for c in f.top_categories], details)


#: the columns :func:`finding_values` fills, in its order (a test holds it to the finding table)
_VALUE_ORDER = ("kind", "line", "baseline_version_id", "verdict", "statistic", "dof", "pvalue",
                "adjusted_pvalue", "effect_size", "method", "method_reason", "n", "min_expected",
                "power", "top_categories", "details")


_CROSSING_VERDICTS = frozenset({policy.WATCH, policy.ALARM, ev.IMPOSSIBLE})


def _history(conn: Any, config: Any, shift: ShiftInstance) -> dict[tuple[str | None, str], list[bool]]:
    m = int(config.thresholds.persistence_m)
    if m <= 1:
        return {}
    rows = esql.recent_crossings(conn, to_utc_naive(shift.start), m - 1, sorted(policy.FAMILY_KINDS))
    order: list[int] = []
    crossed: dict[tuple[str | None, str], set[int]] = {}
    for shift_row_id, line, kind, verdict in rows:
        if shift_row_id not in order:
            order.append(shift_row_id)
        if verdict in _CROSSING_VERDICTS:
            crossed.setdefault((line, kind), set()).add(shift_row_id)
    return {key: [s in ids for s in order] for key, ids in crossed.items()}


def _evaluation_row(config: Any, shift_row_id: int, status: str, seed: int, started: dt.datetime,
                    t0: float, error: str | None, current: bool) -> dict[str, Any]:
    finished = started + dt.timedelta(seconds=time.perf_counter() - t0)
    return {
        "shift_id": shift_row_id,
        "status": status,
        "started_utc": to_utc_naive(started),
        "finished_utc": to_utc_naive(finished),
        "error": error,
        "config_hash": config.hash,
        "code_version": str(qcfit.__version__)[:64],
        "seed": seed,
        "is_current": current,
        "superseded_utc": None,
    }


def _write_one(conn: Any, config: Any, shift: ShiftInstance, findings: Sequence[ev.Finding],
               seed: int, now: dt.datetime, t0: float, extra: Any = None,
               row_id: int | None = None, fresh: bool = False) -> EvaluationSummary:
    """Decide and write one shift's evaluation inside the caller's write transaction
    (``row_id``: the shift's row, when the caller has made sure of it; ``fresh``: no alarm
    has a raise or update event of this shift yet)."""
    judged = policy.judge(findings, config.thresholds.multiple_testing)
    return _write_judged(conn, config, shift, judged, [finding_values(f) for f in judged],
                         Counter(f.verdict for f in judged), seed, now, t0, extra, row_id, fresh)


def _write_judged(conn: Any, config: Any, shift: ShiftInstance, judged: Sequence[ev.Finding],
                  rows: Sequence[Sequence[Any]], verdicts: Counter[str], seed: int,
                  now: dt.datetime, t0: float, extra: Any, row_id: int | None, fresh: bool,
                  json_text: bool = False) -> EvaluationSummary:
    """:func:`_write_one` after :func:`policy.judge`: ``judged`` as :func:`policy.decide`
    needs them (see :func:`policy.for_decisions`), ``rows`` the finding rows of all of them
    (``json_text``: their JSON columns written as text already), ``verdicts`` their counts."""
    if row_id is None:
        row_id = ensure_shifts(conn, [shift])[shift.id]
    active, alarm_rows = alarmlog.active_alarms_with_rows(conn, row_id)
    decided = policy.decide(judged, config.thresholds, shift_id=shift.id, active=active,
                            history=_history(conn, config, shift), names=dict(config.categories),
                            judged=True)
    old = esql.supersede_current(conn, row_id, to_utc_naive(now))
    eval_id = esql.insert_evaluation(
        conn, _evaluation_row(config, row_id, OK, seed, now, t0, None, True))
    esql.insert_finding_values(conn, eval_id, rows, json_text=json_text)
    applied = alarmlog.apply_decisions(conn, decided.decisions, shift_row_id=row_id,
                                       shift_start_utc=to_utc_naive(shift.start), now=now,
                                       rows=alarm_rows, fresh=fresh)
    if hasattr(extra, "write"):  # the sequential stage keeps its chart values in this transaction
        extra.write(conn, shift, row_id)
    return EvaluationSummary(
        shift_id=shift.id, evaluation_id=eval_id, status=OK, seed=seed, superseded_id=old,
        findings=len(rows), verdicts=tuple(sorted(verdicts.items())),
        opened=applied.opened, updated=applied.updated, cleared=applied.cleared,
        seconds=time.perf_counter() - t0)


@dataclass(frozen=True, slots=True)
class PreparedShift:
    """One shift's per-shift tests, judged and made into finding rows (JSON columns as text)
    by :func:`prepare_chunk`, in the order a one-process run writes them; ``for_decisions``
    as :func:`policy.for_decisions` gives them; ``verdicts`` counted."""

    rows: tuple[tuple[Any, ...], ...]
    for_decisions: tuple[ev.Finding, ...]
    verdicts: tuple[tuple[str, int], ...]


@dataclass(frozen=True, slots=True)
class PreparedChunk:
    """:func:`prepare_chunk`'s answer: the count tables read and each shift's tests."""

    tables: tuple[CountTable, ...]
    shifts: tuple[PreparedShift, ...]


def prepare_chunk(engine: Any, config: Any, versions: Mapping[str, int],
                  shifts: Sequence[ShiftInstance], memo: BaselineMemo) -> PreparedChunk:
    """Read and test a chunk of shifts, everything but the chart stage and the alarm log
    (run in a helper process, see :mod:`qcfit.backfill`; no write)."""
    tables = _read_tables(engine, config, shifts)
    seeds = [shift_seed(config.thresholds.seed, s.id) for s in shifts]
    method = config.thresholds.multiple_testing
    out = []
    for found in _compute_many(config, versions, tables, seeds, None, memo):
        judged = policy.judge(found, method)
        out.append(PreparedShift(
            rows=tuple(esql.json_text_row(finding_values(f)) for f in judged),
            for_decisions=policy.for_decisions(judged),
            verdicts=tuple(Counter(f.verdict for f in judged).items())))
    return PreparedChunk(tuple(tables), tuple(out))


def _error_text(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}"[:MAX_ERROR]


def _record_failure(engine: Any, config: Any, shift: ShiftInstance, exc: BaseException, seed: int,
                    now: dt.datetime, t0: float) -> EvaluationSummary:
    error = _error_text(exc)
    log.error("evaluation of shift %s failed: %s", shift.id, error, exc_info=exc)
    try:
        with write_tx(engine) as conn:
            row_id = ensure_shifts(conn, [shift])[shift.id]
            current = esql.current_evaluation(conn, row_id)
            keep_good = current is not None and current["status"] == OK
            old = None if keep_good else esql.supersede_current(conn, row_id, to_utc_naive(now))
            eval_id = esql.insert_evaluation(conn, _evaluation_row(
                config, row_id, FAILED, seed, now, t0, error, not keep_good))
            active = alarmlog.active_alarms(conn, row_id)
            applied = alarmlog.apply_decisions(
                conn, policy.fault_decisions(shift.id, error, active), shift_row_id=row_id,
                shift_start_utc=to_utc_naive(shift.start), now=now)
    except Exception as exc2:  # the store itself is failing: nothing more we can record
        log.error("could not record the failed evaluation of %s: %s", shift.id, _error_text(exc2))
        return EvaluationSummary(shift_id=shift.id, evaluation_id=None, status=FAILED, seed=seed,
                                 error=error, seconds=time.perf_counter() - t0)
    return EvaluationSummary(shift_id=shift.id, evaluation_id=eval_id, status=FAILED, seed=seed,
                             error=error, superseded_id=old, opened=applied.opened,
                             updated=applied.updated, seconds=time.perf_counter() - t0)


# ---------------------------------------------------------------------------------------
# public entry points


def _compute(config: Any, versions: Mapping[str, int], table: CountTable, seed: int,
             extra: ExtraFindings | None, memo: BaselineMemo | None = None
             ) -> tuple[ev.Finding, ...]:
    return _compute_many(config, versions, [table], [seed], extra, memo)[0]


def _compute_many(config: Any, versions: Mapping[str, int], tables: Sequence[CountTable],
                  seeds: Sequence[int], extra: ExtraFindings | None,
                  memo: BaselineMemo | None = None) -> list[tuple[ev.Finding, ...]]:
    """The findings of several shifts (in order: the chart stage of each shift rests on the
    previous one), the per-shift tests of all of them in one :func:`evaluate.evaluate_tables`."""
    found = [_baselines(config, versions, t, memo) for t in tables]
    more = [tuple(extra(t, b)) if extra is not None else () for t, (b, _) in
            zip(tables, found, strict=True)]
    results = ev.evaluate_tables(tables, [b for b, _ in found], config.thresholds, seeds=seeds,
                                 extras=more)
    return [tuple(_with_problems(r, problems))
            for r, (_, problems) in zip(results, found, strict=True)]


def _chart_findings(config: Any, versions: Mapping[str, int], tables: Sequence[CountTable],
                    extra: ExtraFindings | None, memo: BaselineMemo) -> list[tuple[ev.Finding, ...]]:
    """The chart stage's findings of each table, in order, as :func:`_compute_many` adds them
    (the part of a shift's findings a helper process does not compute)."""
    if extra is None:
        return [() for _ in tables]
    out = []
    for t in tables:
        found, problems = _baselines(config, versions, t, memo)
        out.append(tuple(_with_problems(tuple(extra(t, found)), problems)))
    return out


def _log_done(summary: EvaluationSummary) -> None:
    log.info("shift %s evaluated: %d findings, %d alarm(s) opened", summary.shift_id,
             summary.findings, len(summary.opened))
    for alarm_id in summary.opened:  # after the commit: the store is the source of truth
        log.info("alarm %d opened by shift %s", alarm_id, summary.shift_id)


def evaluate_shift(
    engine: Any,
    config: Any,
    shift: ShiftInstance,
    *,
    now: dt.datetime,
    versions: Mapping[str, int] | None = None,
    os_user: str = DEFAULT_USER,
    extra: ExtraFindings | None = None,
) -> EvaluationSummary:
    """Evaluate one shift (see the module docstring); never raises for a failed evaluation:
    the summary says ``failed`` and the store has the failed row and a service-fault alarm.

    ``now`` (aware) is recorded as the start of the evaluation; ``versions`` (content hash ->
    baseline version id) saves re-syncing the config's baselines when evaluating many shifts.
    Only this shift is evaluated; :func:`evaluate_shifts` also redoes the later shifts whose
    sequential charts rest on it.
    """
    summary, _ = _evaluate_one(engine, config, shift, now=now, versions=versions,
                               os_user=os_user, extra=extra)
    return summary


Marks = dict[str, int]  # shift id -> its evaluation superseded to make it due again


def _mark_due(conn: Any, shifts: Sequence[ShiftInstance], now: dt.datetime) -> Marks:
    """Inside the caller's write transaction: supersede the current evaluation (ok or failed)
    of each of ``shifts``, so that :func:`due_shifts` returns them until they are rewritten."""
    marked: Marks = {}
    if not shifts:
        return marked
    at = to_utc_naive(now)
    first, last = min(s.start for s in shifts), max(s.start for s in shifts)
    have = esql.current_status_between(conn, to_utc_naive(first),
                                       to_utc_naive(last) + dt.timedelta(seconds=1))
    for s in shifts:
        if (s.date, s.name) not in have:  # nothing current (a fresh backfill): nothing to mark
            continue
        row = shift_row(conn, s.id)
        if row is not None and (old := esql.supersede_current(conn, row.row_id, at)) is not None:
            marked[s.id] = old
    return marked


def _evaluate_one(engine: Any, config: Any, shift: ShiftInstance, *, now: dt.datetime,
                  versions: Mapping[str, int] | None, os_user: str, extra: ExtraFindings | None,
                  rest: Sequence[ShiftInstance] = ()) -> tuple[EvaluationSummary, Marks]:
    """:func:`evaluate_shift`; an ok commit also marks ``rest`` due (same transaction)."""
    if now.tzinfo is None:
        raise InvalidArgumentError("now", "pass an aware datetime")
    t0 = time.perf_counter()
    seed = shift_seed(config.thresholds.seed, shift.id)
    if extra is None:
        extra = charts.stage_for(engine, config, now=now)
    try:
        if versions is None:
            versions = sync_versions(engine, config, now=now, os_user=os_user)
        (table,) = _read_tables(engine, config, [shift])
        findings = _compute(config, versions, table, seed, extra)
        summary, marked = run_write(engine, lambda conn: (
            _write_one(conn, config, shift, findings, seed, now, t0, extra),
            _mark_due(conn, rest, now)))
    except Exception as exc:
        return _record_failure(engine, config, shift, exc, seed, now, t0), {}
    _log_done(summary)
    return summary, marked


CHUNK = 50  # shifts per write transaction in a backfill


@dataclass(slots=True)
class _Run:
    """One :func:`evaluate_shifts` run: what every chunk needs, and the marks made so far."""

    engine: Any
    config: Any
    run_at: dt.datetime  # the time the run was asked for (passed in, never read here)
    versions: Mapping[str, int]
    os_user: str
    extra: ExtraFindings | None
    fresh_stage: bool  # the chart stage is ours: start a new one after a failed shift
    marked: Marks | None = None  # None until the first commit marked the rest of the run
    memo: BaselineMemo = dataclasses.field(default_factory=dict)  # baselines by line and day

    def one(self, shift: ShiftInstance, rest: Sequence[ShiftInstance]) -> EvaluationSummary:
        summary, marked = _evaluate_one(
            self.engine, self.config, shift, now=self.run_at, versions=self.versions,
            os_user=self.os_user, extra=self.extra, rest=rest if self.marked is None else ())
        if summary.ok and self.marked is None:
            self.marked = marked
        elif not summary.ok and self.fresh_stage:
            # the stage may hold chart values of the failed shift that never reached the
            # store: later shifts must start from what the store has
            self.extra = charts.stage_for(self.engine, self.config, now=self.run_at)
        return summary

    def chunk(self, shifts: Sequence[ShiftInstance], rest: Sequence[ShiftInstance]
              ) -> list[EvaluationSummary]:
        """Several shifts: one read transaction, compute, then ONE write transaction for all
        of them in order (each shift's results are still all-or-nothing); the run's first
        commit also marks ``rest`` due. Any trouble, and the chunk is evaluated shift by
        shift instead, so failures are recorded one by one."""
        t0 = time.perf_counter()
        config, extra, now = self.config, self.extra, self.run_at

        def writers() -> list[ShiftWriter]:
            tables = _read_tables(self.engine, config, shifts)
            seeds = [shift_seed(config.thresholds.seed, s.id) for s in shifts]
            found = _compute_many(config, self.versions, tables, seeds, extra, self.memo)
            return [functools.partial(_write_one, config=config, shift=s, findings=f, seed=seed,
                                      now=now, t0=t0, extra=extra)
                    for s, seed, f in zip(shifts, seeds, found, strict=True)]

        return self._write_chunk(shifts, rest, writers, "evaluating")

    def chunk_prepared(self, shifts: Sequence[ShiftInstance], rest: Sequence[ShiftInstance],
                       prepared: PreparedChunk) -> list[EvaluationSummary]:
        """:meth:`chunk` with the per-shift tests done ahead (``prepared``, by a helper
        process): the chart stage, the decisions and the writes here, in the same order and
        with the same results."""
        t0 = time.perf_counter()
        config, extra, now = self.config, self.extra, self.run_at
        method = config.thresholds.multiple_testing

        def writers() -> list[ShiftWriter]:
            if [t.shift.id for t in prepared.tables] != [s.id for s in shifts]:
                raise RuntimeError("the answer is for other shifts")
            out = []
            for s, p, charted in zip(shifts, prepared.shifts, _chart_findings(
                    config, self.versions, prepared.tables, extra, self.memo), strict=True):
                judged = policy.judge(charted, method)
                verdicts = Counter(dict(p.verdicts))
                verdicts.update(f.verdict for f in judged)
                out.append(functools.partial(
                    _write_judged, config=config, shift=s,
                    judged=[*p.for_decisions, *judged],
                    rows=[*p.rows, *(esql.json_text_row(finding_values(f)) for f in judged)],
                    verdicts=verdicts, seed=shift_seed(config.thresholds.seed, s.id), now=now,
                    t0=t0, extra=extra, json_text=True))
            return out

        return self._write_chunk(shifts, rest, writers, "writing the tests made ahead of")

    def _write_chunk(self, shifts: Sequence[ShiftInstance], rest: Sequence[ShiftInstance],
                     writers: Callable[[], list[ShiftWriter]], doing: str
                     ) -> list[EvaluationSummary]:
        """One write transaction with each shift's ``writers()`` in order (and the run's first
        marks); shift by shift instead if anything fails."""
        to_mark = rest if self.marked is None else ()
        try:
            ready = writers()

            def write(conn: Any) -> tuple[list[EvaluationSummary], Marks]:
                ids = ensure_shifts(conn, shifts)
                told = alarmlog.shifts_with_events(conn, list(ids.values()))
                done = []
                for s, write_shift in zip(shifts, ready, strict=True):
                    done.append(write_shift(conn, row_id=ids[s.id], fresh=ids[s.id] not in told))
                    told.add(ids[s.id])  # a shift listed twice is not fresh the second time
                return done, _mark_due(conn, to_mark, self.run_at)

            out, marked = run_write(self.engine, write)
        except Exception as exc:
            log.warning("%s %d shifts together failed (%s); going shift by shift",
                        doing, len(shifts), _error_text(exc))
            return [self.one(s, [*shifts[i + 1:], *rest]) for i, s in enumerate(shifts)]
        if self.marked is None:
            self.marked = marked
        for summary in out:
            _log_done(summary)
        return out


#: writes one shift of a chunk: (conn, row_id=, fresh=) -> its summary
ShiftWriter = Callable[..., EvaluationSummary]


def _labelled(summary: EvaluationSummary, run: _Run, asked: set[str]) -> EvaluationSummary:
    old = (run.marked or {}).get(summary.shift_id)
    forward = summary.shift_id not in asked
    if (old is None or summary.superseded_id is not None) and not forward:
        return summary
    return dataclasses.replace(summary, forward=forward,
                               superseded_id=summary.superseded_id or old)


def evaluate_shifts(
    engine: Any,
    config: Any,
    shifts: Sequence[ShiftInstance],
    *,
    now: dt.datetime,
    os_user: str = DEFAULT_USER,
    progress: Progress | None = None,
    extra: ExtraFindings | None = None,
    chunk: int = CHUNK,
    helpers: int | None = None,
) -> list[EvaluationSummary]:
    """Evaluate ``shifts`` in order (re-evaluating any already evaluated), ``chunk`` shifts per
    write transaction.

    A long run has some later chunks read and tested by ``helpers`` helper processes while
    this process writes (:mod:`qcfit.backfill`; default :func:`backfill.helpers_for`, 0 for
    none); the results are the same.

    With sequential charts, every later shift that has chart rows is re-evaluated too, in
    order (``forward`` on its summary). A run of more than one write transaction marks the
    shifts it has not reached yet due (their current evaluations superseded) in its first
    commit: a run that is killed or stopped midway leaves them to the next
    :func:`evaluate_due`, never with results resting on an outdated past.
    """
    if not shifts:
        return []
    asked = {s.id for s in shifts}
    own_stage = extra is None
    if extra is None:  # sequential charts: later shifts with chart values are redone too
        extra = charts.stage_for(engine, config, now=now)
    if hasattr(extra, "expand"):
        shifts = extra.expand(shifts)
    versions = sync_versions(engine, config, now=now, os_user=os_user)
    run = _Run(engine, config, now, versions, os_user, extra, own_stage and extra is not None)
    size = max(1, chunk)
    parts = [shifts[start:start + size] for start in range(0, len(shifts), size)]
    out: list[EvaluationSummary] = []
    if helpers is None:
        helpers = backfill.helpers_for(len(parts))
    ahead = backfill.Lookahead(engine, config, versions, parts, helpers, prepare_chunk,
                               gc_threshold=RUN_GC_THRESHOLD)
    with _few_collections(len(shifts) > 1), ahead:
        for k, part in enumerate(parts):
            rest = shifts[(k + 1) * size:]
            prepared = ahead.take(k)
            if prepared is not None:
                done = run.chunk_prepared(part, rest, prepared)
            else:
                done = [run.one(part[0], rest)] if len(part) == 1 else run.chunk(part, rest)
            out += [_labelled(s, run, asked) for s in done]
            if progress is not None:
                for i in range(len(out) - len(part), len(out)):
                    progress(i + 1, len(shifts), out[i])
    return out


#: objects allocated between two youngest-generation collections of the cycle collector during
#: a run of several shifts (Python's default is 700)
RUN_GC_THRESHOLD = 100_000


@contextmanager
def _few_collections(active: bool) -> Iterator[None]:
    """Run with the cycle collector's youngest generation collected every
    :data:`RUN_GC_THRESHOLD` allocations instead of every 700, then restore the thresholds.

    An evaluation allocates hundreds of thousands of short-lived containers (findings, rows,
    tuples) but builds almost no reference cycles, which plain reference counting frees; with
    the default threshold the collector kept walking the run's live objects and took about a
    fifth of a backfill's CPU time (180 shifts x 50 lines: 11.8 -> 9.2 ms a shift). Garbage in
    cycles is still collected, only less often.
    """
    if not active:
        yield
        return
    old = gc.get_threshold()
    gc.set_threshold(max(RUN_GC_THRESHOLD, old[0]), *old[1:])
    try:
        yield
    finally:
        gc.set_threshold(*old)


def due_shifts(engine: Any, config: Any, *, now: dt.datetime,
               since: dt.datetime | None = None) -> list[ShiftInstance]:
    """Ended shifts (end <= now) from ``since`` (default: the earliest shift in the store)
    that have no current ``ok`` evaluation, oldest first."""
    with read_tx(engine) as conn:
        if since is None:
            first = esql.earliest_shift_start(conn)
            if first is None:
                return []
            since = from_utc_naive(first)
        ended = ShiftCalendar.from_config(config).ended_by(since, now)
        if not ended:
            return []
        status = esql.current_status_between(
            conn, to_utc_naive(ended[0].start), to_utc_naive(ended[-1].start) + dt.timedelta(seconds=1))
    return [s for s in ended if status.get((s.date, s.name)) != OK]


def evaluate_due(
    engine: Any,
    config: Any,
    *,
    now: dt.datetime,
    since: dt.datetime | None = None,
    os_user: str = DEFAULT_USER,
    progress: Progress | None = None,
    extra: ExtraFindings | None = None,
) -> list[EvaluationSummary]:
    """Evaluate every due shift (see :func:`due_shifts`); one failure does not stop the rest."""
    todo = due_shifts(engine, config, now=now, since=since)
    return evaluate_shifts(engine, config, todo, now=now, os_user=os_user, progress=progress,
                           extra=extra)


def shifts_between(config: Any, since: dt.datetime, until: dt.datetime, *, now: dt.datetime
                   ) -> list[ShiftInstance]:
    """Ended shifts starting in [since, until) (for ``qcfit evaluate --since``)."""
    cal = ShiftCalendar.from_config(config)
    end = min(until, now)
    return [s for s in cal.instances_between(since, end) if s.end <= now]
