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

Modules: :mod:`~qcfit.evaluate.findings` (the Finding and its parts), :mod:`~qcfit.evaluate.fits`,
:mod:`~qcfit.evaluate.lines`, :mod:`~qcfit.evaluate.rates`, :mod:`~qcfit.evaluate.shift` (one shift, several shifts).
"""

from __future__ import annotations

from qcfit.evaluate.findings import (
    FAULT,
    IMPOSSIBLE,
    KIND_BASELINE,
    KIND_BETWEEN,
    KIND_RATE,
    KIND_SEQUENTIAL,
    KIND_VS_REST,
    NO_BASELINE,
    NOT_TESTED,
    RESIDUAL_WORTH_NAMING,
    TESTABLE,
    TESTED,
    TOO_LITTLE_DATA,
    TOP_CATEGORIES,
    UNKNOWN_CATEGORY,
    CategoryShift,
    Finding,
    chisq_power,
    chisq_powers,
    cochran_ok,
    cochran_rows,
    decision_levels,
    derive_seed,
    poisson_power,
    poisson_powers,
    thresholds_for,
    top_shifts,
    top_shifts_rows,
    with_values,
)
from qcfit.evaluate.fits import (
    FAR_REASON,
    NEAR_FACTOR,
    REFINE_FLOOR,
    fit_lines,
)
from qcfit.evaluate.lines import (
    compare_lines,
)
from qcfit.evaluate.rates import (
    rate_finding,
    rate_lines,
)
from qcfit.evaluate.shift import (
    evaluate_table,
    evaluate_tables,
)

__all__ = [
    "CategoryShift",
    "FAR_REASON",
    "FAULT",
    "Finding",
    "IMPOSSIBLE",
    "KIND_BASELINE",
    "KIND_BETWEEN",
    "KIND_RATE",
    "KIND_SEQUENTIAL",
    "KIND_VS_REST",
    "NEAR_FACTOR",
    "NOT_TESTED",
    "NO_BASELINE",
    "REFINE_FLOOR",
    "RESIDUAL_WORTH_NAMING",
    "TESTABLE",
    "TESTED",
    "TOO_LITTLE_DATA",
    "TOP_CATEGORIES",
    "UNKNOWN_CATEGORY",
    "chisq_power",
    "chisq_powers",
    "cochran_ok",
    "cochran_rows",
    "compare_lines",
    "decision_levels",
    "derive_seed",
    "evaluate_table",
    "evaluate_tables",
    "fit_lines",
    "poisson_power",
    "poisson_powers",
    "rate_finding",
    "rate_lines",
    "thresholds_for",
    "top_shifts",
    "top_shifts_rows",
    "with_values",
]
