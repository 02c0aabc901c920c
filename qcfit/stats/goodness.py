"""Fit of a line's defect-category counts to baseline proportions (goodness of fit).

Pearson X^2 = sum (o - e)^2 / e and likelihood-ratio G^2 = 2 sum o ln(o / e), e = n p, with
k - 1 degrees of freedom (Agresti, *Categorical Data Analysis*, 2nd ed. 2002, sec. 1.5).
Effect size Cohen's w = sqrt(X^2 / n) (Cohen, *Statistical Power Analysis for the Behavioral
Sciences*, 2nd ed. 1988, ch. 7). p-values: see :mod:`qcfit.stats.pvalues`.

Defined edge cases:

- n = 0 (no defects): not tested, NaN statistic and p-value, reason "not tested: no defects".
- A category with baseline proportion 0 and no defects is dropped (dof falls by one).
- A category with baseline proportion 0 and defects: the baseline rules the shift out, so the
  line is flagged ``impossible`` with pvalue 0.0; the statistic and w are computed over the
  other categories (finite, never inf).
- Fewer than 2 categories with baseline support: not tested.
- Proportions not summing to 1 (|sum - 1| > 1e-6): InvalidArgumentError unless normalize=True.
- NaN, infinite, negative or fractional counts: InvalidArgumentError naming argument and index.
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln, xlogy

from qcfit.errors import InvalidArgumentError
from qcfit.stats import _checks, pvalues
from qcfit.stats._enumerate import compositions, n_compositions
from qcfit.stats.residuals import (
    adjusted_residuals_gof,
    contributions,
    expected_gof,
    pearson_residuals,
)
from qcfit.stats.results import GoodnessResult

STATISTICS = ("pearson", "g")


def gof_statistic(x: np.ndarray, e: np.ndarray, statistic: str) -> np.ndarray:
    """X^2 or G^2 over the last axis; cells with e = 0 contribute 0."""
    return contributions(x, e, statistic).sum(axis=-1)


def _ranker(n: int, ps: np.ndarray, statistic: str):
    """X^2 or G^2 of count vectors under one null model, as used for ranking.

    The observed line is ranked with the same function as the null draws, so an identical
    table gives an identical value (exact ties).
    """
    e = n * ps
    if statistic == "pearson":
        inv_e = 1.0 / e
        return lambda x: (np.asarray(x, dtype=float) - e) ** 2 @ inv_e

    def rank(x: np.ndarray) -> np.ndarray:
        xf = np.asarray(x, dtype=float)
        return 2.0 * xlogy(xf, xf / e).sum(axis=-1)
    return rank


def _model(n: int, p: np.ndarray, statistic: str) -> pvalues.Model:
    support = p > 0
    ps = p[support]
    k = int(support.sum())
    rank = _ranker(n, ps, statistic)

    draw = pvalues.multinomial_sampler(ps, n)

    def sample(rng: np.random.Generator, size: int) -> np.ndarray:
        return rank(draw.draw(rng, np.full(size, n)))

    # several chunks at once: drawn in one pass, ranked chunk by chunk (the same numbers)
    sample.many = lambda rngs, size: [rank(x) for x in draw.draw_many(rngs, n, size)]

    def enumerate_() -> tuple[np.ndarray, np.ndarray]:
        x = compositions(n, k)
        logp = gammaln(n + 1) - gammaln(x + 1).sum(axis=1) + xlogy(x, ps).sum(axis=1)
        return rank(x), np.exp(logp)

    words = pvalues.key_words(np.array([n]), ps, np.frombuffer(statistic.encode(), np.uint8))
    return pvalues.Model(sample, words, n_compositions(n, k), enumerate_,
                         lambda x: rank(np.asarray(x)[..., support]))


def _row_keys(arr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct rows of a 2-D float array: (first index of each, inverse)."""
    flat = np.ascontiguousarray(arr).view(np.dtype((np.void, arr.dtype.itemsize * arr.shape[1])))
    _, first, inverse = np.unique(flat.ravel(), return_index=True, return_inverse=True)
    return first, inverse.ravel()


def _builder(n: np.ndarray, p: np.ndarray, obs: np.ndarray, statistic: str, shared_p: bool):
    def build(lines: np.ndarray) -> tuple[np.ndarray, list[pvalues.Model], np.ndarray]:
        if shared_p:
            _, first, inverse = np.unique(n[lines], return_index=True, return_inverse=True)
        else:
            first, inverse = _row_keys(np.column_stack([n[lines], p[lines]]))
        inverse = inverse.ravel()
        models = [_model(int(n[lines[f]]), p[lines[f]], statistic) for f in first]
        return inverse, models, pvalues.rank_observed(models, inverse, obs[lines])
    return build


def _first(v: np.ndarray) -> object:
    x = v[0]
    return x.item() if isinstance(x, np.generic) else x


def _status(n, k_eff, impossible):
    tested = (n > 0) & (k_eff >= 2) & ~impossible
    reason = np.full(n.shape, "", dtype=object)
    reason[(k_eff < 2) & ~impossible] = "not tested: fewer than 2 categories with baseline support"
    reason[n == 0] = "not tested: no defects"
    return tested, reason


def _impossible_reason(mask: np.ndarray, obs: np.ndarray) -> str:
    cells = ", ".join(f"{int(j)} ({int(obs[j])} defects)" for j in np.flatnonzero(mask))
    return f"impossible category: baseline proportion 0 but defects in category {cells}"


def fit_to_baseline(
    observed: object,
    proportions: object,
    *,
    statistic: str = "pearson",
    pvalue: str = "auto",
    draws: int = pvalues.DEFAULT_DRAWS,
    seed: int | np.random.Generator = 0,
    normalize: bool = False,
    levels: object = pvalues.DEFAULT_LEVELS,
) -> GoodnessResult:
    """Test observed counts (k,) or (m, k) against baseline proportions (k,) or (m, k).

    ``statistic``: "pearson" (X^2) or "g" (G^2). ``pvalue``: "auto", "asymptotic",
    "monte-carlo" (``draws`` multinomial draws under the baseline) or "exact". ``levels`` are
    the decision levels near which ``auto`` refines its p-value. Returns a
    :class:`GoodnessResult`; scalar fields for 1-D input, (m,) / (m, k) arrays for 2-D input.
    """
    statistic = _checks.choice(statistic, "statistic", STATISTICS)
    mode = _checks.choice(pvalue, "pvalue", pvalues.PVALUE_METHODS)
    draws = _checks.positive_int(draws, "draws")
    lv = _checks.levels(levels)
    obs = _checks.counts(observed, "observed", ndim=(1, 2))
    single = obs.ndim == 1
    obs2 = np.atleast_2d(obs)
    m, k = obs2.shape
    props = _checks.proportions(proportions, "proportions", k, normalize=normalize)
    if props.ndim == 2 and props.shape[0] not in (1, m):
        raise InvalidArgumentError("proportions", f"{props.shape[0]} rows for {m} lines")
    props = np.broadcast_to(props, (m, k))
    root = pvalues.seed_root(seed)

    support = props > 0
    imp_mask = ~support & (obs2 > 0)
    impossible = imp_mask.any(axis=1)
    n = obs2.sum(axis=1)
    e = expected_gof(n, props)
    k_eff = support.sum(axis=1)
    tested, reason0 = _status(n, k_eff, impossible)
    x2 = gof_statistic(obs2, e, "pearson")
    t = x2 if statistic == "pearson" else gof_statistic(obs2, e, "g")
    dof = np.maximum(k_eff - 1, 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        p_asym = pvalues.asymptotic_pvalue(t, dof)
        w = np.where(n > 0, np.sqrt(x2 / np.where(n > 0, n, 1)), np.nan)
    cochran = pvalues.cochran_rule(e, support)

    build = _builder(n, props, obs2, statistic, shared_p=np.ndim(proportions) == 1)
    res = pvalues.resolve(t, p_asym, cochran, tested, build, mode=mode,
                          draws=draws, root=root, levels=lv)
    p = res.pvalue
    method, reason = res.method, res.reason
    method[~tested] = "not-tested"
    reason[~tested] = reason0[~tested]
    p[impossible] = 0.0
    method[impossible] = "impossible-category"
    for i in np.flatnonzero(impossible):
        reason[i] = _impossible_reason(imp_mask[i], obs2[i])
    stat_out = np.where(tested | impossible, t, np.nan)
    w = np.where(tested | impossible, w, np.nan)
    min_e = np.where(support, e, np.inf).min(axis=1)

    out = dict(
        statistic=stat_out, dof=dof.astype(np.int64), pvalue=p, effect_size=w,
        n=n.astype(np.int64), expected=e, observed=obs2.astype(np.int64),
        pearson_residuals=pearson_residuals(obs2, e),
        adjusted_residuals=adjusted_residuals_gof(obs2, e, props),
        contributions=contributions(obs2, e, statistic), min_expected=min_e,
        pvalue_se=res.se, draws=res.draws, method=method,
        method_reason=reason, tested=tested, impossible=impossible,
        impossible_mask=imp_mask,
    )
    if single:
        out = {key: _first(v) for key, v in out.items()}
    out = {key: (_checks.readonly(v) if isinstance(v, np.ndarray) else v)
           for key, v in out.items()}
    return GoodnessResult(**out, statistic_name=statistic, seed=root)
