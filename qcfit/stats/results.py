"""Frozen result records of the stats core.

Scalars are plain ``float``/``int``/``str``/``bool`` for a single line (1-D input). For a batch
of m lines the per-line fields are read-only numpy arrays of shape (m,) and the per-category
fields of shape (m, k); ``row(i)`` gives line i as a single-line result.

``method`` says how the p-value was obtained ("asymptotic", "exact", "monte-carlo",
"impossible-category", "not-tested") and ``method_reason`` why, in words.
An untested line (no defects, fewer than two categories) has ``tested`` False and NaN
statistic and p-value; leave it out of multiplicity adjustment (``adjust_pvalues`` skips NaN).
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any

import numpy as np

Array = np.ndarray
FloatOrArray = float | np.ndarray
IntOrArray = int | np.ndarray
StrOrArray = str | np.ndarray
BoolOrArray = bool | np.ndarray


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return value


def _take_row(obj: Any, i: int, batch_fields: tuple[str, ...]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for f in fields(obj):
        v = getattr(obj, f.name)
        if f.name in batch_fields:
            v = v[i]
            v = np.array(v, copy=True) if isinstance(v, np.ndarray) else _plain(v)
            if isinstance(v, np.ndarray):
                v.setflags(write=False)
        out[f.name] = v
    return out


_GOF_BATCH = ("statistic", "dof", "pvalue", "effect_size", "n", "expected", "observed",
              "pearson_residuals", "adjusted_residuals", "contributions", "min_expected",
              "pvalue_se", "draws", "method", "method_reason", "tested", "impossible",
              "impossible_mask")


@dataclass(frozen=True, slots=True)
class GoodnessResult:
    """Fit of observed category counts to baseline proportions (one line or a batch).

    statistic: Pearson X^2 or G^2 (``statistic_name``); dof = k - 1 (cells with baseline 0 and
    no defects are dropped and lower it); effect_size: Cohen's w = sqrt(X^2 / n) (always from
    Pearson X^2); expected = n p; pearson_residuals (o - e)/sqrt(e); adjusted_residuals
    (o - e)/sqrt(e (1 - p)); contributions: each cell's term of the statistic; pvalue_se:
    Monte Carlo standard error (0 for asymptotic or exact); draws: Monte Carlo draws used;
    impossible: a category with baseline proportion 0 has defects (then pvalue = 0.0);
    impossible_mask marks those cells.
    """

    statistic: FloatOrArray
    dof: IntOrArray
    pvalue: FloatOrArray
    effect_size: FloatOrArray
    n: IntOrArray
    expected: Array
    observed: Array
    pearson_residuals: Array
    adjusted_residuals: Array
    contributions: Array
    min_expected: FloatOrArray
    pvalue_se: FloatOrArray
    draws: IntOrArray
    method: StrOrArray
    method_reason: StrOrArray
    tested: BoolOrArray
    impossible: BoolOrArray
    impossible_mask: Array
    statistic_name: str
    seed: int

    @property
    def is_batch(self) -> bool:
        return self.expected.ndim == 2

    @property
    def impossible_categories(self) -> tuple[int, ...]:
        """Indices of categories outside the baseline support that have defects (single line)."""
        if self.is_batch:
            raise ValueError("impossible_categories is per line: use row(i) on a batch")
        return tuple(int(i) for i in np.flatnonzero(self.impossible_mask))

    def __len__(self) -> int:
        return int(self.expected.shape[0]) if self.is_batch else 1

    def row(self, i: int) -> GoodnessResult:
        """Line ``i`` of a batch result as a single-line result."""
        if not self.is_batch:
            raise ValueError("row() needs a batch result")
        return GoodnessResult(**_take_row(self, i, _GOF_BATCH))


@dataclass(frozen=True, slots=True)
class HomogeneityResult:
    """Test of homogeneity of category mix across the rows (lines) of an r x c table.

    dof = (r' - 1)(c' - 1) over the r' rows and c' columns kept after dropping all-zero ones
    (``dropped_rows``, ``dropped_columns`` are the original indices). effect_size: Cramér's V
    = sqrt(X^2 / (n (min(r', c') - 1))); effect_size_corrected: Bergsma (2013) bias-corrected V.
    expected, residual and contribution arrays keep the full (r, c) shape; dropped rows and
    columns hold expected 0 and residual 0.
    """

    statistic: float
    dof: int
    pvalue: float
    effect_size: float
    effect_size_corrected: float
    cohens_w: float
    n: int
    expected: Array
    observed: Array
    pearson_residuals: Array
    adjusted_residuals: Array
    contributions: Array
    min_expected: float
    pvalue_se: float
    draws: int
    method: str
    method_reason: str
    tested: bool
    dropped_rows: tuple[int, ...]
    dropped_columns: tuple[int, ...]
    statistic_name: str
    seed: int


@dataclass(frozen=True, slots=True)
class EachVsRestResult:
    """Each row of an r x c table against the pooled other rows (r tests of 2 x c').

    Arrays of shape (r,): statistic, dof, pvalue, effect_size (Cramér's V = phi of the 2 x c'
    table), n (the row's count), pvalue_se, draws, method, method_reason, tested. Shape (r, c):
    adjusted_residuals of the row against the rest (Haberman 1973), expected under the pooled
    mix. Rows with no defects are not tested (NaN p-value).
    """

    statistic: Array
    dof: Array
    pvalue: Array
    effect_size: Array
    n: Array
    expected: Array
    adjusted_residuals: Array
    pvalue_se: Array
    draws: Array
    method: Array
    method_reason: Array
    tested: Array
    statistic_name: str
    seed: int


_RATE_BATCH = ("defects", "units", "baseline_rate", "expected", "rate", "ratio", "pvalue",
               "ci_low", "ci_high", "tested", "method_reason")


@dataclass(frozen=True, slots=True)
class RateResult:
    """Exact one-sided Poisson test of a defect rate against a baseline rate.

    defects d, units u, expected = u * baseline_rate, rate = d / u, ratio = rate / baseline
    (effect size), pvalue = P(X >= d | X ~ Poisson(expected)); [ci_low, ci_high] is the exact
    (Garwood 1936) two-sided interval for the rate at ``confidence``.
    """

    defects: IntOrArray
    units: FloatOrArray
    baseline_rate: FloatOrArray
    expected: FloatOrArray
    rate: FloatOrArray
    ratio: FloatOrArray
    pvalue: FloatOrArray
    ci_low: FloatOrArray
    ci_high: FloatOrArray
    tested: BoolOrArray
    method_reason: StrOrArray
    confidence: float
    method: str = "exact-poisson"

    def row(self, i: int) -> RateResult:
        if np.ndim(self.pvalue) == 0:
            raise ValueError("row() needs a batch result")
        return RateResult(**_take_row(self, i, _RATE_BATCH))


__all__ = ["EachVsRestResult", "GoodnessResult", "HomogeneityResult", "RateResult"]
