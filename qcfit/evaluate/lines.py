"""Lines against each other: lines x categories homogeneity and each line against the
pooled rest."""

from __future__ import annotations

import logging
import math
from typing import Any

import numpy as np

from qcfit import stats as qstats
from qcfit.evaluate.findings import (
    KIND_BETWEEN,
    KIND_VS_REST,
    NOT_TESTED,
    TESTED,
    TOO_LITTLE_DATA,
    Finding,
    _contained,
    _opt_float,
    _power_reason,
    chisq_power,
    chisq_powers,
    cochran_ok,
    decision_levels,
    derive_seed,
    top_shifts,
    top_shifts_rows,
)
from qcfit.model import CountTable

log = logging.getLogger(__name__)


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
