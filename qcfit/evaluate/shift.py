"""One shift's findings (:func:`evaluate_table`), and several shifts' at once with the array
work done for all their lines together (:func:`evaluate_tables`)."""

from __future__ import annotations

import logging
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from qcfit import stats as qstats
from qcfit.evaluate.findings import (
    KIND_BASELINE,
    KIND_BETWEEN,
    KIND_VS_REST,
    NOT_TESTED,
    TESTED,
    TOO_LITTLE_DATA,
    Finding,
    _contained,
    _opt_float,
    _power_reason,
    _top_rows,
    chisq_powers,
    derive_seed,
)
from qcfit.evaluate.fits import (
    FAR_REASON,
    _fit_jobs,
    _gof_refine,
    _gof_rows,
    _in_line_order,
    fit_lines,
)
from qcfit.evaluate.lines import (
    _between,
    _large_text,
    _vs_rest_alone,
    compare_lines,
)
from qcfit.evaluate.rates import (
    _rate_findings,
    _rate_jobs,
    rate_lines,
)
from qcfit.model import BaselineRef, CountTable

log = logging.getLogger(__name__)


def evaluate_table(
    table: CountTable,
    baselines: Mapping[str, BaselineRef | None],
    thresholds: Any,
    *,
    seed: int,
    extra: Iterable[Finding] = (),
) -> tuple[Finding, ...]:
    """Every finding for one shift.

    ``baselines`` maps each line of ``table`` to the baseline in force (None when there is
    none); ``thresholds`` is the config's ``[thresholds]``; ``seed`` the shift's Monte Carlo
    seed (each test derives its own from it, so a test's numbers do not depend on which other
    lines exist). ``extra`` holds per-line findings made elsewhere (sequential charts), appended
    as they are. Order: baseline per line, rate per line, between-lines, line-vs-rest, extra.
    """
    _check_table(table)
    rates = rate_lines(table, baselines, thresholds)
    lines = compare_lines(table, thresholds, seed=seed)
    family = [f.pvalue for f in rates + lines[:1] if f.testable]
    fits = fit_lines(table, baselines, thresholds, seed=seed, family=family)
    return tuple(fits + rates + lines + list(extra))


def _check_table(table: CountTable) -> None:
    from qcfit.errors import InvalidArgumentError

    counts = np.asarray(table.counts)
    if counts.shape != (len(table.lines), len(table.categories)):
        raise InvalidArgumentError(
            "table.counts", f"shape {counts.shape} does not match "
            f"{len(table.lines)} lines x {len(table.categories)} categories")
    if counts.size and counts.min() < 0:
        bad = np.argwhere(counts < 0)[0]
        raise InvalidArgumentError("table.counts", f"has a negative count at {list(map(int, bad))}")
    if np.asarray(table.units).shape != (len(table.lines),):
        raise InvalidArgumentError("table.units", "needs one value per line")


# ---------------------------------------------------------------------------------------
# several shifts at once


def evaluate_tables(
    tables: Sequence[CountTable],
    baselines: Sequence[Mapping[str, BaselineRef | None]],
    thresholds: Any,
    *,
    seeds: Sequence[int],
    extras: Sequence[Iterable[Finding]] | None = None,
) -> list[tuple[Finding, ...]]:
    """Every finding of several shifts: element i equals ``evaluate_table(tables[i],
    baselines[i], thresholds, seed=seeds[i], extra=extras[i])``, field for field.

    The array work is done once for the lines of all shifts (baseline fits, rate tests, power,
    residuals and top categories, each line against the pooled rest of its own shift); what
    belongs to one shift stays per shift (its seeds, the multiplicity family of its fits, the
    between-lines table, the refinement of p-values near a decision). A line whose test
    raises gives its fault finding as in :func:`evaluate_table`; if a step over all shifts
    fails, the shifts are evaluated one by one with :func:`evaluate_table` instead.
    """
    from qcfit.errors import InvalidArgumentError

    count = len(tables)
    if len(baselines) != count or len(seeds) != count or (
            extras is not None and len(extras) != count):
        raise InvalidArgumentError(
            "tables", "needs one baseline mapping, one seed (and one extra) per table")
    more = [tuple(x) for x in extras] if extras is not None else [()] * count
    for table in tables:
        _check_table(table)
    try:
        return _evaluate_chunk(list(tables), list(baselines), thresholds, list(seeds), more)
    except Exception:
        log.warning("evaluation of %d shifts together failed; evaluating them one by one",
                    count, exc_info=True)
        return [evaluate_table(t, b, thresholds, seed=s, extra=x)
                for t, b, s, x in zip(tables, baselines, seeds, more, strict=True)]


def _evaluate_chunk(tables: list[CountTable], baselines: list[Mapping[str, BaselineRef | None]],
                    thresholds: Any, seeds: list[int], extras: list[tuple[Finding, ...]]
                    ) -> list[tuple[Finding, ...]]:
    rates = _rates_many(tables, baselines, thresholds)
    between = [_contained(KIND_BETWEEN, None, None,
                          lambda t=t, s=s: _between(t, thresholds, derive_seed(s, KIND_BETWEEN)))
               for t, s in zip(tables, seeds, strict=True)]
    rests = _vs_rest_many(tables, thresholds, [derive_seed(s, KIND_VS_REST) for s in seeds])
    families = [[f.pvalue for f in [*r, b] if f.testable]
                for r, b in zip(rates, between, strict=True)]
    fits = _fits_many(tables, baselines, thresholds, seeds, families)
    return [tuple(f + r + [b] + v + list(x))
            for f, r, b, v, x in zip(fits, rates, between, rests, extras, strict=True)]


def _split(items: Sequence[Any], sizes: Sequence[int]) -> list[list[Any]]:
    """``items`` cut into consecutive pieces of ``sizes``."""
    out, at = [], 0
    for n in sizes:
        out.append(list(items[at:at + n]))
        at += n
    return out


def _rates_many(tables: Sequence[CountTable], baselines: Sequence[Mapping[str, Any]],
                thresholds: Any) -> list[list[Finding]]:
    jobs = [_rate_jobs(t, b, thresholds) for t, b in zip(tables, baselines, strict=True)]
    found = _rate_findings([j for part in jobs for j in part], keep_none=True)
    return [[f for f in part if f is not None]
            for part in _split(found, [len(part) for part in jobs])]


def _fits_many(tables: Sequence[CountTable], baselines: Sequence[Mapping[str, Any]],
               thresholds: Any, seeds: Sequence[int], families: Sequence[Sequence[float]]
               ) -> list[list[Finding]]:
    """:func:`fit_lines` of each shift with its ``family``: the asymptotic pass for the lines
    of all shifts at once (per set of categories), the refinement shift by shift."""
    draws = int(getattr(thresholds, "mc_draws", 10_000))
    method = getattr(thresholds, "multiple_testing", "bh")
    parts = [_fit_jobs(t, b, thresholds) for t, b in zip(tables, baselines, strict=True)]
    groups: dict[tuple[str, ...], list[int]] = {}
    for k, (table, (_, jobs)) in enumerate(zip(tables, parts, strict=True)):
        if jobs:
            groups.setdefault(tuple(table.categories), []).append(k)
    first: dict[int, list[Finding]] = {}
    for codes, ks in groups.items():
        jobs = [j for k in ks for j in parts[k][1]]
        observed = np.concatenate(
            [tables[k].counts[[j.index for j in parts[k][1]]] for k in ks]).astype(np.int64)
        found = _gof_rows(codes, jobs, observed, derive_seed(seeds[ks[0]], KIND_BASELINE), draws,
                          mode="asymptotic", reason=FAR_REASON)
        first.update(zip(ks, _split(found, [len(parts[k][1]) for k in ks]), strict=True))
    out = []
    for k, (table, (done, jobs)) in enumerate(zip(tables, parts, strict=True)):
        found = (_gof_refine(table, jobs, first[k], derive_seed(seeds[k], KIND_BASELINE), draws,
                             families[k], method) if jobs else [])
        out.append(_in_line_order(done, jobs, found))
    return out


@dataclass(frozen=True, slots=True)
class _RestShift:
    """One shift whose lines are compared with the rest of it."""

    at: int  # position in the chunk
    table: CountTable
    counts: np.ndarray  # int64, lines x categories
    col: np.ndarray  # category totals
    cols: np.ndarray  # categories with defects
    seed: int


def _vs_rest_many(tables: Sequence[CountTable], limits: Any, seeds: Sequence[int]
                  ) -> list[list[Finding]]:
    """:func:`_each_vs_rest` of each shift; the asymptotic tests of the lines of all shifts
    in one call per number of categories with defects."""
    out: list[list[Finding]] = [[] for _ in tables]
    shifts = []
    for k, (table, seed) in enumerate(zip(tables, seeds, strict=True)):
        counts = np.ascontiguousarray(table.counts, dtype=np.int64)
        col = counts.sum(axis=0)
        cols = np.flatnonzero(col > 0)
        if cols.size < 2 or (counts.sum(axis=1) > 0).sum() < 2:
            why = "fewer than 2 lines or 2 categories with defects this shift"
            out[k] = [Finding(kind=KIND_VS_REST, line=ln, verdict=NOT_TESTED, reason=why,
                              n=int(counts[i].sum())) for i, ln in enumerate(table.lines)]
        else:
            shifts.append(_RestShift(k, table, counts, col, cols, seed))
    if not shifts:
        return out
    totals = [int(s.col.sum()) for s in shifts]
    powers = chisq_powers(limits.min_effect_v, [s.cols.size - 1 for s in shifts], totals,
                          limits.alarm_level).tolist()
    groups: dict[int, list[int]] = {}
    for g, s in enumerate(shifts):
        groups.setdefault(int(s.cols.size), []).append(g)
    for members in groups.values():
        found = _vs_rest_group([shifts[g] for g in members], [powers[g] for g in members],
                               [totals[g] for g in members], limits)
        for g, part in zip(members, found, strict=True):
            out[shifts[g].at] = part
    return out


def _vs_rest_group(shifts: Sequence[_RestShift], powers: Sequence[float], totals: Sequence[int],
                   limits: Any) -> list[list[Finding]]:
    """Line-vs-rest findings of shifts with the same number of categories with defects."""
    sizes = [len(s.table.lines) for s in shifts]
    mine = np.concatenate([s.counts[:, s.cols] for s in shifts])
    col = np.concatenate([np.broadcast_to(s.col[s.cols], (n, s.cols.size))
                          for s, n in zip(shifts, sizes, strict=True)])
    total = np.repeat(np.array([s.col.sum() for s in shifts]), sizes)
    rows_n = mine.sum(axis=1)
    share = col / total[:, None]
    pair_e = np.stack([rows_n[:, None] * share, (total - rows_n)[:, None] * share], axis=1)
    small = (pair_e < 5.0).mean(axis=(1, 2))  # 2 x c' expected counts per line: Cochran's rule
    low = pair_e.min(axis=(1, 2))
    fast = (rows_n > 0) & (low >= 1.0) & (small <= 0.2)
    rest = col - mine
    res = qstats.compare_with_rest(mine, rest, statistic="pearson")
    at = np.repeat(np.arange(len(shifts)), sizes)
    rows = np.flatnonzero(fast)
    codes = [tuple(s.table.categories[j] for j in s.cols.tolist()) for s in shifts]
    same = []
    for power, n in zip(powers, totals, strict=True):
        enough = power >= limits.power
        same.append({
            "kind": KIND_VS_REST, "verdict": TESTED if enough else TOO_LITTLE_DATA,
            "reason": _power_reason(enough, power, limits.power, "V", limits.min_effect_v, n),
            "effect_name": "V", "effect_floor": float(limits.min_effect_v),
            "alarm_level": float(limits.alarm_level), "watch_level": float(limits.watch_level),
            "power": power, "power_needed": float(limits.power)})
    quick = _vs_rest_rows(res, rows, at[rows].tolist(), codes, same, mine, rest, low, small,
                          [ln for s in shifts for ln in s.table.lines])
    out: list[list[Finding]] = []
    starts = np.cumsum([0, *sizes]).tolist()
    for g, s in enumerate(shifts):
        found = []
        for i, line in enumerate(s.table.lines):
            f = quick.get(starts[g] + i)
            if f is None:
                f = _contained(KIND_VS_REST, line, None,
                               lambda s=s, i=i, p=powers[g]: _vs_rest_alone(
                                   s.table, s.counts, s.col, i, limits, p, s.seed))
            found.append(f)
        out.append(found)
    return out


def _vs_rest_rows(res: Any, rows: np.ndarray, shift_of: list[int], codes: list[tuple[str, ...]],
                  same: list[dict[str, Any]], mine: np.ndarray, rest: np.ndarray,
                  low: np.ndarray, small: np.ndarray, lines: list[str]) -> dict[int, Finding]:
    """:func:`_vs_rest_batch` for the ``rows`` of stacked shifts (``res`` from
    :func:`qcfit.stats.compare_with_rest`), by stacked row."""
    mine, rest = mine[rows], rest[rows]
    rest_sum = rest.sum(axis=1)
    rest_share = rest / np.maximum(rest_sum, 1)[:, None]  # rows without a rest: all 0
    expected = np.asarray(res.expected, dtype=float)[rows]
    residuals = np.asarray(res.adjusted_residuals, dtype=float)[rows]
    tops = _top_rows([codes[g] for g in shift_of], mine, expected, residuals, rest_share)
    field = {name: np.asarray(getattr(res, name))[rows].tolist()
             for name in ("tested", "method_reason", "statistic", "dof", "pvalue",
                          "effect_size", "method", "pvalue_se")}
    n_mine = mine.sum(axis=1).tolist()
    reasons = [_large_text(a, b) for a, b in zip(low[rows], small[rows], strict=True)]
    per_row = zip(rows.tolist(), shift_of, mine.astype(float).tolist(), expected.tolist(),
                  residuals.tolist(), expected.min(axis=1).tolist(), rest.astype(int).tolist(),
                  strict=True)
    out = {}
    for k, (i, g, observed, exp, resid, smallest, rest_row) in enumerate(per_row):
        if not field["tested"][k]:
            out[i] = Finding(kind=KIND_VS_REST, line=lines[i], verdict=NOT_TESTED, n=n_mine[k],
                             reason=str(field["method_reason"][k]))
            continue
        out[i] = Finding(
            line=lines[i], statistic=float(field["statistic"][k]), dof=int(field["dof"][k]),
            pvalue=float(field["pvalue"][k]), effect_size=float(field["effect_size"][k]),
            method=str(field["method"][k]), method_reason=reasons[k],
            mc_se=_opt_float(field["pvalue_se"][k]), n=n_mine[k], min_expected=smallest,
            top_categories=tops[k], categories=codes[g], observed=tuple(observed),
            expected=tuple(exp), adjusted_residuals=tuple(resid),
            details={"rest_observed": rest_row}, **same[g])
    return out
