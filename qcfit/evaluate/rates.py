"""Each line's defects per inspected unit against its baseline rate."""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from qcfit import stats as qstats
from qcfit.evaluate.findings import (
    KIND_RATE,
    NOT_TESTED,
    TESTED,
    TOO_LITTLE_DATA,
    Finding,
    _contained,
    poisson_power,
    poisson_powers,
    thresholds_for,
)
from qcfit.model import BaselineRef, CountTable

log = logging.getLogger(__name__)


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
