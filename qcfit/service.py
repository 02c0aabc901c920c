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
good one current.

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
import logging
import math
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

import qcfit
from qcfit import alarmlog, charts, policy
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

    @property
    def ok(self) -> bool:
        return self.status == OK


def shift_seed(base_seed: int, shift_id: str) -> int:
    """The Monte Carlo seed of one shift: a stable 63-bit hash of the base seed and shift id."""
    return ev.derive_seed(base_seed, "shift", shift_id)


# ---------------------------------------------------------------------------------------
# reading


def _table_in(conn: Any, config: Any, shift: ShiftInstance) -> CountTable:
    from qcfit.store.defects import shift_table

    lines = tuple(config.lines)
    categories = tuple(config.categories)
    row = shift_row(conn, shift.id)
    if row is None:
        counts = np.zeros((len(lines), len(categories)), dtype=np.int64)
        units = np.full(len(lines), np.nan)
    else:
        counts, units = shift_table(conn, row.row_id, lines, categories)
    counts = np.array(counts, dtype=np.int64)
    units = np.array(units, dtype=float)
    counts.setflags(write=False)
    units.setflags(write=False)
    return CountTable(shift, lines, categories, counts, units)


def _read_tables(engine: Any, config: Any, shifts: Sequence[ShiftInstance]) -> list[CountTable]:
    """The count tables of ``shifts``, read in one read transaction."""
    with read_tx(engine) as conn:
        return [_table_in(conn, config, s) for s in shifts]


def _baselines(config: Any, versions: Mapping[str, int], table: CountTable
               ) -> tuple[dict[str, BaselineRef | None], dict[str, str]]:
    found: dict[str, BaselineRef | None] = {}
    problems: dict[str, str] = {}
    for line in table.lines:
        try:
            found[line] = baseline_in_force(config, versions, line, table.shift)
        except BaselineError as exc:
            found[line] = None
            problems[line] = str(exc)
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


def _clean(value: Any) -> Any:
    """JSON-safe: non-finite floats -> None, numpy scalars -> Python, tuples -> lists."""
    kind = type(value)
    if kind is float:
        return value if math.isfinite(value) else None
    if kind is str or kind is int or kind is bool or value is None:
        return value
    if isinstance(value, float | np.floating):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, Mapping):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [_clean(v) for v in value]
    return value


def _floats(values: Sequence[float]) -> list[float | None]:
    return [float(v) if math.isfinite(v) else None for v in values]


def finding_row(f: ev.Finding) -> dict[str, Any]:
    """A finding as a ``finding`` table row (reason, figures and words go into ``details``)."""
    details = _clean({
        "reason": f.reason,
        "severity": f.severity,
        "effect_name": f.effect_name,
        "effect_floor": f.effect_floor,
        "alarm_level": f.alarm_level,
        "watch_level": f.watch_level,
        "power_needed": f.power_needed,
        "mc_se": f.mc_se,
        "extra": f.details,
    })
    row = _clean({
        "kind": f.kind,
        "line": f.line,
        "baseline_version_id": f.baseline_version_id,
        "verdict": f.verdict,
        "statistic": f.statistic,
        "dof": f.dof,
        "pvalue": f.pvalue,
        "adjusted_pvalue": f.adjusted_pvalue,
        "effect_size": f.effect_size,
        "method": f.method,
        "method_reason": f.method_reason,
        "n": f.n,
        "min_expected": f.min_expected,
        "power": f.power,
    })
    row["top_categories"] = [c.as_json() for c in f.top_categories]  # JSON-safe already
    details["categories"] = list(f.categories)
    details["observed"] = _floats(f.observed)
    details["expected"] = _floats(f.expected)
    details["adjusted_residuals"] = _floats(f.adjusted_residuals)
    row["details"] = details
    return row


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
               seed: int, now: dt.datetime, t0: float, extra: Any = None) -> EvaluationSummary:
    """Decide and write one shift's evaluation inside the caller's write transaction."""
    row_id = ensure_shifts(conn, [shift])[shift.id]
    active = alarmlog.active_alarms(conn, row_id)
    decided = policy.decide(findings, config.thresholds, shift_id=shift.id, active=active,
                            history=_history(conn, config, shift), names=dict(config.categories))
    old = esql.supersede_current(conn, row_id, to_utc_naive(now))
    eval_id = esql.insert_evaluation(
        conn, _evaluation_row(config, row_id, OK, seed, now, t0, None, True))
    esql.insert_findings(conn, eval_id, [finding_row(f) for f in decided.findings])
    applied = alarmlog.apply_decisions(conn, decided.decisions, shift_row_id=row_id,
                                       shift_start_utc=to_utc_naive(shift.start), now=now)
    if hasattr(extra, "write"):  # the sequential stage keeps its chart values in this transaction
        extra.write(conn, shift, row_id)
    verdicts = Counter(f.verdict for f in decided.findings)
    return EvaluationSummary(
        shift_id=shift.id, evaluation_id=eval_id, status=OK, seed=seed, superseded_id=old,
        findings=len(decided.findings), verdicts=tuple(sorted(verdicts.items())),
        opened=applied.opened, updated=applied.updated, cleared=applied.cleared,
        seconds=time.perf_counter() - t0)


def _commit(engine: Any, config: Any, shift: ShiftInstance, findings: Sequence[ev.Finding],
            seed: int, now: dt.datetime, t0: float, extra: Any = None) -> EvaluationSummary:
    # one write transaction; retried (from scratch) if the store stays locked
    return run_write(engine, lambda conn: _write_one(conn, config, shift, findings, seed, now, t0,
                                                     extra))


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
             extra: ExtraFindings | None) -> tuple[ev.Finding, ...]:
    baselines, problems = _baselines(config, versions, table)
    more = tuple(extra(table, baselines)) if extra is not None else ()
    findings = ev.evaluate_table(table, baselines, config.thresholds, seed=seed, extra=more)
    return tuple(_with_problems(findings, problems))


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
    """
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
        summary = _commit(engine, config, shift, findings, seed, now, t0, extra)
    except Exception as exc:
        return _record_failure(engine, config, shift, exc, seed, now, t0)
    _log_done(summary)
    return summary


CHUNK = 25  # shifts per write transaction in a backfill


def _evaluate_chunk(engine: Any, config: Any, shifts: Sequence[ShiftInstance], *,
                    now: dt.datetime, versions: Mapping[str, int], os_user: str,
                    extra: ExtraFindings | None) -> list[EvaluationSummary]:
    """Several shifts: one read transaction, compute, then ONE write transaction for all of
    them in order (each shift's results are still all-or-nothing). Any trouble, and the chunk
    is evaluated shift by shift instead, so failures are recorded one by one."""
    t0 = time.perf_counter()
    try:
        tables = _read_tables(engine, config, shifts)
        work = [(s, shift_seed(config.thresholds.seed, s.id)) for s in shifts]
        computed = [(s, seed, _compute(config, versions, t, seed, extra))
                    for (s, seed), t in zip(work, tables, strict=True)]
        out = run_write(engine, lambda conn: [
            _write_one(conn, config, s, found, seed, now, t0, extra) for s, seed, found in computed])
    except Exception as exc:
        log.warning("evaluating %d shifts together failed (%s); going shift by shift",
                    len(shifts), _error_text(exc))
        return [evaluate_shift(engine, config, s, now=now, versions=versions, os_user=os_user,
                               extra=extra) for s in shifts]
    for summary in out:
        _log_done(summary)
    return out


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
) -> list[EvaluationSummary]:
    """Evaluate ``shifts`` in order (re-evaluating any already evaluated), ``chunk`` shifts per
    write transaction."""
    if not shifts:
        return []
    if extra is None:  # sequential charts: later shifts with chart values are redone too
        extra = charts.stage_for(engine, config, now=now)
    if hasattr(extra, "expand"):
        shifts = extra.expand(shifts)
    versions = sync_versions(engine, config, now=now, os_user=os_user)
    out: list[EvaluationSummary] = []
    for start in range(0, len(shifts), max(1, chunk)):
        part = shifts[start:start + max(1, chunk)]
        if len(part) == 1:
            out.append(evaluate_shift(engine, config, part[0], now=now, versions=versions,
                                      os_user=os_user, extra=extra))
        else:
            out += _evaluate_chunk(engine, config, part, now=now, versions=versions,
                                   os_user=os_user, extra=extra)
        if progress is not None:
            for i in range(len(out) - len(part), len(out)):
                progress(i + 1, len(shifts), out[i])
    return out


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
