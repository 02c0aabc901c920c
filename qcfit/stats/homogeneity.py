"""Homogeneity of the category mix across lines: an r x c table (rows = lines).

Pearson X^2 and G^2 with expected e_ij = R_i C_j / n and (r - 1)(c - 1) degrees of freedom
(Agresti, *An Introduction to Categorical Data Analysis*, 2nd ed. 2007, sec. 2.4).
Effect sizes: Cramér's V = sqrt(X^2 / (n (min(r, c) - 1))) (Cramér, *Mathematical Methods of
Statistics*, 1946) and the bias-corrected V of Bergsma (2013, *J. Korean Stat. Soc.* 42,
323-328)::

    phi2~ = max(0, X^2/n - (r-1)(c-1)/(n-1)),  r~ = r - (r-1)^2/(n-1),  c~ = c - (c-1)^2/(n-1)
    V~ = sqrt(phi2~ / min(r~ - 1, c~ - 1))

No continuity correction is applied, also not to 2 x 2 tables.

All-zero rows and columns are dropped before testing and reported. Monte Carlo p-values
condition on both margins (tables drawn by Patefield's algorithm via
``scipy.stats.random_table``; for two rows, the multivariate hypergeometric), and exact
p-values enumerate all two-row tables with the observed margins when there are few.
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.special import gammaln, xlogy

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks, pvalues
from qcfit.stats._enumerate import bounded_compositions, n_bounded
from qcfit.stats.residuals import (
    adjusted_residuals_table,
    contributions,
    expected_table,
    pearson_residuals,
)
from qcfit.stats.results import EachVsRestResult, HomogeneityResult

STATISTICS = ("pearson", "g")


def cramers_v(x2: np.ndarray, n: np.ndarray, r: int, c: int) -> np.ndarray:
    """Cramér's V from an uncorrected X^2."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(x2 / (n * (min(r, c) - 1)))


def bergsma_v(x2: np.ndarray, n: np.ndarray, r: int, c: int) -> np.ndarray:
    """Bias-corrected Cramér's V (Bergsma 2013); 0 when the correction exceeds phi^2."""
    n = np.asarray(n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        phi2 = np.maximum(0.0, x2 / n - (r - 1) * (c - 1) / (n - 1))
        rt = r - (r - 1) ** 2 / (n - 1)
        ct = c - (c - 1) ** 2 / (n - 1)
        v = np.sqrt(phi2 / np.minimum(rt - 1, ct - 1))
    return np.where(n > 1, np.nan_to_num(v, nan=0.0), np.nan)


def _two_rows(x: np.ndarray, cols: np.ndarray) -> np.ndarray:
    return np.stack([x, cols - x], axis=-2)


def _table_model(rows: np.ndarray, cols: np.ndarray, statistic: str) -> pvalues.Model:
    """Null model with both margins fixed. Ranking: sum x^2/e (X^2 + n) or sum x ln x
    (G^2/2 + a constant of the margins)."""
    n = int(rows.sum())
    e = np.outer(rows, cols) / n
    if statistic == "pearson":
        inv_e = 1.0 / e

        def rank(t: np.ndarray) -> np.ndarray:
            return (np.asarray(t, dtype=float) ** 2 * inv_e).sum(axis=(-2, -1))
    else:
        def rank(t: np.ndarray) -> np.ndarray:
            tf = np.asarray(t, dtype=float)
            return xlogy(tf, tf).sum(axis=(-2, -1))

    if rows.size == 2:
        colors = cols.astype(np.int64)

        def sample(rng: np.random.Generator, size: int) -> np.ndarray:
            x = rng.multivariate_hypergeometric(colors, int(rows[0]), size=size)
            return rank(_two_rows(x, colors))

        caps = tuple(int(c) for c in cols)
        # more than 10,000 defects in the first row is never a small enumeration
        count = n_bounded(int(rows[0]), caps) if rows[0] <= 10_000 else pvalues.EXACT_MAX + 1

        def enumerate_() -> tuple[np.ndarray, np.ndarray]:
            x = bounded_compositions(int(rows[0]), caps)
            logp = (gammaln(colors + 1) - gammaln(x + 1) - gammaln(colors - x + 1)).sum(axis=1)
            logp -= gammaln(n + 1) - gammaln(rows[0] + 1) - gammaln(n - rows[0] + 1)
            return rank(_two_rows(x, colors)), np.exp(logp)
        enum = enumerate_
    else:
        dist = stats.random_table(rows, cols)
        count, enum = pvalues.EXACT_MAX + 1, None

        def sample(rng: np.random.Generator, size: int) -> np.ndarray:
            return rank(dist.rvs(size=size, random_state=rng))

    words = pvalues.key_words(rows.astype(np.int64), cols.astype(np.int64),
                              np.frombuffer(statistic.encode(), np.uint8))
    return pvalues.Model(sample, words, count, enum, rank)


def _not_tested(sub: np.ndarray) -> str:
    if sub.size == 0 or sub.sum() == 0:
        return "not tested: no defects"
    if sub.shape[0] < 2:
        return "not tested: fewer than 2 lines with defects"
    return "not tested: fewer than 2 categories with defects"


def _expand(arr: np.ndarray, keep_r: np.ndarray, keep_c: np.ndarray) -> np.ndarray:
    out = np.zeros((keep_r.size, keep_c.size))
    out[np.ix_(keep_r, keep_c)] = arr
    return _checks.readonly(out)


def compare_groups(
    table: object,
    *,
    statistic: str = "pearson",
    pvalue: str = "auto",
    draws: int = pvalues.DEFAULT_DRAWS,
    seed: int | np.random.Generator = 0,
    levels: object = pvalues.DEFAULT_LEVELS,
) -> HomogeneityResult:
    """Test whether the rows (lines) of an (r, c) count table share one category mix.

    Same ``statistic``/``pvalue``/``draws``/``seed``/``levels`` options as
    :func:`qcfit.stats.fit_to_baseline`; Monte Carlo and exact p-values hold both margins fixed.
    """
    statistic = _checks.choice(statistic, "statistic", STATISTICS)
    mode = _checks.choice(pvalue, "pvalue", pvalues.PVALUE_METHODS)
    draws = _checks.positive_int(draws, "draws")
    lv = _checks.levels(levels)
    obs = _checks.counts(table, "table", ndim=(2,))
    root = pvalues.seed_root(seed)
    keep_r, keep_c = obs.sum(axis=1) > 0, obs.sum(axis=0) > 0
    sub = obs[np.ix_(keep_r, keep_c)]
    r, c = sub.shape
    n = float(obs.sum())
    dropped = dict(dropped_rows=tuple(int(i) for i in np.flatnonzero(~keep_r)),
                   dropped_columns=tuple(int(j) for j in np.flatnonzero(~keep_c)))
    e = expected_table(sub)
    common = dict(n=int(n), observed=_checks.readonly(obs.astype(np.int64)),
                  statistic_name=statistic, seed=root, **dropped)
    if r < 2 or c < 2:
        nan = float("nan")
        zeros = _checks.readonly(np.zeros(obs.shape))
        return HomogeneityResult(
            statistic=nan, dof=0, pvalue=nan, effect_size=nan, effect_size_corrected=nan,
            cohens_w=nan, expected=_expand(e, keep_r, keep_c), pearson_residuals=zeros,
            adjusted_residuals=zeros, contributions=zeros, min_expected=nan, pvalue_se=0.0,
            draws=0, method="not-tested", method_reason=_not_tested(sub), tested=False, **common)
    x2 = float(contributions(sub, e, "pearson").sum())
    t = x2 if statistic == "pearson" else float(contributions(sub, e, "g").sum())
    dof = (r - 1) * (c - 1)
    p_asym = pvalues.asymptotic_pvalue(np.array([t]), np.array([dof]))
    cochran = pvalues.cochran_rule(e.reshape(1, -1), np.ones((1, e.size), bool))

    def build(lines: np.ndarray):
        model = _table_model(sub.sum(axis=1), sub.sum(axis=0), statistic)
        return np.zeros(1, np.intp), [model], model.rank(sub[None])

    res = pvalues.resolve(np.array([t]), p_asym, cochran, np.ones(1, bool), build, mode=mode,
                          draws=draws, root=root, levels=lv)
    return HomogeneityResult(
        statistic=t, dof=dof, pvalue=float(res.pvalue[0]),
        effect_size=float(cramers_v(x2, n, r, c)),
        effect_size_corrected=float(bergsma_v(x2, n, r, c)), cohens_w=float(np.sqrt(x2 / n)),
        expected=_expand(e, keep_r, keep_c),
        pearson_residuals=_expand(pearson_residuals(sub, e), keep_r, keep_c),
        adjusted_residuals=_expand(adjusted_residuals_table(sub, e), keep_r, keep_c),
        contributions=_expand(contributions(sub, e, statistic), keep_r, keep_c),
        min_expected=float(e.min()), pvalue_se=float(res.se[0]), draws=int(res.draws[0]),
        method=str(res.method[0]), method_reason=str(res.reason[0]), tested=True, **common)


def compare_each_to_rest(
    table: object,
    *,
    statistic: str = "pearson",
    pvalue: str = "auto",
    draws: int = pvalues.DEFAULT_DRAWS,
    seed: int | np.random.Generator = 0,
    levels: object = pvalues.DEFAULT_LEVELS,
) -> EachVsRestResult:
    """Each row of an (r, c) table against the pooled other rows: r tests of 2 x c'.

    Names which line differs. Columns with no defects anywhere are dropped (c' columns kept);
    a row with no defects, or a table with one row, gives an untested row (NaN p-value).
    """
    statistic = _checks.choice(statistic, "statistic", STATISTICS)
    mode = _checks.choice(pvalue, "pvalue", pvalues.PVALUE_METHODS)
    draws = _checks.positive_int(draws, "draws")
    lv = _checks.levels(levels)
    obs = _checks.counts(table, "table", ndim=(2,))
    root = pvalues.seed_root(seed)
    keep_c = obs.sum(axis=0) > 0
    sub = obs[:, keep_c]
    cols = sub.sum(axis=0)
    pairs = np.stack([sub, cols - sub], axis=1)  # (r, 2, c')
    rows_n = sub.sum(axis=1)
    tested, e, x2, t, dof, p_asym, cochran, v = _pair_tests(pairs, statistic)

    def build(lines: np.ndarray):
        _, first, inverse = np.unique(rows_n[lines], return_index=True, return_inverse=True)
        models = [_table_model(pairs[lines[f]].sum(axis=1), cols, statistic) for f in first]
        inverse = inverse.ravel()
        return inverse, models, pvalues.rank_observed(models, inverse, pairs[lines])

    res = pvalues.resolve(t, p_asym, cochran, tested, build, mode=mode, draws=draws, root=root,
                          levels=lv)
    adj = np.zeros(obs.shape)
    adj[:, keep_c] = adjusted_residuals_table(pairs, e)[:, 0, :]
    exp_full = np.zeros(obs.shape)
    exp_full[:, keep_c] = e[:, 0, :]
    return _each_vs_rest_result(res, tested, rows_n, t, dof, v, exp_full, adj, statistic, root)


def compare_with_rest(observed: object, rest: object, *, statistic: str = "pearson"
                      ) -> EachVsRestResult:
    """Rows of ``observed`` (m, c) each against its own pooled rest (the matching row of
    ``rest``): m asymptotic tests of 2 x c tables (c >= 2 columns, each with defects in the
    row's table; drop empty columns before).

    Row i equals row i of :func:`compare_each_to_rest` with ``pvalue="asymptotic"`` on the
    table the row came from, at its kept columns, bit for bit (same arithmetic on the same
    2 x c table), so rows of several tables can be tested in one call. Shapes: (m,) and (m, c).
    """
    statistic = _checks.choice(statistic, "statistic", STATISTICS)
    mine = _checks.counts(observed, "observed", ndim=(2,))
    other = _checks.counts(rest, "rest", ndim=(2,))
    if other.shape != mine.shape:
        raise InvalidArgumentError("rest", f"shape {other.shape} does not match {mine.shape}")
    pairs = np.stack([mine, other], axis=1)  # (m, 2, c)
    rows_n = mine.sum(axis=1)
    tested, e, x2, t, dof, p_asym, cochran, v = _pair_tests(pairs, statistic)
    res = pvalues.resolve(t, p_asym, cochran, tested, _no_build, mode="asymptotic",
                          draws=pvalues.DEFAULT_DRAWS, root=0, levels=pvalues.DEFAULT_LEVELS)
    adj = adjusted_residuals_table(pairs, e)[:, 0, :]
    return _each_vs_rest_result(res, tested, rows_n, t, dof, v, e[:, 0, :], adj, statistic, 0)


def _no_build(lines: np.ndarray):  # asymptotic p-values never build a null model
    raise AssertionError("no null model is needed for asymptotic p-values")


def _pair_tests(pairs: np.ndarray, statistic: str):
    """The asymptotic parts of (m, 2, c') row-vs-rest tables: tested, expected, X^2, the
    statistic, dof, asymptotic p, Cochran's rule and V per row."""
    rows_n = pairs[:, 0].sum(axis=1)
    total = rows_n + pairs[:, 1].sum(axis=1)
    c = pairs.shape[2]
    tested = (rows_n > 0) & (rows_n < total) & (c >= 2)
    e = expected_table(pairs)
    x2 = contributions(pairs, e, "pearson").sum(axis=(1, 2))
    t = x2 if statistic == "pearson" else contributions(pairs, e, "g").sum(axis=(1, 2))
    dof = np.full(pairs.shape[0], max(c - 1, 0), dtype=np.int64)
    p_asym = pvalues.asymptotic_pvalue(t, dof)
    cochran = pvalues.cochran_rule(e.reshape(len(e), -1), np.ones((len(e), e[0].size), bool))
    with np.errstate(invalid="ignore", divide="ignore"):
        v = np.sqrt(x2 / np.where(rows_n > 0, total, 1))
    return tested, e, x2, t, dof, p_asym, cochran, v


def _each_vs_rest_result(res, tested, rows_n, t, dof, v, expected, adj, statistic, root
                         ) -> EachVsRestResult:
    method, reason = res.method, res.reason
    method[~tested] = "not-tested"
    reason[~tested & (rows_n == 0)] = "not tested: no defects"
    reason[~tested & (rows_n > 0)] = "not tested: no other line or category to compare with"
    ro = _checks.readonly
    return EachVsRestResult(
        statistic=ro(np.where(tested, t, np.nan)), dof=ro(dof), pvalue=ro(res.pvalue),
        effect_size=ro(np.where(tested, v, np.nan)), n=ro(rows_n.astype(np.int64)),
        expected=ro(expected), adjusted_residuals=ro(np.where(tested[:, None], adj, 0.0)),
        pvalue_se=ro(res.se), draws=ro(res.draws), method=ro(method), method_reason=ro(reason),
        tested=ro(tested), statistic_name=statistic, seed=root)
