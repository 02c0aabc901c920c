"""p-value engines: asymptotic chi-square, exact enumeration and seeded Monte Carlo.

Monte Carlo p-value (Davison & Hinkley, *Bootstrap Methods and their Application*, 1997,
eq. 4.11; North, Curtis & Sham, *Am. J. Hum. Genet.* 71, 2002)::

    p = (1 + #{b : T_b >= t}) / (1 + B)

counted with a relative tolerance of 1e-9 on ``t`` so that tables whose statistic equals the
observed one up to rounding count as ties. This p-value is never 0 and is itself a valid
p-value (P(p <= alpha) <= alpha under the null for any B), unlike #/B. Its Monte Carlo
standard error is reported as sqrt(p (1 - p) / B).

Exact p-value: the sum of the null probabilities of every outcome whose statistic is >= t
(same tolerance), by full enumeration when the number of outcomes is at most ``exact_limit``.

Reproducibility: the reference sample for one null model (for example n = 37 defects against
one baseline) is a pure function of (seed, model key, draws). Draws come in chunks of
``CHUNK``; chunk j uses ``SeedSequence([seed, *key_words, j])``. So a line gets the same
p-value in a batch call and alone, lines with the same null model share one sample, and
extending a sample keeps its first draws.

``auto`` (``resolve``): asymptotic only when Cochran's rule holds and the asymptotic p is not
within a factor ``refine_factor`` of a decision level; otherwise exact when the enumeration is
small, else Monte Carlo. Monte Carlo adds chunks until its standard error is at most
0.5/sqrt(draws) (0.005 for 10,000 draws; at most ``draws`` draws), then keeps doubling while
its p is within 3 standard errors of a decision level alpha, up to
B = (1 - alpha) / (alpha * rel_se^2) draws (relative standard error ``rel_se`` at alpha). Because one fixed seed gives the same
reference sample to every shift with the same null model, it is this per-sample precision,
not only the average over seeds, that keeps the realised false-alarm rate near alpha.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import special, stats
from scipy.special import gammaln, xlog1py, xlogy

from qcfit.errors import InvalidArgumentError

DEFAULT_DRAWS = 10_000
DEFAULT_LEVELS: tuple[float, ...] = (0.01, 1 / 370, 0.05)
EXACT_LIMIT = 30_000  # auto enumerates up to here (costs about as much as 10,000 draws)
EXACT_MAX = 2_000_000  # most outcomes enumerated when "exact" is asked for
CHUNK = 2_500
REFINE_FACTOR = 3.0
REFINE_REL_SE = 0.02
MAX_DRAWS = 1_000_000
TIE_RTOL = 1e-9
PVALUE_METHODS = ("auto", "asymptotic", "monte-carlo", "exact")

Sampler = Callable[[np.random.Generator, int], np.ndarray]
Enumerator = Callable[[], tuple[np.ndarray, np.ndarray]]


#: most cells of the inversion tables of one multinomial sampler (16 MB); above it numpy's
#: own multinomial draws are used
TABLE_CELLS = 2_000_000
#: guide-table entries per remaining total (Chen & Asau 1974 guide table, as in Devroye,
#: *Non-Uniform Random Variate Generation*, 1986, sec. III.2.4; from memory)
GUIDE = 64


class MultinomialSampler:
    """Exact Multinomial(n, p) draws for totals 0..``n_max`` by conditional binomials,
    x_j | x_1..x_{j-1} ~ Binomial(m_j, p_j / (p_j + ... + p_k)) with m_j the total left,
    each drawn by inversion of its CDF from a table over m (with a guide table).

    About 3x faster than ``Generator.multinomial`` for 10^3 - 10^6 draws of n ~ 10^2 (numpy redoes each binomial's set-up per draw). Exact up to the rounding of the
    tabulated CDFs (below 1e-12). Uses ``k - 1`` uniforms per draw; falls back to
    ``Generator.multinomial`` when the tables would exceed ``TABLE_CELLS`` cells.
    """

    def __init__(self, p: np.ndarray, n_max: int) -> None:
        self.p = np.asarray(p, dtype=float)
        k = self.p.size
        size = int(n_max) + 1
        self.size = size
        self.tables: list[tuple[np.ndarray, np.ndarray]] | None = None
        if (k - 1) * size * size > TABLE_CELLS or k < 2:
            return
        tail = np.cumsum(self.p[::-1])[::-1]  # p_j + ... + p_k
        m = np.arange(size)[:, None]
        x = np.arange(size)[None, :]
        g = np.arange(GUIDE)[None, :] / GUIDE
        lf = gammaln(np.arange(size) + 1.0)
        inside = x <= m
        log_choose = np.where(inside, lf[m] - lf[x] - lf[np.maximum(m - x, 0)], -np.inf)
        self.tables = []
        for j in range(k - 1):
            q = min(1.0, self.p[j] / tail[j]) if tail[j] > 0 else 0.0
            with np.errstate(divide="ignore", invalid="ignore"):
                logp = log_choose + xlogy(x, q) + xlog1py(m - x, -q)
            cdf = np.cumsum(np.where(inside, np.exp(logp), 0.0), axis=1)
            cdf[x >= m] = 1.0  # exact 1 from the top of each row's support on
            guide = np.stack([np.searchsorted(row, g[0], side="right") for row in cdf])
            self.tables.append((cdf.ravel(), guide.ravel()))

    def draw(self, rng: np.random.Generator, n: np.ndarray) -> np.ndarray:
        """Counts of shape ``n.shape + (k,)`` (float), one draw per entry of ``n``."""
        n = np.asarray(n, dtype=np.int64)
        k = self.p.size
        if self.tables is None:
            return rng.multinomial(n, self.p).astype(float)
        flat = n.ravel()
        return self._from_uniforms(rng.random((k - 1, flat.size)), flat).reshape(n.shape + (k,))

    def draw_many(self, rngs: list[np.random.Generator], n: int, size: int
                  ) -> list[np.ndarray]:
        """``[draw(rng, np.full(size, n)) for rng in rngs]``, the same numbers, inverted in one
        pass over all the draws (the per-call cost of the table look-ups is paid once)."""
        k = self.p.size
        if self.tables is None or len(rngs) < 2:
            return [self.draw(rng, np.full(size, n)) for rng in rngs]
        blocks = np.empty((len(rngs), k - 1, size))  # each generator fills its own block,
        for block, rng in zip(blocks, rngs, strict=True):  # as rng.random((k - 1, size)) would
            rng.random(out=block)
        u = blocks.transpose(1, 0, 2).reshape(k - 1, -1)  # chunk after chunk, per category
        out = self._from_uniforms(u, np.full(u.shape[1], n, dtype=np.int64))
        return np.split(out, len(rngs))

    def _from_uniforms(self, u: np.ndarray, flat: np.ndarray) -> np.ndarray:
        """Counts (len(flat), k) from the uniforms ``u`` (k - 1, len(flat)), by inversion."""
        out = np.empty((flat.size, self.p.size))
        left = flat.copy()
        for j, (cdf, guide) in enumerate(self.tables):
            out[:, j] = xj = self._invert(cdf, guide, left, u[j])
            left -= xj
        out[:, -1] = left
        return out

    def _invert(self, cdf: np.ndarray, guide: np.ndarray, m: np.ndarray, u: np.ndarray
                ) -> np.ndarray:
        """min{x : F_m(x) > u} per entry (F_m the tabulated CDF of row m)."""
        row = m * self.size
        x = guide[m * GUIDE + (u * GUIDE).astype(np.int64)]
        todo = np.flatnonzero(cdf[row + x] <= u)
        while todo.size:
            x[todo] += 1
            todo = todo[cdf[row[todo] + x[todo]] <= u[todo]]
        return x


_SAMPLERS: dict[tuple[bytes, int], MultinomialSampler] = {}
_SAMPLER_CACHE = 4  # at most ~20 MB of tables for 10 categories


def multinomial_sampler(p: np.ndarray, n: int) -> MultinomialSampler:
    """A :class:`MultinomialSampler` for ``p`` and totals up to at least ``n`` (kept for reuse:
    the tables depend only on ``p`` and the size; the draws only on the generator passed in)."""
    size = max(16, 1 << int(n).bit_length())  # draws do not depend on the size, only set-up
    key = (np.ascontiguousarray(p, dtype=float).tobytes(), size)
    found = _SAMPLERS.get(key)
    if found is None:
        if len(_SAMPLERS) >= _SAMPLER_CACHE:
            _SAMPLERS.pop(next(iter(_SAMPLERS)))
        found = _SAMPLERS[key] = MultinomialSampler(p, size)
    return found


def _reasons(template: str, *columns: np.ndarray) -> np.ndarray:
    """Format ``template`` per row, once per distinct combination of the columns."""
    cache: dict[tuple, str] = {}
    out = np.empty(len(columns[0]), dtype=object)
    for i, combo in enumerate(zip(*(c.tolist() for c in columns), strict=True)):
        text = cache.get(combo)
        if text is None:
            text = cache[combo] = template.format(*combo)
        out[i] = text
    return out


def asymptotic_pvalue(statistic: np.ndarray, dof: np.ndarray) -> np.ndarray:
    """Upper tail of chi-square(dof) at ``statistic``; NaN where dof < 1."""
    statistic = np.asarray(statistic, dtype=float)
    dof = np.asarray(dof, dtype=float)
    df = np.where(dof >= 1, dof, np.nan)
    if np.isfinite(statistic).all() and np.isfinite(dof).all():
        # scipy.stats.chi2.sf's values (chdtrc above 0, 1 at or below 0, NaN for a NaN dof)
        # without its per-call argument handling, which costs more than the function
        tail = special.chdtrc(np.where(np.isnan(df), 1.0, df), np.maximum(statistic, 0.0))
        return np.where(np.isnan(df), np.nan, np.where(statistic > 0, tail, 1.0))
    with np.errstate(invalid="ignore"):
        out = stats.chi2.sf(statistic, df)
    return np.asarray(out, dtype=float)


def cochran_rule(expected: np.ndarray, support: np.ndarray) -> np.ndarray:
    """Common practice after Cochran (1954): all expected >= 1 and at most 20% below 5.

    Shapes (m, k) -> (m,); only cells where ``support`` is True count.
    """
    e = np.where(support, expected, np.inf)
    n_cells = support.sum(axis=-1)
    low = ((e < 5) & support).sum(axis=-1)
    return (e.min(axis=-1) >= 1.0) & (low <= 0.2 * n_cells)


def seed_root(seed: int | np.random.Generator) -> int:
    """The integer root every stream is derived from (recorded in results)."""
    if isinstance(seed, np.random.Generator):
        return int(seed.integers(0, 2**63 - 1))
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise InvalidArgumentError("seed", f"must be an int >= 0 or a numpy Generator, got {seed!r}")
    return int(seed)


def key_words(*parts: object) -> list[int]:
    """Stable 32-bit words from a model description (not Python's salted hash)."""
    h = hashlib.blake2b(digest_size=16)
    for part in parts:
        arr = np.ascontiguousarray(part)
        h.update(str(arr.dtype).encode() + str(arr.shape).encode())
        h.update(arr.tobytes())
    digest = h.digest()
    return [int.from_bytes(digest[i:i + 4], "little") for i in range(0, 16, 4)]


def _ge_count(sorted_values: np.ndarray, t: np.ndarray) -> np.ndarray:
    t = np.asarray(t, dtype=float)
    cut = t - TIE_RTOL * np.maximum(np.abs(t), 1.0)
    return sorted_values.size - np.searchsorted(sorted_values, cut, side="left")


@dataclass(slots=True)
class ReferenceSample:
    """Null statistics of one model, drawn in seeded chunks (mutable, internal)."""

    sampler: Sampler
    root: int
    words: list[int]
    chunks: list[np.ndarray] = field(default_factory=list)
    _sorted: np.ndarray | None = None
    _sorted_size: int = -1

    def ensure(self, draws: int) -> None:
        first, last = len(self.chunks), -(-int(draws) // CHUNK)
        if last <= first:
            return
        rngs = [np.random.default_rng(np.random.SeedSequence([self.root, *self.words, j]))
                for j in range(first, last)]
        many = getattr(self.sampler, "many", None)  # same chunks, drawn in one pass
        got = many(rngs, CHUNK) if many is not None else [self.sampler(r, CHUNK) for r in rngs]
        self.chunks += [np.asarray(c, dtype=float) for c in got]

    def count_ge(self, t: np.ndarray, draws: int) -> np.ndarray:
        self.ensure(draws)
        if self._sorted_size != draws:
            self._sorted = np.sort(np.concatenate(self.chunks)[:draws])
            self._sorted_size = draws
        assert self._sorted is not None
        return _ge_count(self._sorted, t)


def exact_tail(values: np.ndarray, probs: np.ndarray, t: np.ndarray) -> np.ndarray:
    """P(T >= t) from an enumerated null distribution (values, probabilities)."""
    order = np.argsort(values, kind="stable")
    v = values[order]
    tail = np.concatenate([np.cumsum(probs[order][::-1])[::-1], [0.0]])
    idx = v.size - _ge_count(v, t)
    return np.minimum(tail[idx], 1.0)


@dataclass(frozen=True, slots=True)
class Model:
    """One null model: a sampler for Monte Carlo and, if small, an exact enumerator."""

    sampler: Sampler
    words: list[int]
    n_outcomes: int
    enumerate: Enumerator | None
    rank: Callable[[np.ndarray], np.ndarray]


def rank_observed(models: list[Model], model_of: np.ndarray, observed: np.ndarray
                  ) -> np.ndarray:
    """The ranking statistic of each observed item under its own model."""
    out = np.empty(len(model_of))
    order = np.argsort(model_of, kind="stable")
    bounds = np.searchsorted(model_of[order], np.arange(len(models) + 1))
    for j, mo in enumerate(models):
        sel = order[bounds[j]:bounds[j + 1]]
        if sel.size:
            out[sel] = mo.rank(observed[sel])
    return out


@dataclass(frozen=True, slots=True)
class Resolved:
    pvalue: np.ndarray
    se: np.ndarray
    draws: np.ndarray
    method: np.ndarray
    reason: np.ndarray


def _near(p: np.ndarray, levels: tuple[float, ...], factor: float) -> np.ndarray:
    out = np.zeros(p.shape, dtype=bool)
    for a in levels:
        out |= (p >= a / factor) & (p <= a * factor)
    return out


def _cap(alpha: float, rel_se: float) -> int:
    return int(min(MAX_DRAWS, np.ceil((1 - alpha) / (alpha * rel_se**2))))


def _next_draws(p: np.ndarray, b: np.ndarray, levels: tuple[float, ...], rel_se: float,
                draws: int) -> np.ndarray:
    """Draws wanted next: one more chunk while the standard error exceeds 0.5/sqrt(draws)
    (what ``draws`` draws give at p = 1/2), and doubling while p is within 3 standard errors
    of a decision level."""
    se = np.sqrt(np.maximum(p * (1 - p), 1.0 / (b + 1)) / b)
    want = np.where((se > 0.5 / np.sqrt(draws)) & (b < draws), np.minimum(b + CHUNK, draws), b)
    for a in levels:
        cap = _cap(a, rel_se)
        close = (np.abs(p - a) < 3 * se) & (b < cap)
        want = np.where(close, np.maximum(want, np.minimum(2 * b, cap)), want)
    return want


def _groups(keys: np.ndarray) -> list[np.ndarray]:
    """Positions of equal keys, one array per distinct key."""
    order = np.argsort(keys, kind="stable")
    return np.split(order, np.flatnonzero(np.diff(keys[order])) + 1) if keys.size else []


def _monte_carlo(t, lines, model_of, models, root, draws, levels, rel_se, adaptive):
    """Monte Carlo p for ``lines`` (indices); returns (p, se, B) arrays for those lines.

    Lines with the same null model share one reference sample, dropped after use.
    """
    b = np.full(len(lines), min(draws, CHUNK) if adaptive else draws, dtype=np.int64)
    p = np.empty(len(lines))
    for group in _groups(model_of[lines]):
        mo = models[model_of[lines[group[0]]]]
        ref = ReferenceSample(mo.sampler, root, mo.words)
        pending = group
        while pending.size:
            for size in np.unique(b[pending]):
                s = pending[b[pending] == size]
                p[s] = (1 + ref.count_ge(t[lines[s]], int(size))) / (1 + size)
            if not adaptive:
                break
            nxt = _next_draws(p[pending], b[pending], levels, rel_se, draws)
            grow = nxt > b[pending]
            b[pending] = nxt
            pending = pending[grow]
    se = np.sqrt(p * (1 - p) / b)
    return p, se, b


def _exact(t, lines, model_of, models):
    p = np.empty(len(lines))
    for group in _groups(model_of[lines]):
        enum = models[model_of[lines[group[0]]]].enumerate
        assert enum is not None
        values, probs = enum()
        p[group] = exact_tail(values, probs, t[lines[group]])
    return p


@dataclass(slots=True)
class _Work:
    """Lines that need an exact or Monte Carlo p-value, with their null models (internal)."""

    idx: np.ndarray
    model_of: np.ndarray
    models: list[Model]
    t: np.ndarray
    small: np.ndarray


def _prepare(idx, m, build, exact_limit) -> _Work:
    model_of = np.zeros(m, dtype=np.intp)
    model_of[idx], models, t_rank = build(idx)
    t = np.full(m, np.nan)
    t[idx] = t_rank
    fits = np.array([mo.enumerate is not None and mo.n_outcomes <= exact_limit
                     for mo in models], dtype=bool)
    small = np.zeros(m, dtype=bool)
    small[idx] = fits[model_of[idx]]
    return _Work(idx, model_of, models, t, small)


def _requested(out: Resolved, w: _Work, mode: str, draws: int, root: int) -> None:
    """Every line by the one method asked for ("exact" or "monte-carlo")."""
    idx = w.idx
    if mode == "exact":
        fits = np.array([mo.enumerate is not None and mo.n_outcomes <= EXACT_MAX
                         for mo in w.models], dtype=bool)
        too_big = idx[~fits[w.model_of[idx]]]
        if too_big.size:
            i = int(too_big[0])
            mo = w.models[w.model_of[i]]
            why = (f"needs {mo.n_outcomes} outcomes (limit {EXACT_MAX})" if mo.enumerate
                   else "is only available for one line or two-row tables")
            raise InvalidArgumentError(
                "pvalue", f"exact enumeration of line {i} {why}; use 'monte-carlo' or 'auto'")
        out.pvalue[idx] = _exact(w.t, idx, w.model_of, w.models)
        out.method[idx] = "exact"
        out.reason[idx] = "exact enumeration (requested)"
        return
    out.pvalue[idx], out.se[idx], out.draws[idx] = _monte_carlo(
        w.t, idx, w.model_of, w.models, root, draws, (), 1.0, adaptive=False)
    out.method[idx] = "monte-carlo"
    out.reason[idx] = f"Monte Carlo with {draws} draws (requested)"


def _auto(out: Resolved, w: _Work, why: np.ndarray, draws: int, root: int,
          levels: tuple[float, ...], rel_se: float) -> None:
    """Exact where the enumeration is small, else adaptive Monte Carlo."""
    small = w.small[w.idx]
    ex, mc = w.idx[small], w.idx[~small]
    if ex.size:
        out.pvalue[ex] = _exact(w.t, ex, w.model_of, w.models)
        out.method[ex] = "exact"
        out.reason[ex] = _reasons("exact enumeration: {}", why[small])
    if mc.size:
        out.pvalue[mc], out.se[mc], out.draws[mc] = _monte_carlo(
            w.t, mc, w.model_of, w.models, root, draws, levels, rel_se, adaptive=True)
        out.method[mc] = "monte-carlo"
        out.reason[mc] = _reasons("Monte Carlo, {1} draws: {0}", why[~small], out.draws[mc])


def resolve(
    t: np.ndarray,
    p_asym: np.ndarray,
    cochran: np.ndarray,
    testable: np.ndarray,
    build: Callable[[np.ndarray], tuple[np.ndarray, list[Model], np.ndarray]],
    *,
    mode: str,
    draws: int,
    root: int,
    levels: tuple[float, ...],
    exact_limit: int = EXACT_LIMIT,
    refine_factor: float = REFINE_FACTOR,
    rel_se: float = REFINE_REL_SE,
) -> Resolved:
    """Choose and compute the p-value of every testable line (see module docstring).

    ``t`` is the reported statistic. ``build(lines)`` returns (model index per line in
    ``lines``, models, ranking statistic per line); it is called only for the lines that need
    an exact or Monte Carlo p-value, which rank by that statistic.
    """
    m = t.shape[0]
    out = Resolved(np.where(testable, p_asym, np.nan), np.zeros(m), np.zeros(m, dtype=np.int64),
                   np.full(m, "asymptotic", dtype=object), np.full(m, "", dtype=object))
    idx = np.flatnonzero(testable)
    if mode == "asymptotic":
        out.reason[idx] = "asymptotic chi-square (requested)"
        return out
    if mode == "auto":
        settled = cochran[idx] & ~_near(p_asym[idx], levels, refine_factor)
        out.reason[idx[settled]] = ("asymptotic: Cochran's rule holds (all expected >= 1, at "
                                    "most 20% below 5) and p is not near a decision level")
        idx = idx[~settled]
    if idx.size == 0:
        return out
    work = _prepare(idx, m, build, exact_limit)
    if mode != "auto":
        _requested(out, work, mode, draws, root)
        return out
    why = np.where(cochran[idx], f"asymptotic p is within a factor {refine_factor:g} of a "
                   "decision level", "Cochran's rule fails (an expected count below 1 or "
                   "over 20% below 5)")
    _auto(out, work, why, draws, root, levels, rel_se)
    return out
