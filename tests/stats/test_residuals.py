"""Top contributing categories with direction."""

import math

import numpy as np

from qcfit.stats import compare_groups, fit_to_baseline, top_categories


def test_top_categories_of_a_fit():
    p0 = np.array([0.4, 0.3, 0.2, 0.1])
    r = fit_to_baseline([20, 30, 20, 30], p0)
    top = top_categories(r, codes=["scratch", "dent", "crack", "stain"])
    assert [t.code for t in top] == ["stain", "scratch"]
    assert top[0].direction == "up" and top[1].direction == "down"
    assert abs(top[0].adjusted_residual) >= abs(top[1].adjusted_residual) >= 2
    e = 100 * p0
    assert math.isclose(top[0].adjusted_residual, (30 - e[3]) / math.sqrt(e[3] * (1 - p0[3])))


def test_impossible_category_comes_first():
    r = fit_to_baseline([10, 5, 1], [10 / 16, 6 / 16, 0.0])
    top = top_categories(r)
    assert top[0].index == 2 and top[0].impossible and top[0].direction == "up"
    assert math.isnan(top[0].adjusted_residual)


def test_top_categories_from_a_table_row():
    # Agresti (2007), An Introduction to Categorical Data Analysis, 2nd ed., p. 39, party x
    # gender: the female row's adjusted residuals are 4.502, 0.699, -5.316 (example output of
    # the R package chisq.posthoc.test; Agresti's printed 4.50 / 0.70 / -5.32 from memory), so
    # the largest is Republican, -5.32 (down), then Democrat +4.50 (up).
    g = compare_groups([[762, 327, 468], [484, 239, 477]])
    top = top_categories(g.adjusted_residuals[0], codes=["Dem", "Ind", "Rep"], limit=5)
    assert [(t.code, t.direction) for t in top] == [("Rep", "down"), ("Dem", "up")]
    assert round(top[0].adjusted_residual, 2) == -5.32
