"""Sequential charts: formulas against their published definitions, state, attribution."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qcfit.errors import InvalidArgumentError
from qcfit.stats.sequential import (
    Concern,
    all_pairs,
    concern_move,
    concern_share_up,
    init_state,
    make_design,
    make_limits,
    reset_lines,
    run,
    signal_reports,
    stack_designs,
    stack_limits,
    stack_states,
    state_from_json,
    state_to_json,
    update,
)

P0 = np.array([0.40, 0.25, 0.15, 0.10, 0.06, 0.04])


def _counts(rng, p, n, shifts, m=1):
    n = np.broadcast_to(np.asarray(n), (shifts, m))
    return rng.multinomial(n, p).astype(float)


def _design(m=3, lam=0.1):
    rng = np.random.default_rng(0)
    p0 = rng.dirichlet(np.full(6, 4.0), size=m)
    cons = [concern_share_up(p0, 5, 1.5, "cat5 up"), concern_move(p0, 0, 4, 0.1)]
    return make_design(p0, ewma_lambda=lam, concerns=cons)


# ------------------------------------------------------------------------------- formulas


def test_first_mewma_value_is_pearson_x2():
    # Lowry, Woodall, Champ & Rigdon (1992), Technometrics 34(1): Cov(Z_1) = lam^2 Sigma, so
    # Q_1 = the Pearson (1900) X^2 of the first shift; scipy.stats.chisquare as reference.
    d = make_design(P0, ewma_lambda=0.2, bank=False)
    x = np.array([[70, 55, 30, 25, 12, 8]])
    _, step = update(init_state(d), x, d, make_limits(d))
    ref = stats.chisquare(x[0], x.sum() * P0).statistic
    assert step.ewma_stat[0] == pytest.approx(ref, rel=1e-12)


def test_mewma_variance_factor_matches_lowry_closed_form():
    # Lowry et al. (1992): Cov(Z_t) = lam/(2-lam) [1 - (1-lam)^(2t)] Sigma for a constant n.
    lam, n = 0.1, 200
    d = make_design(P0, ewma_lambda=lam, bank=False)
    st_, lim = init_state(d), make_limits(d)
    x = _counts(np.random.default_rng(1), P0, n, 40)
    for t in range(1, 41):
        st_, _ = update(st_, x[t - 1], d, lim)
        ref = lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)) / n
        assert st_.ewma_v[0] == pytest.approx(ref, rel=1e-12)


def test_mewma_with_varying_n_equals_explicit_weighted_sum():
    # Z_t = (1-lam)^t p0 + sum_i lam (1-lam)^(t-i) x_i/n_i,  v_t = sum_i lam^2 (1-lam)^(2(t-i)) / n_i
    lam = 0.15
    rng = np.random.default_rng(2)
    n = rng.integers(20, 400, size=25)
    x = np.stack([rng.multinomial(v, P0) for v in n]).astype(float)
    d = make_design(P0, ewma_lambda=lam, bank=False)
    st_, _ = run(d, make_limits(d), x[:, None, :])
    t = len(n)
    wts = lam * (1 - lam) ** (t - 1 - np.arange(t))
    z = (1 - lam) ** t * P0 + (wts[:, None] * x / n[:, None]).sum(axis=0)
    v = np.sum(wts**2 / n)
    np.testing.assert_allclose(st_.ewma_z[0], z, rtol=1e-12)
    assert st_.ewma_v[0] == pytest.approx(v, rel=1e-12)


def test_mewma_in_control_mean_is_k_minus_1_with_varying_n():
    # E0[Q_t] = trace(Cov^- Cov) = k - 1 exactly for the exact covariance (any n sequence);
    # 4000 lines act as replicates.
    m, lam = 4000, 0.1
    d = make_design(np.tile(P0, (m, 1)), ewma_lambda=lam, bank=False)
    rng = np.random.default_rng(3)
    n = rng.integers(20, 300, size=(12, m))
    x = rng.multinomial(n, P0).astype(float)
    _, steps = run(d, make_limits(d), x)
    q = steps[-1].ewma_stat
    assert abs(q.mean() - 5) < 4 * q.std() / np.sqrt(m)


def test_cusum_increment_is_multinomial_log_likelihood_ratio():
    # Page (1954) CUSUM of log-likelihood ratios; multinomial LLR as in Ryan, Wells & Woodall
    # (2011, JQT; from memory). Reference: scipy.stats.multinomial.logpmf.
    c = concern_share_up(P0, 4, 2.0)
    d = make_design(P0, concerns=[c], bank=True)
    x = np.array([[80, 50, 31, 20, 14, 5]])
    _, step = update(init_state(d), x, d, make_limits(d))
    n = int(x.sum())
    llr = stats.multinomial.logpmf(x[0], n, c.p1) - stats.multinomial.logpmf(x[0], n, P0)
    assert step.concern_stat[0, 0] == pytest.approx(max(llr, 0.0), rel=1e-10, abs=1e-12)
    # bank pair (a -> b): p1 moves share with Cohen's w = 0.1; its LLR from scipy too
    st_, _ = update(init_state(d), x, d, make_limits(d))
    for i, (a, b) in enumerate(d.bank_pairs[:5]):
        p1 = concern_move(P0, int(a), int(b), 0.1).p1
        llr = stats.multinomial.logpmf(x[0], n, p1) - stats.multinomial.logpmf(x[0], n, P0)
        assert st_.bank_s[0, i] == pytest.approx(max(llr, 0.0), rel=1e-10, abs=1e-12)


def test_cusum_recursion_matches_plain_loop():
    c = concern_move(P0, 1, 5, 0.15)
    d = make_design(P0, concerns=[c], bank=False, ewma_lambda=0)
    x = _counts(np.random.default_rng(4), c.p1, 150, 60)
    _, steps = run(d, make_limits(d), x)
    w = np.log(c.p1 / P0)
    s, last0 = 0.0, 0
    for t, xt in enumerate(x[:, 0, :], start=1):
        s = max(0.0, s + float(xt @ w))
        last0 = t if s == 0 else last0
        assert steps[t - 1].concern_stat[0, 0] == pytest.approx(s, rel=1e-12, abs=1e-12)
        assert steps[t - 1].concern_start[0, 0] == last0 + 1


def test_concern_constructors():
    up = concern_share_up(P0, 2, 1.4)
    assert up.p1[2] == pytest.approx(1.4 * P0[2])
    assert up.p1.sum() == pytest.approx(1.0)
    ratio = up.p1[[0, 1, 3, 4, 5]] / P0[[0, 1, 3, 4, 5]]
    np.testing.assert_allclose(ratio, ratio[0])
    mv = concern_move(P0, 0, 4, 0.1)
    # Cohen (1988): w = sqrt(sum (p1 - p0)^2 / p0)
    assert np.sqrt(np.sum((mv.p1 - P0) ** 2 / P0)) == pytest.approx(0.1)
    assert all_pairs(6).shape == (30, 2)


# ---------------------------------------------------------------------------- state, lines


def _stream(d, shifts, seed):
    rng = np.random.default_rng(seed)
    n = rng.integers(0, 300, size=(shifts, d.m))
    if shifts > 3:
        n[3, 0] = 0  # a shift with no defects on one line
    return rng.multinomial(n, d.p0).astype(float)


def _assert_same_state(a, b):
    for name in a.__dataclass_fields__:
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and np.array_equal(x, y), name


def test_restart_through_json_resumes_bit_for_bit():
    d = _design()
    lim = make_limits(d, ewma=12.0, concerns=3.0, bank=6.0)
    x = _stream(d, 40, 5)
    full, steps_full = run(d, lim, x)
    mid, _ = run(d, lim, x[:17])
    text = json.dumps(state_to_json(mid))
    back = state_from_json(json.loads(text))
    _assert_same_state(mid, back)
    resumed, steps_res = run(d, lim, x[17:], state=back)
    _assert_same_state(full, resumed)
    for a, b in zip(steps_full[17:], steps_res, strict=True):
        assert np.array_equal(a.ewma_stat, b.ewma_stat)
        assert np.array_equal(a.bank_stat, b.bank_stat)
        assert np.array_equal(a.signal, b.signal)


def test_round_trip_of_the_default_chart_set_without_concerns():
    d = make_design(np.array([P0, P0[::-1]]))  # default: MEWMA + bank, no concern CUSUM
    lim = make_limits(d, ewma=18.0, bank=7.8)
    x = _stream(d, 8, 9)
    full, _ = run(d, lim, x)
    mid, _ = run(d, lim, x[:5])
    back = state_from_json(json.loads(json.dumps(state_to_json(mid))))
    _assert_same_state(mid, back)
    _assert_same_state(full, run(d, lim, x[5:], state=back)[0])


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), split=st.integers(0, 12))
def test_round_trip_and_invariants_hold_for_any_stream(seed, split):
    d = _design(m=2, lam=0.3)
    lim = make_limits(d)
    x = _stream(d, 12, seed)
    a, steps = run(d, lim, x[:split])
    b = state_from_json(json.loads(json.dumps(state_to_json(a))))
    _assert_same_state(a, b)
    assert np.all(b.cusum_s >= 0) and np.all(b.bank_s >= 0)
    assert np.all(b.cusum_zero <= b.t[:, None]) and np.all(b.bank_zero <= b.t[:, None])
    np.testing.assert_allclose(b.ewma_z.sum(axis=1), 1.0)


def test_vectorized_over_lines_equals_line_by_line():
    d = _design(m=4)
    lim = make_limits(d, ewma=10.0, concerns=2.5, bank=5.0)
    x = _stream(d, 30, 6)
    st_all, steps_all = run(d, lim, x)
    for i in range(d.m):
        di = d.select([i])
        li = make_limits(di, ewma=10.0, concerns=2.5, bank=5.0)
        st_i, steps_i = run(di, li, x[:, i : i + 1, :])
        for name in st_all.__dataclass_fields__:
            assert np.array_equal(getattr(st_all, name)[i], getattr(st_i, name)[0]), name
        for a, b in zip(steps_all, steps_i, strict=True):
            assert a.ewma_stat[i] == b.ewma_stat[0] and a.bank_top[i] == b.bank_top[0]


def test_stacked_one_line_chart_sets_advance_exactly_as_each_alone():
    """Lines built one by one (each its own p0 and limits) and stacked, from states picked
    out of other states, give bit for bit each line's own values and statistics."""
    d = _design(m=4)
    ones = [d.select([i]) for i in range(d.m)]
    lims = [make_limits(di, ewma=8.0 + i, concerns=2.0 + i, bank=4.0 + i)
            for i, di in enumerate(ones)]
    x = _stream(d, 25, 9)
    alone = [run(di, li, x[:12, i:i + 1, :])[0] for i, (di, li) in enumerate(zip(ones, lims,
                                                                                 strict=True))]
    order = [2, 0, 3, 1]
    sd = stack_designs([ones[i] for i in order])
    sl = stack_limits([lims[i] for i in order])
    st_ = stack_states([(alone[i], 0) for i in order])
    for t in range(12, 25):
        st_, step = update(st_, x[t][order], sd, sl)
        for pos, i in enumerate(order):
            alone[i], one = update(alone[i], x[t, i:i + 1], ones[i], lims[i])
            for name in st_.__dataclass_fields__:
                assert getattr(st_, name)[pos].tobytes() == getattr(alone[i], name)[0].tobytes()
            for name in step.__dataclass_fields__:
                assert getattr(step, name)[pos].tobytes() == getattr(one, name)[0].tobytes()
    assert stack_states([(st_, 0), (st_, 1), (st_, 2), (st_, 3)]) is st_
    picked = stack_states([(st_, 3), (st_, 1)])
    assert np.array_equal(picked.bank_s, st_.bank_s[[3, 1]])
    other = make_design(d.p0[0], ewma_lambda=0.3)
    with pytest.raises(InvalidArgumentError, match="designs\\[1\\]"):
        stack_designs([ones[0], other])


def test_reset_restarts_only_the_named_lines():
    d = _design(m=3)
    lim = make_limits(d)
    st_, _ = run(d, lim, _stream(d, 10, 7))
    r = reset_lines(st_, d, [1])
    fresh = init_state(d)
    assert r.t.tolist() == [10, 0, 10]
    assert np.array_equal(r.ewma_z[1], fresh.ewma_z[1]) and r.bank_s[1].sum() == 0
    assert np.array_equal(r.bank_s[[0, 2]], st_.bank_s[[0, 2]])
    # baseline change: the new design's p0 becomes the restart value
    p0_new = d.p0.copy()
    p0_new[2] = np.full(6, 1 / 6)
    d2 = make_design(p0_new, concerns=[Concern("a", d.concern_p1[:, 0])])
    r2 = reset_lines(run(d2, make_limits(d2), _stream(d2, 3, 8))[0], d2, [2])
    np.testing.assert_allclose(r2.ewma_z[2], 1 / 6)


def test_bad_counts_are_rejected_with_position():
    d = _design(m=2)
    x = np.full((2, 6), 5.0)
    x[1, 3] = -1
    with pytest.raises(InvalidArgumentError, match=r"counts.*\[1, 3\]"):
        update(init_state(d), x, d, make_limits(d))
    with pytest.raises(InvalidArgumentError, match="shape"):
        update(init_state(d), np.ones((3, 6)), d, make_limits(d))
    with pytest.raises(InvalidArgumentError, match="p0"):
        make_design([0.5, 0.5, 0.0])
    with pytest.raises(InvalidArgumentError, match="state"):
        state_from_json([{"format": 99}])


# ---------------------------------------------------------------------------- attribution


def test_signal_names_the_moving_categories_and_the_start():
    rng = np.random.default_rng(11)
    d = make_design(P0, ewma_lambda=0.2, concerns=[concern_share_up(P0, 4, 2.0, "cat4 x2")])
    lim = make_limits(d, ewma=17.5, concerns=4.0, bank=7.8)
    p1 = concern_move(P0, 0, 4, 0.25).p1  # 25 in-control shifts, then share moves 0 -> 4
    x = np.concatenate([_counts(rng, P0, 200, 25), _counts(rng, p1, 200, 40)])
    st_ = init_state(d)
    for xt in x:
        st_, step = update(st_, xt, d, lim)
        if step.bank_signal[0]:
            break
    reports = {r.chart: r for r in signal_reports(step, st_, d, lim)}
    bank = reports["bank"]
    assert bank.name == "cat0->cat4" and bank.t > 25
    assert abs(bank.start - 26) <= 3 and bank.shifts_back == bank.t - bank.start
    moves = {mv.category: mv for mv in bank.drivers}
    assert moves[4].direction == "up" and moves[4].estimated_share > P0[4]
    assert 0 not in moves or moves[0].direction == "down"
    assert bank.defects_since_start == pytest.approx(200 * (bank.t - bank.start + 1), abs=0.5)
    if "ewma" in reports:
        assert reports["ewma"].drivers[0].category == 4
        assert reports["ewma"].drivers[0].direction == "up"
