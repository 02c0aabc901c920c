"""One shift's counts + the baselines in force + thresholds -> findings (pure).

A :class:`Finding` is one test with its context: what was tested (kind, line, baseline
version), the numbers (statistic, df, p-value, effect size, power) and a verdict. This stage
decides only what the numbers allow: ``tested`` (enough data to see the smallest effect that
matters), ``too-little-data`` (not enough), or a reason no test was run. The alarm policy
(:mod:`qcfit.policy`) adjusts p-values across the shift and turns ``tested`` into
``in-control`` / ``watch`` / ``alarm``.

Tests per shift (``kind``):

* ``baseline``: each line's category counts against the baseline mix in force for it
  (goodness of fit, Pearson X^2, ``auto`` p-value, Cohen's w = sqrt(X^2/n); Cohen 1988, ch. 7);
* ``between-lines``: lines x categories homogeneity (Pearson X^2, Cramér's V =
  sqrt(X^2 / (n (min(r, c) - 1))); Cramér 1946);
* ``line-vs-rest``: each line against the pooled other lines (2 x k table; V = sqrt(X^2/n)),
  which names the line behind a between-lines difference;
* ``rate``: defects per inspected unit against the baseline rate (exact one-sided Poisson test;
  effect = observed rate / baseline rate).

Power (the "too little data to tell" verdict) is the noncentral chi-square power of the test
at the alarm level against the smallest effect that matters: power = P(chi2(df, n w^2) >
chi2_{1-alpha}(df)) (Cohen 1988, ch. 7). For the rate test it is the exact Poisson power
against ``min_rate_ratio``.

p-values: each line's fit uses the ``auto`` p-value of :func:`qcfit.stats.fit_to_baseline`
where it can change a decision (see :func:`fit_lines`: sparse tables, and tests whose
multiplicity-adjusted p-value is near an alarm or watch level); elsewhere the asymptotic p-value,
which no refinement could move across a level. Tables of lines use the asymptotic p-value when
Cochran's rule holds, ``auto`` otherwise.

An exception in one line's test is caught and becomes a ``fault`` finding for that line; the
other lines are still evaluated. Sequential-chart findings come from elsewhere and are passed in
as ``extra`` (they are appended unchanged).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import logging
import math
import operator
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special
from scipy import stats as sps

from qcfit import stats as qstats
from qcfit.model import BaselineRef, CountTable

log = logging.getLogger(__name__)

KIND_BASELINE = "baseline"
KIND_BETWEEN = "between-lines"
KIND_VS_REST = "line-vs-rest"
KIND_RATE = "rate"
KIND_SEQUENTIAL = "sequential"

# Verdicts this stage gives (the policy adds in-control / watch / alarm).
TESTED = "tested"
TOO_LITTLE_DATA = "too-little-data"
NOT_TESTED = "not-tested"
IMPOSSIBLE = "impossible-category"
NO_BASELINE = "no-baseline"
UNKNOWN_CATEGORY = "category-not-in-baseline"
FAULT = "fault"
TESTABLE = frozenset({TESTED, TOO_LITTLE_DATA})

TOP_CATEGORIES = 3
# |adjusted residual| worth naming: common practice, no source (about the two-sided 5% normal
# quantile, as in Agresti 2007, sec. 2.4.5, who reads |r| > 2 or 3 as a lack of fit).
RESIDUAL_WORTH_NAMING = 2.0


@dataclass(frozen=True, slots=True)
class CategoryShift:
    """One category's departure: direction "up"/"down", the adjusted (Haberman) residual,
    observed count and share vs the reference share (baseline, or the pooled rest)."""

    code: str
    direction: str
    adjusted_residual: float
    observed: int
    expected: float
    share: float
    reference_share: float

    @property
    def ratio(self) -> float:
        """Observed share / reference share (inf when the reference share is 0)."""
        if self.reference_share <= 0:
            return math.inf
        return self.share / self.reference_share

    def as_json(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "direction": self.direction,
            "adjusted_residual": (round(self.adjusted_residual, 4)
                                  if math.isfinite(self.adjusted_residual) else None),
            "observed": self.observed,
            "expected": round(self.expected, 4),
            "share": round(self.share, 6),
            "reference_share": round(self.reference_share, 6),
        }


@dataclass(frozen=True, slots=True)
class Finding:
    """One test of one shift (or why no test was run).

    ``effect_floor`` is the smallest effect that matters for this test (w, V or rate ratio);
    ``alarm_level`` / ``watch_level`` are the levels on the adjusted p-value for this test
    (per-baseline overrides already applied). ``adjusted_pvalue`` and ``severity`` are filled
    by the policy.
    """

    kind: str
    line: str | None
    verdict: str
    reason: str
    baseline_version_id: int | None = None
    statistic: float | None = None
    dof: int | None = None
    pvalue: float | None = None
    effect_size: float | None = None
    effect_name: str | None = None
    effect_floor: float | None = None
    alarm_level: float = 0.01
    watch_level: float = 0.05
    power: float | None = None
    power_needed: float | None = None
    method: str | None = None
    method_reason: str | None = None
    mc_se: float | None = None
    n: int | None = None
    min_expected: float | None = None
    top_categories: tuple[CategoryShift, ...] = ()
    categories: tuple[str, ...] = ()
    observed: tuple[float, ...] = ()
    expected: tuple[float, ...] = ()
    adjusted_residuals: tuple[float, ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)
    adjusted_pvalue: float | None = None
    severity: str | None = None

    @property
    def testable(self) -> bool:
        """True when the finding carries a p-value that takes part in the decision."""
        return self.verdict in TESTABLE and self.pvalue is not None


_FINDING_FIELDS = tuple(f.name for f in dataclasses.fields(Finding))
_FINDING_AT = {name: i for i, name in enumerate(_FINDING_FIELDS)}
_finding_values = operator.attrgetter(*_FINDING_FIELDS)


def with_values(f: Finding, **changes: Any) -> Finding:
    """``dataclasses.replace(f, **changes)`` for a :class:`Finding`, without its per-call field
    inspection (the policy copies every finding of a shift)."""
    values = list(_finding_values(f))
    for name, value in changes.items():
        values[_FINDING_AT[name]] = value
    return Finding(*values)


# ---------------------------------------------------------------------------------------
# seeds and thresholds


def derive_seed(base: int, *parts: object) -> int:
    """A non-negative 63-bit seed from a base seed and labels (sha256; stable across runs)."""
    text = ":".join([str(int(base))] + [str(p) for p in parts])
    return int.from_bytes(hashlib.sha256(text.encode("utf-8")).digest()[:8], "big") >> 1


def thresholds_for(thresholds: Any, baseline: BaselineRef | None) -> Any:
    """The thresholds with this baseline's overrides applied (unknown keys are ignored)."""
    if baseline is None or not baseline.thresholds:
        return thresholds
    names = {f.name for f in dataclasses.fields(thresholds)}
    overrides = {k: v for k, v in baseline.thresholds if k in names}
    if not overrides:
        return thresholds
    current = {k: getattr(thresholds, k) for k in overrides}
    typed = {k: type(current[k])(v) if isinstance(current[k], int | float) else v for k, v in overrides.items()}
    return dataclasses.replace(thresholds, **typed)


# ---------------------------------------------------------------------------------------
# power


def chisq_power(w: float, dof: int, n: int, alpha: float) -> float:
    """Noncentral chi-square power (Cohen 1988, ch. 7): P(chi2(dof, n w^2) > chi2_{1-alpha})."""
    if dof < 1 or n < 1:
        return 0.0
    return float(qstats.chisq_power(w, dof, n, alpha))


def chisq_powers(w: Any, dof: Any, n: Any, alpha: Any) -> np.ndarray:
    """:func:`chisq_power` for arrays (one scipy call; 0 where dof < 1 or n < 1)."""
    w, dof, n, alpha = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (w, dof, n, alpha)))
    ok = (dof >= 1) & (n >= 1)
    d = np.where(ok, dof, 1.0)
    if ((alpha > 0) & (alpha < 1)).all() and np.isfinite(d).all():
        crit = special.chdtri(d, alpha)  # = scipy.stats.chi2.isf(alpha, d), minus its overhead
    else:
        crit = sps.chi2.isf(alpha, d)
    return np.where(ok, sps.ncx2.sf(crit, d, np.where(ok, n, 1.0) * w * w), 0.0)


def poisson_powers(mu0: Any, ratio: Any, alpha: Any) -> np.ndarray:
    """:func:`poisson_power` for arrays."""
    mu0, ratio, alpha = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (mu0, ratio, alpha)))
    ok = mu0 > 0
    mu = np.where(ok, mu0, 1.0)
    c = qstats.poisson_isf(alpha, mu) + 1
    for _ in range(3):  # settle c onto the smallest count whose upper tail is <= alpha
        step = np.where((c > 0) & (qstats.poisson_sf(c - 2, mu) <= alpha), c - 1, c)
        step = np.where(qstats.poisson_sf(step - 1, mu) > alpha, step + 1, step)
        if np.array_equal(step, c):
            break  # settled: another round would change nothing
        c = step
    return np.where(ok, qstats.poisson_sf(c - 1, mu * ratio), 0.0)


def poisson_power(mu0: float, ratio: float, alpha: float) -> float:
    """Power of the exact one-sided Poisson test of mean mu0 against mean ratio * mu0.

    The critical count c is the smallest c with P(X >= c | mu0) <= alpha; power is
    P(X >= c | ratio * mu0).
    """
    if mu0 <= 0:
        return 0.0
    c = int(sps.poisson.isf(alpha, mu0)) + 1
    while c > 0 and sps.poisson.sf(c - 2, mu0) <= alpha:
        c -= 1
    while sps.poisson.sf(c - 1, mu0) > alpha:
        c += 1
    return float(sps.poisson.sf(c - 1, mu0 * ratio))


# ---------------------------------------------------------------------------------------
# helpers over stats results


def _row(value: Any, i: int) -> Any:
    arr = np.asarray(value)
    if arr.ndim == 0:
        return arr.item()
    return arr[i]


def _opt_float(value: Any) -> float | None:
    if value is None:
        return None
    out = float(value)
    return out if math.isfinite(out) else None


def _attr(result: Any, name: str, i: int) -> Any:
    value = getattr(result, name, None)
    if value is None:
        return None
    return _row(value, i)


def top_shifts(
    codes: Sequence[str],
    observed: np.ndarray,
    expected: np.ndarray,
    residuals: np.ndarray,
    reference: np.ndarray,
    *,
    limit: int = TOP_CATEGORIES,
) -> tuple[CategoryShift, ...]:
    """The categories with the largest |adjusted residual| (those >= 2 first; at least one)."""
    size = np.abs(residuals)
    order = np.argsort(-size, kind="stable")
    n = float(observed.sum())
    chosen = order[size[order] >= RESIDUAL_WORTH_NAMING][:limit].tolist()
    if not chosen and len(order) and np.isfinite(residuals[order[0]]):
        chosen = [int(order[0])]
    res, obs = np.asarray(residuals, dtype=float), np.asarray(observed)
    exp, ref = np.asarray(expected, dtype=float), np.asarray(reference, dtype=float)
    out = []
    for j in chosen:
        r = float(res[j])
        o = int(obs[j])
        out.append(CategoryShift(code=codes[j], direction="up" if r > 0 else "down",
                                 adjusted_residual=r, observed=o, expected=float(exp[j]),
                                 share=o / n if n > 0 else 0.0, reference_share=float(ref[j])))
    return tuple(out)


def top_shifts_rows(
    codes: Sequence[str],
    observed: np.ndarray,
    expected: np.ndarray,
    residuals: np.ndarray,
    reference: np.ndarray,
    *,
    limit: int = TOP_CATEGORIES,
) -> list[tuple[CategoryShift, ...]]:
    """:func:`top_shifts` of each row of (lines x categories) arrays, with one sort for all rows
    and plain Python numbers after that (same categories, same numbers as row by row)."""
    return _top_rows([codes] * np.shape(residuals)[0], observed, expected, residuals, reference,
                     limit=limit)


def _top_rows(codes_of_rows: Sequence[Sequence[str]], observed: np.ndarray,
              expected: np.ndarray, residuals: np.ndarray, reference: np.ndarray, *,
              limit: int = TOP_CATEGORIES) -> list[tuple[CategoryShift, ...]]:
    """:func:`top_shifts_rows` with each row's own category codes (rows of several shifts)."""
    res = np.asarray(residuals, dtype=float)
    size = np.abs(res)
    orders = np.argsort(-size, axis=1, kind="stable").tolist()
    obs = np.asarray(observed, dtype=np.int64)
    totals = obs.sum(axis=1).tolist()
    out = []
    for order, sz, r, o, e, ref, total, codes in zip(
            orders, size.tolist(), res.tolist(), obs.tolist(),
            np.asarray(expected, dtype=float).tolist(),
            np.asarray(reference, dtype=float).tolist(), totals, codes_of_rows, strict=True):
        chosen = []
        for j in order:  # by |residual|, largest first (NaN last)
            if not sz[j] >= RESIDUAL_WORTH_NAMING or len(chosen) == limit:
                break
            chosen.append(j)
        if not chosen and order and math.isfinite(r[order[0]]):
            chosen = [order[0]]
        n = float(total)
        out.append(tuple(
            CategoryShift(code=codes[j], direction="up" if r[j] > 0 else "down",
                          adjusted_residual=r[j], observed=o[j], expected=e[j],
                          share=o[j] / n if n > 0 else 0.0, reference_share=ref[j])
            for j in chosen))
    return out


def _contained(kind: str, line: str | None, version: int | None, fn: Callable[[], Finding]) -> Finding:
    try:
        return fn()
    except Exception as exc:  # one line's failure must not stop the others
        log.exception("%s test failed for line %s", kind, line)
        return Finding(
            kind=kind,
            line=line,
            verdict=FAULT,
            reason=f"{kind} test failed: {type(exc).__name__}: {exc}",
            baseline_version_id=version,
            details={"error": f"{type(exc).__name__}: {exc}"},
        )


# ---------------------------------------------------------------------------------------
# fit to baseline


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


def decision_levels(limits: Iterable[Any]) -> tuple[float, ...]:
    """The levels near which ``auto`` p-values are refined: every alarm and watch level."""
    out = {float(t.alarm_level) for t in limits} | {float(t.watch_level) for t in limits}
    return tuple(sorted(out))


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


def _power_reason(enough: bool, power: float, needed: float, name: str, floor: float, n: int) -> str:
    if enough:
        return f"power {power:.2f} to see {name} >= {floor:g} with n = {n}"
    return (
        f"too little data to tell: power {power:.2f} < {needed:.2f} to see "
        f"{name} >= {floor:g} with n = {n}"
    )


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


# ---------------------------------------------------------------------------------------
# between lines and each line vs the rest


def compare_lines(table: CountTable, thresholds: Any, *, seed: int) -> list[Finding]:
    """The lines x categories homogeneity finding, then one line-vs-rest finding per line."""
    between = _contained(KIND_BETWEEN, None, None,
                         lambda: _between(table, thresholds, derive_seed(seed, KIND_BETWEEN)))
    return [between, *_each_vs_rest(table, thresholds, derive_seed(seed, KIND_VS_REST))]


def _mc_options(limits: Any) -> dict[str, Any]:
    return {"draws": int(getattr(limits, "mc_draws", 10_000)),
            "levels": decision_levels([limits])}


def _between(table: CountTable, limits: Any, seed: int) -> Finding:
    totals = table.counts.sum(axis=1)
    rows = [i for i in range(len(table.lines)) if totals[i] > 0]
    cols = [j for j in range(len(table.categories)) if table.counts[:, j].sum() > 0]
    n = int(table.counts.sum())
    details = {"lines": [table.lines[i] for i in rows],
               "lines_without_defects": [ln for i, ln in enumerate(table.lines) if totals[i] == 0]}
    if len(rows) < 2 or len(cols) < 2:
        return Finding(kind=KIND_BETWEEN, line=None, verdict=NOT_TESTED, n=n, details=details,
                       reason="fewer than 2 lines or 2 categories with defects this shift")
    sub = np.ascontiguousarray(table.counts[np.ix_(rows, cols)], dtype=np.int64)
    expected = np.outer(sub.sum(axis=1), sub.sum(axis=0)) / n
    mode = _mode_for(expected)
    g = qstats.compare_groups(sub, statistic="pearson", pvalue=mode, seed=seed,
                              **_mc_options(limits))
    reason = _large_reason(expected) if mode == "asymptotic" else str(g.method_reason)
    r, c = sub.shape
    dof = int(g.dof)
    w_floor = limits.min_effect_v * math.sqrt(min(r, c) - 1)
    power = chisq_power(w_floor, dof, n, limits.alarm_level)
    enough = power >= limits.power
    details["effect_size_corrected"] = _opt_float(g.effect_size_corrected)
    return Finding(
        kind=KIND_BETWEEN, line=None, n=n,
        verdict=TESTED if enough else TOO_LITTLE_DATA,
        reason=_power_reason(enough, power, limits.power, "V", limits.min_effect_v, n),
        statistic=float(g.statistic), dof=dof, pvalue=float(g.pvalue),
        effect_size=float(g.effect_size), effect_name="V",
        effect_floor=float(limits.min_effect_v),
        alarm_level=float(limits.alarm_level), watch_level=float(limits.watch_level),
        power=power, power_needed=float(limits.power),
        method=str(g.method), method_reason=reason,
        mc_se=_opt_float(g.pvalue_se), min_expected=_opt_float(g.min_expected),
        categories=tuple(table.categories[j] for j in cols),
        details=details,
    )


# Tables of lines take the asymptotic p-value when Cochran's rule holds (every expected count
# >= 1 and at most 20% of them below 5; Cochran 1954, as in Agresti 2007, sec. 2.4.7): with
# hundreds of lines these tables hold tens of thousands of defects, where the chi-square
# approximation is accurate and a Monte Carlo refinement of a 500 x 12 table costs seconds
# (common practice, no source). Tables that fail the rule keep the ``auto`` p-value.


def cochran_ok(expected: np.ndarray) -> bool:
    """Cochran's rule on an array of expected counts."""
    e = np.asarray(expected, dtype=float).ravel()
    return bool(e.size and e.min() >= 1.0 and (e < 5.0).mean() <= 0.2)


def cochran_rows(expected: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """:func:`cochran_ok` of each row's expected counts where ``mask`` is True (lines x
    categories in, bool per line out)."""
    e = np.asarray(expected, dtype=float)
    cells = mask.sum(axis=1)
    smallest = np.where(mask, e, np.inf).min(axis=1)
    below_5 = ((e < 5.0) & mask).sum(axis=1)
    return (cells > 0) & (smallest >= 1.0) & (below_5 / np.maximum(cells, 1) <= 0.2)


def _mode_for(expected: np.ndarray) -> str:
    return "asymptotic" if cochran_ok(expected) else "auto"


def _large_reason(expected: np.ndarray) -> str:
    e = np.asarray(expected, dtype=float)
    return _large_text(e.min(), (e < 5).mean())


def _large_text(smallest: float, share_below_5: float) -> str:
    return (f"asymptotic chi-square: Cochran's rule holds (smallest expected count "
            f"{smallest:.1f}, {100 * share_below_5:.0f}% below 5)")


def _each_vs_rest(table: CountTable, limits: Any, seed: int) -> list[Finding]:
    counts = np.ascontiguousarray(table.counts, dtype=np.int64)
    if (counts.sum(axis=0) > 0).sum() < 2 or (counts.sum(axis=1) > 0).sum() < 2:
        why = "fewer than 2 lines or 2 categories with defects this shift"
        return [Finding(kind=KIND_VS_REST, line=ln, verdict=NOT_TESTED, reason=why,
                        n=int(counts[i].sum())) for i, ln in enumerate(table.lines)]
    col = counts.sum(axis=0)
    total = col.sum()
    share = col[col > 0] / total
    rows_n = counts.sum(axis=1)
    pair_e = np.stack([np.outer(rows_n, share), np.outer(total - rows_n, share)], axis=1)
    small = (pair_e < 5.0).mean(axis=(1, 2))  # 2 x c' expected counts per line: Cochran's rule
    low = pair_e.min(axis=(1, 2))
    pair_ok = (low >= 1.0) & (small <= 0.2)
    big = None
    try:
        big = qstats.compare_each_to_rest(counts, statistic="pearson", pvalue="asymptotic",
                                          seed=seed)
    except Exception:
        log.warning("line-vs-rest tests failed together; retrying line by line")
    powers = chisq_powers(limits.min_effect_v, max(int((col > 0).sum()) - 1, 0), total,
                          limits.alarm_level)
    power = float(powers)
    fast = (rows_n > 0) & pair_ok if big is not None else np.zeros(len(table.lines), dtype=bool)
    out: dict[int, Finding] = {}
    if fast.any():
        try:
            out = _vs_rest_batch(table, counts, np.flatnonzero(fast), big, limits, power,
                                 low, small)
        except Exception:
            log.warning("line-vs-rest findings failed together; retrying line by line")
            out = {}

    def one(i: int) -> Finding:
        if fast[i]:
            return _vs_rest_finding(table, counts, i, big, i, limits, power,
                                    method_reason=_large_text(low[i], small[i]), col=col)
        return _vs_rest_alone(table, counts, col, i, limits, power, seed)

    return [out[i] if i in out else _contained(KIND_VS_REST, line, None, lambda i=i: one(i))
            for i, line in enumerate(table.lines)]


def _vs_rest_alone(table: CountTable, counts: np.ndarray, col: np.ndarray, i: int, limits: Any,
                   power: float, seed: int) -> Finding:
    """Line ``i`` against the rest of its shift with the ``auto`` p-value (for the lines whose
    2 x c' table fails Cochran's rule)."""
    pair = np.stack([counts[i], col - counts[i]])
    res = qstats.compare_each_to_rest(pair, statistic="pearson", pvalue="auto",
                                      seed=seed, **_mc_options(limits))
    return _vs_rest_finding(table, counts, i, res, 0, limits, power, col=col)


def _vs_rest_batch(table: CountTable, counts: np.ndarray, rows: np.ndarray, res: Any,
                   limits: Any, power: float, low: np.ndarray, small: np.ndarray
                   ) -> dict[int, Finding]:
    """:func:`_vs_rest_finding` for the ``rows`` of the batch result ``res`` whose asymptotic
    p-value stands (Cochran's rule holds for their 2 x c' table), from whole-array conversions."""
    col = counts.sum(axis=0)
    cols = np.flatnonzero(col > 0)
    codes = tuple(table.categories[j] for j in cols.tolist())
    total = int(col.sum())
    mine = counts[np.ix_(rows, cols)]
    rest = col[cols] - mine
    rest_sum = rest.sum(axis=1)
    rest_share = rest / np.maximum(rest_sum, 1)[:, None]  # rows without a rest: all 0
    expected = np.asarray(res.expected, dtype=float)[np.ix_(rows, cols)]
    residuals = np.asarray(res.adjusted_residuals, dtype=float)[np.ix_(rows, cols)]
    tops = top_shifts_rows(codes, mine, expected, residuals, rest_share)
    enough = power >= limits.power
    same = {"kind": KIND_VS_REST, "verdict": TESTED if enough else TOO_LITTLE_DATA,
            "reason": _power_reason(enough, power, limits.power, "V", limits.min_effect_v, total),
            "effect_name": "V", "effect_floor": float(limits.min_effect_v),
            "alarm_level": float(limits.alarm_level), "watch_level": float(limits.watch_level),
            "power": power, "power_needed": float(limits.power), "categories": codes}
    field = {name: np.asarray(getattr(res, name))[rows].tolist()
             for name in ("tested", "method_reason", "statistic", "dof", "pvalue",
                          "effect_size", "method", "pvalue_se")}
    lines = [table.lines[i] for i in rows.tolist()]
    n_mine = mine.sum(axis=1).tolist()
    reasons = [_large_text(a, b) for a, b in zip(low[rows], small[rows], strict=True)]
    per_row = zip(rows.tolist(), mine.astype(float).tolist(), expected.tolist(),
                  residuals.tolist(), expected.min(axis=1).tolist(), rest.astype(int).tolist(),
                  strict=True)
    out = {}
    for k, (i, observed, exp, resid, smallest, rest_row) in enumerate(per_row):
        if not field["tested"][k]:
            out[i] = Finding(kind=KIND_VS_REST, line=lines[k], verdict=NOT_TESTED, n=n_mine[k],
                             reason=str(field["method_reason"][k]))
            continue
        out[i] = Finding(
            line=lines[k], statistic=float(field["statistic"][k]), dof=int(field["dof"][k]),
            pvalue=float(field["pvalue"][k]), effect_size=float(field["effect_size"][k]),
            method=str(field["method"][k]), method_reason=reasons[k],
            mc_se=_opt_float(field["pvalue_se"][k]), n=n_mine[k], min_expected=smallest,
            top_categories=tops[k], observed=tuple(observed), expected=tuple(exp),
            adjusted_residuals=tuple(resid), details={"rest_observed": rest_row}, **same)
    return out


def _vs_rest_finding(table: CountTable, counts: np.ndarray, i: int, res: Any, r: int,
                     limits: Any, power: float, method_reason: str | None = None,
                     col: np.ndarray | None = None) -> Finding:
    line = table.lines[i]
    mine = counts[i]
    col = counts.sum(axis=0) if col is None else col
    n_mine = int(mine.sum())
    if not bool(res.tested[r]):
        return Finding(kind=KIND_VS_REST, line=line, verdict=NOT_TESTED, n=n_mine,
                       reason=str(res.method_reason[r]))
    cols = np.flatnonzero(col > 0)
    rest = (col - mine)[cols]
    total = int(col.sum())
    dof = int(res.dof[r])
    enough = power >= limits.power
    expected = np.asarray(res.expected[r], dtype=float)[cols]
    residuals = np.asarray(res.adjusted_residuals[r], dtype=float)[cols]
    codes = tuple(table.categories[j] for j in cols.tolist())
    rest_sum = rest.sum()
    rest_share = rest / rest_sum if rest_sum > 0 else np.zeros(len(cols))
    return Finding(
        kind=KIND_VS_REST, line=line,
        verdict=TESTED if enough else TOO_LITTLE_DATA,
        reason=_power_reason(enough, power, limits.power, "V", limits.min_effect_v, total),
        statistic=float(res.statistic[r]), dof=dof, pvalue=float(res.pvalue[r]),
        effect_size=float(res.effect_size[r]), effect_name="V",
        effect_floor=float(limits.min_effect_v),
        alarm_level=float(limits.alarm_level), watch_level=float(limits.watch_level),
        power=power, power_needed=float(limits.power),
        method=str(res.method[r]),
        method_reason=method_reason if method_reason is not None else str(res.method_reason[r]),
        mc_se=_opt_float(res.pvalue_se[r]), n=n_mine,
        min_expected=float(expected.min()) if len(expected) else None,
        top_categories=top_shifts(codes, mine[cols], expected, residuals, rest_share),
        categories=codes,
        observed=tuple(mine[cols].astype(float).tolist()),
        expected=tuple(expected.tolist()),
        adjusted_residuals=tuple(residuals.tolist()),
        details={"rest_observed": rest.astype(int).tolist()},
    )


# ---------------------------------------------------------------------------------------
# defect rate


def rate_finding(line: str, defects: int, units: float, baseline: BaselineRef | None,
                 limits: Any, *, power: float | None = None, pvalue: float | None = None
                 ) -> Finding | None:
    """Defects per inspected unit against the baseline rate; None when there is nothing to test
    (no baseline rate, or units inspected unknown). ``power``/``pvalue`` may be passed in when
    computed for many lines at once."""
    if baseline is None or baseline.rate is None or not math.isfinite(units):
        return None
    common = {"kind": KIND_RATE, "line": line, "baseline_version_id": baseline.version_id,
              "n": int(defects)}
    if units <= 0:
        return Finding(verdict=NOT_TESTED, reason="no units inspected this shift", **common)
    mu0 = float(baseline.rate) * float(units)
    if mu0 <= 0:
        return Finding(verdict=NOT_TESTED, reason="baseline rate is 0: nothing to compare with",
                       **common)
    ratio = (defects / units) / float(baseline.rate)
    if power is None:
        power = poisson_power(mu0, limits.min_rate_ratio, limits.alarm_level)
    if pvalue is None:
        pvalue = float(qstats.rate_test(int(defects), float(units), float(baseline.rate)).pvalue)
    enough = power >= limits.power
    reason = (f"power {power:.2f} to see a rate ratio >= {limits.min_rate_ratio:g} "
              f"with {units:g} units" if enough else
              f"too little data to tell: power {power:.2f} < {limits.power:.2f} to see a rate "
              f"ratio >= {limits.min_rate_ratio:g} with {units:g} units")
    return Finding(
        verdict=TESTED if enough else TOO_LITTLE_DATA, reason=reason,
        statistic=float(defects), pvalue=float(pvalue),
        effect_size=float(ratio), effect_name="rate ratio",
        effect_floor=float(limits.min_rate_ratio),
        alarm_level=float(limits.alarm_level), watch_level=float(limits.watch_level),
        power=power, power_needed=float(limits.power),
        method="exact-poisson", method_reason="exact one-sided Poisson test for an increase",
        min_expected=mu0,
        details={"units": float(units), "baseline_rate": float(baseline.rate),
                 "expected_defects": mu0, "observed_rate": defects / units},
        **common,
    )


def rate_lines(table: CountTable, baselines: Mapping[str, BaselineRef | None],
               thresholds: Any) -> list[Finding]:
    """Rate findings for the lines with units inspected and a baseline rate (p-values and
    power for all of them in one call each)."""
    return [f for f in _rate_findings(_rate_jobs(table, baselines, thresholds)) if f is not None]


@dataclass(frozen=True, slots=True)
class _RateJob:
    line: str
    defects: int
    units: float  # finite
    baseline: BaselineRef  # with a rate
    limits: Any  # thresholds after overrides


def _rate_jobs(table: CountTable, baselines: Mapping[str, BaselineRef | None],
               thresholds: Any) -> list[_RateJob]:
    """The lines of ``table`` with a baseline rate and known units inspected."""
    defects = table.counts.sum(axis=1).astype(np.int64).tolist()
    units = np.asarray(table.units, dtype=float).tolist()
    jobs = []
    for i, line in enumerate(table.lines):
        b = baselines.get(line)
        if b is not None and b.rate is not None and math.isfinite(units[i]):
            jobs.append(_RateJob(line, defects[i], units[i], b, thresholds_for(thresholds, b)))
    return jobs


def _rate_findings(jobs: Sequence[_RateJob], *, keep_none: bool = False
                   ) -> list[Finding | None]:
    """The findings of rate ``jobs`` (lines of one or several shifts), p-values and power of
    all of them in one call each; line by line if that fails."""
    if not jobs:
        return []
    live = np.array([j.units > 0 and j.baseline.rate > 0 for j in jobs])
    mu0 = np.array([j.units * j.baseline.rate for j in jobs])
    powers = poisson_powers(np.where(live, mu0, 0.0), [j.limits.min_rate_ratio for j in jobs],
                            [j.limits.alarm_level for j in jobs])
    pvalues = np.full(len(jobs), np.nan)
    if live.any():
        idx = np.flatnonzero(live).tolist()
        test = qstats.rate_test(np.array([jobs[k].defects for k in idx], dtype=np.int64),
                                np.array([jobs[k].units for k in idx], dtype=float),
                                np.array([jobs[k].baseline.rate for k in idx], dtype=float),
                                interval=False)
        pvalues[idx] = np.asarray(test.pvalue, dtype=float)
    figures = [{"power": p, "pvalue": q} if ok else {}
               for p, q, ok in zip(powers.tolist(), pvalues.tolist(), live.tolist(), strict=True)]
    try:
        out = [rate_finding(j.line, j.defects, j.units, j.baseline, j.limits, **figures[k])
               for k, j in enumerate(jobs)]
    except Exception:
        log.warning("rate findings failed together; retrying line by line")
        out = [_contained(KIND_RATE, j.line, j.baseline.version_id,
                          lambda j=j, extra=figures[k]: rate_finding(
                              j.line, j.defects, j.units, j.baseline, j.limits, **extra))
               for k, j in enumerate(jobs)]
    return out if keep_none else [f for f in out if f is not None]


# ---------------------------------------------------------------------------------------
# the shift


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
