"""Run lengths and limits of the sequential charts: Markov chain, Monte Carlo, calibration."""

from __future__ import annotations

import numpy as np
import pytest

from qcfit.errors import InvalidArgumentError
from qcfit.stats.sequential import (
    concern_move,
    concern_share_up,
    init_state,
    make_design,
    make_limits,
    update,
)
from qcfit.stats.sequential_calibration import (
    ArlCurve,
    MultinomialSampler,
    calibrate,
    calibration_key,
    conservative_limits,
    ratio_arl,
    simulate_traces,
)
from qcfit.stats.sequential_markov import (
    bernoulli_cusum_arl,
    calibrate_llr_cusum,
    lattice_arl,
    llr_increment_pmf,
    poisson_cusum_arl,
    siegmund_arl,
)

P0 = np.array([0.40, 0.25, 0.15, 0.10, 0.06, 0.04])


# ------------------------------------------------------------------------- Markov chain ARL


@pytest.mark.parametrize(("p", "h"), [(0.3, 6), (0.45, 10), (0.6, 4)])
def test_markov_chain_equals_closed_form_for_unit_steps(p, h):
    # S = max(0, S + 2X - 1), X ~ Bernoulli(p): a birth-death chain reflected at 0. First-step
    # analysis (Feller 1968, An Introduction to Probability Theory and Its Applications I,
    # ch. XIV; from memory) gives the mean passage time 0 -> h as sum_i e_i with
    # e_0 = 1/p, e_i = (1 + (1-p) e_{i-1}) / p.
    e = [1 / p]
    for _ in range(1, h):
        e.append((1 + (1 - p) * e[-1]) / p)
    assert bernoulli_cusum_arl(p, 1, 1, h) == pytest.approx(sum(e), rel=1e-10)


def test_poisson_cusum_against_siegmund_approximation():
    # Siegmund (1985), Sequential Analysis, corrected diffusion (formula from memory):
    # ARL ~ (exp(-2 D b) + 2 D b - 1) / (2 D^2), D = mu/sigma, b = h/sigma + 1.166.
    # Near-normal Poisson increments (mean 1000): out of control the two agree closely;
    # in control the approximation is ~6% high from the Poisson skewness (our computation).
    ooc = poisson_cusum_arl(1030, 1015, 150)
    assert ooc == pytest.approx(siegmund_arl(15, np.sqrt(1030), 150), rel=0.02)
    ic = poisson_cusum_arl(1000, 1015, 150)
    assert ic == pytest.approx(siegmund_arl(-15, np.sqrt(1000), 150), rel=0.10)
    assert ic < siegmund_arl(-15, np.sqrt(1000), 150)


def test_poisson_cusum_markov_chain_against_simulation():
    # Lucas (1985) Poisson CUSUM S = max(0, S + X - k); exact chain vs 20,000 simulated runs.
    mu, k, h = 4.0, 5, 6
    exact = poisson_cusum_arl(mu, k, h)
    rng = np.random.default_rng(12)
    paths = 20_000
    s = np.zeros(paths)
    rl = np.zeros(paths)
    alive = np.ones(paths, dtype=bool)
    t = 0
    while alive.any() and t < 20 * exact:
        t += 1
        s[alive] = np.maximum(0, s[alive] + rng.poisson(mu, alive.sum()) - k)
        done = alive & (s >= h)
        rl[done] = t
        alive &= ~done
    assert not alive.any()
    se = rl.std() / np.sqrt(paths)
    assert abs(rl.mean() - exact) < 4 * se


def test_llr_cusum_limit_for_the_anchor_design():
    # Project methods notes, section 3.2 (our own computation, not a published value):
    # cat1 -> cat5 move with w = 0.1, n = 200: h = 4.23 for ARL0 370; ARL0 374.2 at h = 4.245.
    c = concern_move(P0, 0, 4, 0.1)
    w = np.log(c.p1 / P0)
    cal = calibrate_llr_cusum(P0, w, [200], 370.0)
    assert cal.h == pytest.approx(4.23, abs=0.03)
    lp = llr_increment_pmf(P0, w, [200], 0.005)
    assert lattice_arl(lp, 4.245) == pytest.approx(374.2, rel=0.01)


@pytest.mark.parametrize("n_profile", [[200], [20, 50, 200, 1000]])
def test_wald_bound_holds(n_profile):
    # ARL0 >= e^h for an LLR CUSUM (e^S is built on P0-martingales; Lorden 1971 argument).
    w = np.log(concern_share_up(P0, 5, 2.0).p1 / P0)
    lp = llr_increment_pmf(P0, w, n_profile, np.log(370) / 600)
    assert lattice_arl(lp, np.log(370)) >= 370
    assert lp.method == "exact"  # two distinct weights: binomial


def test_llr_cusum_calibration_matches_simulation():
    c = concern_move(P0, 2, 4, 0.1)  # three distinct weights: exact trinomial pmf
    d = make_design(P0, ewma_lambda=0, bank=False, concerns=[c])
    cal = calibrate_llr_cusum(P0, d.concern_weights[0, 0], [100, 200], 100.0)
    tr = simulate_traces(d, 0, [100, 200], paths=1500, horizon=250,
                         rng=np.random.default_rng(13))
    arl, se, _ = ratio_arl(tr.concerns[:, :, 0] / cal.h)
    assert abs(arl - 100) < 4 * se + 2  # 2 shifts ~ lattice error allowance


# ----------------------------------------------------------------------------- Monte Carlo


def test_ratio_estimator_recovers_a_geometric_mean():
    # Independent exceedances with probability 1/50: run length geometric, mean exactly 50.
    rng = np.random.default_rng(14)
    u = (rng.random((60, 4000)) < 1 / 50).astype(float)
    arl, se, alarms = ratio_arl(u)
    assert abs(arl - 50) < 4 * se and alarms > 2000
    assert se == pytest.approx(50 / np.sqrt(alarms), rel=0.2)


def test_simulated_traces_equal_the_update_recursion():
    d = make_design(P0, ewma_lambda=0.2, concerns=[concern_share_up(P0, 3, 1.5)])
    paths, horizon, n = 5, 30, 120
    tr = simulate_traces(d, 0, [n], paths=paths, horizon=horizon, rng=np.random.default_rng(15))
    # the simulation's own draws for this seed (one chunk, n fixed: no draws for n)
    x = MultinomialSampler(P0, n).draw(np.random.default_rng(15), np.full((horizon, paths), n))
    dm = d.select([0] * paths)
    lim = make_limits(dm)
    st = init_state(dm)
    for t in range(horizon):
        st, step = update(st, x[t], dm, lim)
        np.testing.assert_allclose(tr.ewma[t], step.ewma_stat, rtol=1e-10)
        np.testing.assert_allclose(tr.bank[t], step.bank_stat, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(tr.concerns[t], step.concern_stat, rtol=1e-10, atol=1e-12)


@pytest.mark.slow
def test_calibration_reaches_target_on_a_small_case():
    p0 = np.array([[0.5, 0.3, 0.2, 0.1], [0.25, 0.25, 0.25, 0.25]])
    p0 = p0 / p0.sum(axis=1, keepdims=True)
    d = make_design(p0, ewma_lambda=0.2, concerns=[concern_share_up(p0, 3, 1.6)])
    cal = calibrate(d, [80, 120], arl0=100.0, seed=3, paths=400)
    assert np.all(np.abs(cal.omnibus_arl0 / 100 - 1) < 0.05)  # bisection hit the target
    assert np.all(cal.omnibus_se / cal.omnibus_arl0 < 0.1)
    for i in range(d.m):  # independent validation of MEWMA-or-bank at the limits
        tr = simulate_traces(d, i, [80, 120], paths=1500, horizon=200,
                             rng=np.random.default_rng(100 + i))
        u = np.maximum(tr.ewma / cal.limits.ewma[i], tr.bank / cal.limits.bank[i])
        arl, se, _ = ratio_arl(u)
        # calibration MC SE ~6% plus validation SE ~3%: allow 15% (about 2.3 combined SE)
        assert abs(arl / 100 - 1) < 0.15, (i, arl, se)
        c_arl, c_se, _ = ratio_arl(tr.concerns[:, :, 0] / cal.limits.concerns[i, 0])
        assert abs(c_arl - 100) < 4 * c_se + 3
    # budget split: each chart alone is above the target, together they meet it
    assert np.all(cal.ewma_arl0 > 100) and np.all(cal.bank_arl0 > 100)


@pytest.mark.slow
def test_calibrating_lines_in_parts_gives_the_same_limits():
    rng = np.random.default_rng(16)
    d = make_design(rng.dirichlet(np.full(5, 5.0), size=3))
    full = calibrate(d, [150], arl0=80.0, seed=9, paths=60)
    part = calibrate(d.select([2]), [150], arl0=80.0, seed=9, paths=60, line_ids=[2])
    assert part.limits.ewma[0] == full.limits.ewma[2]
    assert part.limits.bank[0] == full.limits.bank[2]


def test_arl_curve_is_monotone_and_limit_for_inverts_it():
    rng = np.random.default_rng(17)
    stat = rng.chisquare(3, size=(200, 300))
    curve = ArlCurve.from_traces(stat)
    hs = np.linspace(5, 20, 16)
    arls = [curve.arl(h) for h in hs]
    assert all(a <= b for a, b in zip(arls, arls[1:], strict=False))
    h = curve.limit_for(60.0)
    assert curve.arl(h) >= 60.0 > curve.arl(h - 1e-6)


def test_conservative_limits_and_bad_arguments():
    d = make_design(P0, concerns=[concern_share_up(P0, 1, 1.3)])
    lim = conservative_limits(d, 370.0)
    assert lim.concerns[0, 0] == pytest.approx(np.log(370.0))
    assert lim.bank[0] == pytest.approx(np.log(30 * 370.0))
    assert np.isinf(lim.ewma[0])
    with pytest.raises(InvalidArgumentError, match="arl0"):
        calibrate(d, [200], arl0=0.5)
    with pytest.raises(InvalidArgumentError, match="n_profile"):
        calibrate(d, [0, 0])


def test_calibration_key_changes_with_what_the_limits_depend_on():
    d = make_design(np.array([P0, P0[::-1]]))
    k0 = calibration_key(d, 0, [200, 150])
    assert k0 == calibration_key(d, 0, [150, 200])  # a profile is a multiset
    assert k0 != calibration_key(d, 1, [200, 150])  # other baseline
    assert k0 != calibration_key(d, 0, [200, 150], arl0=500.0)
    assert k0 != calibration_key(make_design(np.array([P0, P0]), ewma_lambda=0.1), 0,
                                 [200, 150])


@pytest.mark.parametrize(("mu", "k", "h"), [(4.0, 5, 8), (1.5, 2, 12)])
def test_all_limits_agree_with_one_solve_per_limit(mu, k, h):
    # Cross-check of two computations of the same Brook & Evans (1972) chain: one elimination
    # for every limit against a dense solve per limit (Poisson CUSUM of Lucas 1985).
    from scipy import stats

    from qcfit.stats.sequential_markov import arl_all_limits, arl_integer_chain

    pmf = stats.poisson.pmf(np.arange(60), mu)
    pmf /= pmf.sum()
    every = arl_all_limits(pmf, -k, h)
    one = [arl_integer_chain(pmf, -k, lim)[0] for lim in range(1, h + 1)]
    assert every == pytest.approx(one, rel=1e-10)
    assert every[-1] == pytest.approx(poisson_cusum_arl(mu, k, h), rel=1e-10)


def test_all_limits_chain_that_cannot_alarm_is_infinite():
    # J in {-1, 0}: S never leaves 0, so no limit is ever reached (defined answer, no crash).
    from qcfit.stats.sequential_markov import arl_all_limits

    assert np.all(np.isinf(arl_all_limits(np.array([0.5, 0.5]), -1, 4)))


def test_multinomial_sampler_draws_the_multinomial_law():
    # Reference: scipy.stats.multinomial.pmf of every outcome of n = 6 over 4 categories;
    # Pearson's goodness of fit of 200,000 draws (seeded) to it.
    from scipy import stats

    p = np.array([0.5, 0.3, 0.15, 0.05])
    x = MultinomialSampler(p, 6).draw(np.random.default_rng(3), np.full(200_000, 6)).astype(int)
    keys, count = np.unique(x, axis=0, return_counts=True)
    assert np.all(x.sum(axis=1) == 6)
    expected = stats.multinomial.pmf(keys, 6, p) * x.shape[0]
    big = expected >= 5  # outcomes with expected count below 5 pooled into one cell
    obs = np.append(count[big], x.shape[0] - count[big].sum())
    exp = np.append(expected[big], x.shape[0] - expected[big].sum())
    x2 = float(((obs - exp) ** 2 / exp).sum())
    assert big.sum() > 50 and stats.chi2.sf(x2, obs.size - 1) > 0.001


def test_multinomial_sampler_keeps_totals_and_means():
    p = np.array([0.4, 0.25, 0.15, 0.1, 0.06, 0.04])
    n = np.random.default_rng(4).integers(0, 300, size=(50, 400))
    x = MultinomialSampler(p, 299).draw(np.random.default_rng(5), n)
    assert x.shape == (50, 400, 6) and np.array_equal(x.sum(axis=-1), n) and x.min() >= 0
    mean = x.reshape(-1, 6).sum(axis=0) / n.sum()
    se = np.sqrt(p * (1 - p) / n.sum())
    assert np.all(np.abs(mean - p) < 5 * se)
    # above the table size it falls back to numpy's multinomial (same law)
    big = MultinomialSampler(p, 5000)
    assert big.tables is None
    y = big.draw(np.random.default_rng(6), np.full(10, 5000))
    assert np.array_equal(y.sum(axis=-1), np.full(10, 5000))
