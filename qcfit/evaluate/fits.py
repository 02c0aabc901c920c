"""Each line's mix against its baseline (goodness of fit, two passes: asymptotic, then
the ``auto`` p-value where it can change a decision)."""

from __future__ import annotations

import functools
import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from qcfit import stats as qstats
from qcfit.evaluate.findings import (
    IMPOSSIBLE,
    KIND_BASELINE,
    NO_BASELINE,
    NOT_TESTED,
    TESTED,
    TOO_LITTLE_DATA,
    UNKNOWN_CATEGORY,
    CategoryShift,
    Finding,
    _contained,
    _opt_float,
    _power_reason,
    chisq_powers,
    cochran_rows,
    decision_levels,
    derive_seed,
    thresholds_for,
    top_shifts_rows,
)
from qcfit.model import BaselineRef, CountTable

log = logging.getLogger(__name__)


@dataclass(frozen=True, slots=True)
class _GofJob:
    index: int  # row in the count table
    line: str
    baseline: BaselineRef
    proportions: np.ndarray  # in table category order
    limits: Any  # thresholds after overrides


def _baseline_proportions(
    table: CountTable, line_idx: int, baseline: BaselineRef
) -> tuple[np.ndarray | None, Finding | None]:
    line = table.lines[line_idx]
    try:
        props, absent = _shares_in_order(baseline, tuple(table.categories))
    except TypeError:  # an unhashable baseline record: no cache
        props, absent = _shares_in_order.__wrapped__(baseline, tuple(table.categories))
    counts = table.counts[line_idx]
    missing = [table.categories[j] for j in absent if counts[j] > 0]
    if missing:
        return None, Finding(
            kind=KIND_BASELINE,
            line=line,
            verdict=UNKNOWN_CATEGORY,
            reason=(
                f"baseline {baseline.name!r} (version {baseline.version_id}) has no share for "
                f"category {', '.join(missing)}, which has defects this shift"
            ),
            baseline_version_id=baseline.version_id,
            n=int(counts.sum()),
            details={"categories": missing},
        )
    if props is None:
        raise ValueError(f"baseline {baseline.name!r} has no positive share")
    return props, None


@functools.lru_cache(maxsize=256)
def _shares_in_order(baseline: BaselineRef, categories: tuple[str, ...]
                     ) -> tuple[np.ndarray | None, tuple[int, ...]]:
    """The baseline's shares in ``categories`` order, normalised (read-only; None when no share
    is positive), and the positions of categories the baseline does not name."""
    known = dict(zip(baseline.categories, baseline.proportions, strict=True))
    absent = tuple(j for j, c in enumerate(categories) if c not in known)
    props = np.array([float(known.get(c, 0.0)) for c in categories])
    total = props.sum()
    if not total > 0:
        return None, absent
    props = props / total
    props.setflags(write=False)
    return props, absent


def _gof_job(table: CountTable, i: int, baseline: BaselineRef, limits: Any) -> _GofJob | Finding:
    props, problem = _baseline_proportions(table, i, baseline)
    if problem is not None:
        return problem
    assert props is not None
    return _GofJob(i, table.lines[i], baseline, props, limits)


def _gof_batch(table: CountTable, jobs: Sequence[_GofJob], seed: int, draws: int, *,
               mode: str = "auto", levels: tuple[float, ...] | None = None,
               reason: str | None = None) -> list[Finding]:
    observed = np.stack([table.counts[j.index] for j in jobs]).astype(np.int64)
    return _gof_rows(tuple(table.categories), jobs, observed, seed, draws, mode=mode,
                     levels=levels, reason=reason)


def _gof_rows(codes: tuple[str, ...], jobs: Sequence[_GofJob], observed: np.ndarray, seed: int,
              draws: int, *, mode: str = "auto", levels: tuple[float, ...] | None = None,
              reason: str | None = None) -> list[Finding]:
    """Baseline findings of ``jobs`` (lines of one or several shifts with the category
    ``codes``), ``observed`` their int64 count rows (lines x categories)."""
    props = np.stack([j.proportions for j in jobs])
    result = qstats.fit_to_baseline(
        observed, props, statistic="pearson", pvalue=mode, seed=seed, draws=draws,
        levels=levels or decision_levels(j.limits for j in jobs))
    totals = observed.sum(axis=1)
    powers = chisq_powers([j.limits.min_effect_w for j in jobs], np.asarray(result.dof),
                          totals, [j.limits.alarm_level for j in jobs])
    cols = {name: np.asarray(getattr(result, name)).tolist() for name in _GOF_FIELDS}
    expected = np.atleast_2d(np.asarray(result.expected, dtype=float))
    residuals = np.atleast_2d(np.asarray(result.adjusted_residuals, dtype=float))
    # per-line values as plain Python numbers, one conversion per array
    rows = {"n": totals.tolist(), "power": powers.tolist(),
            "observed": observed.astype(float).tolist(), "expected": expected.tolist(),
            "residuals": residuals.tolist(),
            "top": top_shifts_rows(codes, observed, expected, residuals, props)}
    return [_gof_finding(jobs[i], cols, rows, i, observed[i], props[i], codes, reason)
            for i in range(len(jobs))]


_GOF_FIELDS = ("impossible", "tested", "method_reason", "dof", "statistic", "pvalue",
               "effect_size", "method", "pvalue_se", "min_expected")


def _gof_finding(job: _GofJob, cols: Mapping[str, Any], rows: Mapping[str, Any], i: int,
                 observed: np.ndarray, props: np.ndarray, codes: tuple[str, ...],
                 reason: str | None = None) -> Finding:
    """Line ``i`` of a batch: ``cols`` holds the stats result's per-line fields and ``rows``
    the per-line figures of :func:`_gof_batch`, both as Python lists."""
    limits = job.limits
    n = rows["n"][i]
    power = rows["power"][i]
    common = {"kind": KIND_BASELINE, "line": job.line, "n": n,
              "baseline_version_id": job.baseline.version_id,
              "alarm_level": float(limits.alarm_level), "watch_level": float(limits.watch_level),
              "categories": codes, "observed": tuple(rows["observed"][i]),
              "expected": tuple(rows["expected"][i]),
              "details": {"baseline": job.baseline.name,
                          "effective": job.baseline.effective.isoformat()}}
    if bool(cols["impossible"][i]):
        bad = [j for j in range(len(codes)) if props[j] <= 0 and observed[j] > 0]
        words = ", ".join(f"{codes[j]} ({int(observed[j])})" for j in bad)
        return Finding(
            verdict=IMPOSSIBLE,
            reason=f"defects in a category the baseline says never occurs: {words}",
            method="impossible-category",
            top_categories=tuple(
                CategoryShift(codes[j], "up", math.inf, int(observed[j]), 0.0,
                              float(observed[j] / n), 0.0) for j in bad),
            **common)
    if not bool(cols["tested"][i]):
        return Finding(verdict=NOT_TESTED,
                       reason=str(cols["method_reason"][i] or "not tested"), **common)
    dof = int(cols["dof"][i])
    enough = power >= limits.power
    return Finding(
        verdict=TESTED if enough else TOO_LITTLE_DATA,
        reason=_power_reason(enough, power, limits.power, "w", limits.min_effect_w, n),
        statistic=float(cols["statistic"][i]),
        dof=dof,
        pvalue=float(cols["pvalue"][i]),
        effect_size=float(cols["effect_size"][i]),
        effect_name="w",
        effect_floor=float(limits.min_effect_w),
        power=power,
        power_needed=float(limits.power),
        method=str(cols["method"][i]),
        method_reason=reason or _str_or_none(cols["method_reason"][i]),
        mc_se=_opt_float(cols["pvalue_se"][i]),
        min_expected=_opt_float(cols["min_expected"][i]),
        top_categories=rows["top"][i],
        adjusted_residuals=tuple(rows["residuals"][i]),
        **common,
    )


def _str_or_none(value: Any) -> str | None:
    return None if value is None else str(value)


def fit_lines(
    table: CountTable, baselines: Mapping[str, BaselineRef | None], thresholds: Any, *, seed: int,
    family: Sequence[float] | None = None,
) -> list[Finding]:
    """Baseline findings for every line of ``table`` (vectorised over lines; line by line if
    that fails, so one bad line becomes one fault finding).

    ``family``: the other p-values of the shift's multiple-testing family (rate, between lines).
    When given, ``auto`` p-values are computed where they can change a decision: first the
    asymptotic p-value of every line; the lines whose table fails Cochran's rule, or whose
    multiplicity-adjusted p-value is within a factor 3 of an alarm or watch level, are then
    computed with ``auto`` refined near the raw p-value that maps onto that level (for BH at
    rank r of m: level x r / m). The rest keep the asymptotic p-value, which no refinement
    could move across a decision level. Without ``family`` every line gets ``auto`` at the
    nominal levels.
    """
    out, jobs = _fit_jobs(table, baselines, thresholds)
    gof_seed = derive_seed(seed, KIND_BASELINE)
    draws = int(getattr(thresholds, "mc_draws", 10_000))
    try:
        if family is None:
            found = _gof_batch(table, jobs, gof_seed, draws) if jobs else []
        else:
            found = _gof_two_pass(table, jobs, gof_seed, draws, family,
                                  getattr(thresholds, "multiple_testing", "bh"))
    except Exception:
        log.warning("baseline test of %d lines failed together; retrying line by line", len(jobs))
        found = [
            _contained(KIND_BASELINE, j.line, j.baseline.version_id,
                       lambda j=j: _gof_batch(table, [j], gof_seed, draws)[0])
            for j in jobs
        ]
    return _in_line_order(out, jobs, found)


def _in_line_order(out: dict[int, Finding], jobs: Sequence[_GofJob], found: Sequence[Finding]
                   ) -> list[Finding]:
    for job, finding in zip(jobs, found, strict=True):
        out[job.index] = finding
    return [out[i] for i in sorted(out)]


def _fit_jobs(table: CountTable, baselines: Mapping[str, BaselineRef | None], thresholds: Any
              ) -> tuple[dict[int, Finding], list[_GofJob]]:
    """The lines of ``table`` to fit (jobs), and the findings of those that cannot be fitted
    (no baseline, a category the baseline lacks, a fault) by line index."""
    out: dict[int, Finding] = {}
    jobs: list[_GofJob] = []
    for i, line in enumerate(table.lines):
        baseline = baselines.get(line)
        if baseline is None:
            out[i] = Finding(kind=KIND_BASELINE, line=line, verdict=NO_BASELINE,
                             reason=f"no baseline in force for line {line} on {table.shift.date}",
                             n=int(table.counts[i].sum()))
            continue
        job = _contained(KIND_BASELINE, line, baseline.version_id,
                         lambda i=i, b=baseline: _gof_job(table, i, b, thresholds_for(thresholds, b)))
        if isinstance(job, Finding):
            out[i] = job
        else:
            jobs.append(job)
    return out, jobs


FAR_REASON = ("asymptotic chi-square: Cochran's rule holds and the multiplicity-adjusted "
              "p-value is far from every decision level (or maps to a raw level below 0.001)")
NEAR_FACTOR = 3.0  # refine when the adjusted p is within this factor of a level (as stats does)
# qcfit.stats refines a Monte Carlo p-value near a raw level L up to a 2% relative standard
# error (``REFINE_REL_SE``), about (1 - L)/(L 0.0004) draws: 247,500 at L = 0.01, its cap of
# 1,000,000 (``MAX_DRAWS``) from L = 2.5e-3 down; it stops as soon as the estimate is more than
# 3 standard errors from every level. Raw levels below this floor are not refined; there the asymptotic p-value stands
# (Cochran's rule holds for those tables; common practice, no source).
REFINE_FLOOR = 1e-3


def _adjusted(p: np.ndarray, method: str) -> np.ndarray:
    if method == "none" or p.size <= 1:
        return p.copy()
    return np.asarray(qstats.adjust_pvalues(p, method=method), dtype=float)


def _gof_two_pass(table: CountTable, jobs: Sequence[_GofJob], seed: int, draws: int,
                  family: Sequence[float], method: str) -> list[Finding]:
    if not jobs:
        return []
    first = _gof_batch(table, jobs, seed, draws, mode="asymptotic", reason=FAR_REASON)
    return _gof_refine(table, jobs, first, seed, draws, family, method)


def _gof_refine(table: CountTable, jobs: Sequence[_GofJob], first: list[Finding], seed: int,
                draws: int, family: Sequence[float], method: str) -> list[Finding]:
    """The second pass of :func:`_gof_two_pass`: ``first`` holds the asymptotic findings of
    ``jobs``; the lines where a refined p-value could change a decision are recomputed."""
    own = np.array([f.pvalue if f.testable else np.nan for f in first], dtype=float)
    others = np.array([p for p in family if p is not None and math.isfinite(p)], dtype=float)
    mine = np.flatnonzero(np.isfinite(own))
    adj = np.full(len(jobs), np.nan)
    if mine.size:
        adj[mine] = _adjusted(np.concatenate([own[mine], others]), method)[: mine.size]
    sparse_rows = ~cochran_rows(np.array([f.expected for f in first], dtype=float),
                                np.stack([j.proportions for j in jobs]) > 0)
    refine, levels = [], set()
    for i, (job, f, adj_i, sparse) in enumerate(zip(jobs, first, adj.tolist(),
                                                     sparse_rows.tolist(), strict=True)):
        if not f.testable:
            continue
        lv = (float(job.limits.alarm_level), float(job.limits.watch_level))
        near = [a for a in lv if a / NEAR_FACTOR <= adj_i <= a * NEAR_FACTOR]
        if near or sparse:
            scale = own[i] / adj[i] if adj[i] > 0 else 1.0
            raw = [a * scale for a in lv]
            if sparse or any(x >= REFINE_FLOOR for x in raw):
                refine.append(i)
                levels.update(min(0.5, max(REFINE_FLOOR, x)) for x in raw)
    if not refine:
        return first
    better = _gof_batch(table, [jobs[i] for i in refine], seed, draws, mode="auto",
                        levels=tuple(sorted(levels)))
    out = list(first)
    for i, f in zip(refine, better, strict=True):
        out[i] = f
    return out
