"""Sequential charts of a line's defect-category mix, vectorized over many lines.

One *chart set* watches ``m`` lines that share the number of categories ``k`` (lines with a
different ``k`` go in a chart set of their own). Per line it runs:

* **MEWMA** of the category proportions (Lowry, Woodall, Champ & Rigdon 1992, "A multivariate
  exponentially weighted moving average control chart", Technometrics 34(1)), adapted to
  multinomial shares with each shift's own total ``n_t``::

      Z_t = (1 - lam) Z_{t-1} + lam x_t / n_t,        Z_0 = p0
      v_t = (1 - lam)^2 v_{t-1} + lam^2 / n_t,         v_0 = 0
      Cov0(Z_t) = v_t (diag(p0) - p0 p0')              (exact, for any sequence n_1..n_t)
      Q_t = sum_j (Z_tj - p0_j)^2 / (p0_j v_t)

  ``Q_t`` is Lowry et al.'s quadratic form (Z - p0)' Cov0(Z_t)^- (Z - p0) with the
  generalized inverse diag(1/p0) of the multinomial covariance (the deviations sum to 0).
  With a constant ``n`` the recursion gives Lowry et al.'s exact covariance factor
  lam/(2-lam) [1 - (1-lam)^(2t)] / n; varying ``n_t`` is handled by the recursion, so
  ``Q_t`` is approximately chi-square(k-1) in control at every ``t``. ``Q_1`` is the Pearson
  X^2 of the first shift.
* **LLR CUSUMs** for configured *shifts of concern* ``p1`` (Page 1954, "Continuous inspection
  schemes", Biometrika 41; multinomial form as in Ryan, Wells & Woodall 2011, JQT, from
  memory)::

      W_t = sum_j x_tj ln(p1_j / p0_j),   S_t = max(0, S_{t-1} + W_t)

  ``W_t`` is the log-likelihood ratio of the shift's counts, so varying ``n_t`` needs no
  change.
* a **bank of directional CUSUMs**, one per ordered pair (a, b): share ``delta`` moves from
  category a to b, sized so that Cohen's w of the move is ``bank_w``
  (``delta = w / sqrt(1/p0_a + 1/p0_b)``, capped at p0_a / 2). Its increment
  ``x_a ln(p1_a/p0_a) + x_b ln(p1_b/p0_b)`` reads two counts, so each pair costs O(1) and the
  bank O(k(k-1)) = O(k^2) per line per shift. The MEWMA and each concern CUSUM cost O(k).

A shift with no defects (``n_t = 0``) carries no information: the MEWMA keeps its value and
the CUSUM increments are 0.

State is a frozen :class:`SequentialState` of read-only arrays; :func:`state_to_json` and
:func:`state_from_json` turn it into one plain dict per line (lists of Python floats and
ints) and back, bit for bit, so a restart resumes exactly.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from qcfit.errors import InvalidArgumentError

STATE_FORMAT = 1
DEFAULT_EWMA_LAMBDA = 0.2
DEFAULT_BANK_W = 0.1
DEFAULT_ARL0 = 370.0
#: share of the statistic the named driver categories must cover (common practice, no source)
DRIVER_COVERAGE = 0.75
MAX_DRIVERS = 4


def _ro(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------------------------- design


@dataclass(frozen=True, slots=True)
class Concern:
    """A named shift of concern: the out-of-control mix ``p1`` (shape (k,) or (m, k))."""

    name: str
    p1: np.ndarray


def concern_share_up(p0: np.ndarray, category: int, factor: float, name: str = "") -> Concern:
    """Category ``category`` share times ``factor``; the other shares scaled to sum to 1.

    p1_c = r p0_c,  p1_j = p0_j (1 - r p0_c) / (1 - p0_c) for j != c.  p0 shape (k,) or (m, k).
    """
    p0 = np.asarray(p0, dtype=float)
    k = p0.shape[-1]
    if not 0 <= category < k:
        raise InvalidArgumentError("category", f"must be in 0..{k - 1}, got {category}")
    pc = p0[..., category : category + 1]
    if factor <= 0 or np.any(factor * pc >= 1):
        raise InvalidArgumentError("factor", f"{factor} makes category {category} share >= 1")
    p1 = p0 * (1 - factor * pc) / (1 - pc)
    p1[..., category] = factor * p0[..., category]
    return Concern(name or f"cat{category} x{factor:g}", p1)


def move_size(p0: np.ndarray, src: int, dst: int, w: float) -> np.ndarray:
    """Share moved from ``src`` to ``dst`` so that Cohen's w of the move is ``w``.

    w^2 = delta^2 / p0_src + delta^2 / p0_dst (Cohen 1988, w = sqrt(sum (p1-p0)^2/p0));
    capped at p0_src / 2 so that p1 stays positive.
    """
    p0 = np.asarray(p0, dtype=float)
    a, b = p0[..., src], p0[..., dst]
    return np.minimum(w / np.sqrt(1 / a + 1 / b), a / 2)


def concern_move(p0: np.ndarray, src: int, dst: int, w: float, name: str = "") -> Concern:
    """Share moves from category ``src`` to ``dst`` with Cohen's w = ``w``."""
    p0 = np.asarray(p0, dtype=float)
    k = p0.shape[-1]
    if src == dst or not (0 <= src < k and 0 <= dst < k):
        raise InvalidArgumentError("src/dst", f"need two different categories in 0..{k - 1}")
    d = move_size(p0, src, dst, w)
    p1 = p0.copy()
    p1[..., src] -= d
    p1[..., dst] += d
    return Concern(name or f"cat{src}->cat{dst} w{w:g}", p1)


def all_pairs(k: int) -> np.ndarray:
    """Every ordered pair (from, to) of ``k`` categories, shape (k(k-1), 2)."""
    a, b = np.meshgrid(np.arange(k), np.arange(k), indexing="ij")
    keep = a != b
    return np.stack([a[keep], b[keep]], axis=1)


@dataclass(frozen=True, slots=True)
class SequentialDesign:
    """Chart set for ``m`` lines with ``k`` categories (arrays read-only).

    ``p0`` (m, k) baseline shares; ``ewma_lambda`` 0 disables the MEWMA;
    ``concern_weights`` (m, c, k) = ln(p1/p0); ``bank_pairs`` (D, 2) (from, to) with
    ``bank_weights`` (m, D, 2) = ln(p1/p0) of the from and to categories (D = 0: no bank).
    """

    p0: np.ndarray
    ewma_lambda: float
    concern_names: tuple[str, ...]
    concern_p1: np.ndarray
    concern_weights: np.ndarray
    bank_w: float
    bank_pairs: np.ndarray
    bank_weights: np.ndarray

    @property
    def m(self) -> int:
        return int(self.p0.shape[0])

    @property
    def k(self) -> int:
        return int(self.p0.shape[1])

    @property
    def c(self) -> int:
        return len(self.concern_names)

    @property
    def d(self) -> int:
        return int(self.bank_pairs.shape[0])

    def select(self, lines: Sequence[int] | np.ndarray) -> SequentialDesign:
        """The same chart set restricted to some lines (for per-line work)."""
        idx = np.asarray(lines, dtype=int)
        return SequentialDesign(
            p0=_ro(self.p0[idx]), ewma_lambda=self.ewma_lambda,
            concern_names=self.concern_names, concern_p1=_ro(self.concern_p1[idx]),
            concern_weights=_ro(self.concern_weights[idx]), bank_w=self.bank_w,
            bank_pairs=self.bank_pairs, bank_weights=_ro(self.bank_weights[idx]),
        )


def stack_designs(designs: Sequence[SequentialDesign]) -> SequentialDesign:
    """The chart sets of ``designs`` as one chart set over all their lines, in order.

    Every design must have the same ``k``, MEWMA lambda, concern names, bank pairs and
    bank_w (InvalidArgumentError otherwise); a line's charts in the stacked set are exactly
    its charts in its own design (``stack_designs(ds).select([i])`` equals ``ds[i]`` for
    single-line designs).
    """
    if not designs:
        raise InvalidArgumentError("designs", "no chart sets to stack")
    first = designs[0]
    for i, d in enumerate(designs[1:], 1):
        if (d.k != first.k or d.ewma_lambda != first.ewma_lambda or d.bank_w != first.bank_w
                or d.concern_names != first.concern_names
                or not np.array_equal(d.bank_pairs, first.bank_pairs)):
            raise InvalidArgumentError(f"designs[{i}]", "differs from designs[0] in k, lambda, "
                                       "concerns or bank")
    if len(designs) == 1:
        return first

    def cat(name: str) -> np.ndarray:
        return _ro(np.concatenate([getattr(d, name) for d in designs]))

    return SequentialDesign(
        p0=cat("p0"), ewma_lambda=first.ewma_lambda, concern_names=first.concern_names,
        concern_p1=cat("concern_p1"), concern_weights=cat("concern_weights"),
        bank_w=first.bank_w, bank_pairs=first.bank_pairs, bank_weights=cat("bank_weights"),
    )


def _check_p0(p0: Any) -> np.ndarray:
    p = np.array(p0, dtype=float)
    if p.ndim == 1:
        p = p[None, :]
    if p.ndim != 2 or p.shape[1] < 2:
        raise InvalidArgumentError("p0", f"needs shape (lines, categories>=2), got {p.shape}")
    if not np.all(np.isfinite(p)) or np.any(p <= 0):
        bad = np.argwhere(~(p > 0))
        raise InvalidArgumentError("p0", f"every baseline share must be > 0; bad at {bad[:3].tolist()}")
    s = p.sum(axis=1)
    if np.any(np.abs(s - 1) > 1e-6):
        raise InvalidArgumentError("p0", f"rows must sum to 1; line {int(np.argmax(np.abs(s - 1)))}")
    return p / s[:, None]


def make_design(
    p0: Any,
    *,
    ewma_lambda: float = DEFAULT_EWMA_LAMBDA,
    concerns: Sequence[Concern] = (),
    bank: bool = True,
    bank_w: float = DEFAULT_BANK_W,
    bank_pairs: Any = None,
) -> SequentialDesign:
    """Build a chart set. Default: MEWMA (lam 0.2) beside the all-pairs directional bank.

    The default is the best of the charts compared in bench/arl_table.md (steady state).

    ``p0`` (k,) or (m, k) with every share > 0. ``concerns`` add tuned LLR CUSUMs.
    ``bank_pairs`` (D, 2) overrides the default every-ordered-pair bank.
    """
    p = _check_p0(p0)
    m, k = p.shape
    if not 0 <= ewma_lambda <= 1:
        raise InvalidArgumentError("ewma_lambda", f"must be in (0, 1] or 0 to disable, got {ewma_lambda}")
    names, p1s = [], []
    for i, cn in enumerate(concerns):
        p1 = np.broadcast_to(np.asarray(cn.p1, dtype=float), (m, k))
        if np.any(p1 <= 0) or np.any(np.abs(p1.sum(axis=1) - 1) > 1e-6):
            raise InvalidArgumentError(f"concerns[{i}].p1", "shares must be > 0 and sum to 1")
        names.append(cn.name or f"concern{i}")
        p1s.append(p1 / p1.sum(axis=1, keepdims=True))
    c_p1 = np.stack(p1s, axis=1) if p1s else np.ones((m, 0, k))
    c_w = np.log(c_p1 / p[:, None, :])
    if bank:
        pairs = all_pairs(k) if bank_pairs is None else np.asarray(bank_pairs, dtype=int)
        if pairs.ndim != 2 or pairs.shape[1] != 2 or np.any(pairs < 0) or np.any(pairs >= k) \
                or np.any(pairs[:, 0] == pairs[:, 1]):
            raise InvalidArgumentError("bank_pairs", f"need (D, 2) pairs of different categories in 0..{k - 1}")
        if bank_w <= 0:
            raise InvalidArgumentError("bank_w", f"must be > 0, got {bank_w}")
        pa, pb = p[:, pairs[:, 0]], p[:, pairs[:, 1]]
        delta = np.minimum(bank_w / np.sqrt(1 / pa + 1 / pb), pa / 2)
        b_w = np.stack([np.log1p(-delta / pa), np.log1p(delta / pb)], axis=2)
    else:
        pairs = np.zeros((0, 2), dtype=int)
        b_w = np.zeros((m, 0, 2))
    return SequentialDesign(
        p0=_ro(p), ewma_lambda=float(ewma_lambda), concern_names=tuple(names),
        concern_p1=_ro(c_p1), concern_weights=_ro(c_w), bank_w=float(bank_w),
        bank_pairs=_ro(pairs), bank_weights=_ro(b_w),
    )


@dataclass(frozen=True, slots=True)
class SequentialLimits:
    """Control limits: ``ewma`` (m,), ``concerns`` (m, c), ``bank`` (m,); inf = never signal."""

    ewma: np.ndarray
    concerns: np.ndarray
    bank: np.ndarray

    def to_json(self) -> dict[str, list]:
        def enc(a: np.ndarray) -> list:
            return np.where(np.isfinite(a), a, -1.0).tolist()  # -1 encodes "off" (inf)

        return {"ewma": enc(self.ewma), "concerns": enc(self.concerns), "bank": enc(self.bank)}

    @staticmethod
    def from_json(obj: Mapping[str, Any]) -> SequentialLimits:
        def dec(v: Any) -> np.ndarray:
            a = np.array(v, dtype=float)
            return _ro(np.where(a < 0, np.inf, a))

        return SequentialLimits(dec(obj["ewma"]), dec(obj["concerns"]), dec(obj["bank"]))


def stack_limits(limits: Sequence[SequentialLimits]) -> SequentialLimits:
    """Limits of several chart sets (same number of concerns) stacked along the line axis."""
    if not limits:
        raise InvalidArgumentError("limits", "no limits to stack")
    if len(limits) == 1:
        return limits[0]
    return SequentialLimits(
        ewma=_ro(np.concatenate([lim.ewma for lim in limits])),
        concerns=_ro(np.concatenate([lim.concerns for lim in limits])),
        bank=_ro(np.concatenate([lim.bank for lim in limits])),
    )


def make_limits(design: SequentialDesign, *, ewma: Any = np.inf, concerns: Any = np.inf,
                bank: Any = np.inf) -> SequentialLimits:
    """Limits broadcast to the design's shapes (scalars or arrays)."""
    m, c = design.m, design.c
    return SequentialLimits(
        ewma=_ro(np.broadcast_to(np.asarray(ewma, float), (m,)).copy()),
        concerns=_ro(np.broadcast_to(np.asarray(concerns, float), (m, c)).copy()),
        bank=_ro(np.broadcast_to(np.asarray(bank, float), (m,)).copy()),
    )


# ----------------------------------------------------------------------------------- state


@dataclass(frozen=True, slots=True)
class SequentialState:
    """Chart values of ``m`` lines after ``t`` shifts (arrays read-only).

    ``t`` (m,) shifts seen since the last reset; ``ewma_z`` (m, k); ``ewma_v`` (m,) variance
    factor; ``ewma_calm`` (m,) last ``t`` with Q_t <= k-1 (its in-control mean);
    ``cusum_s`` (m, c); ``cusum_zero`` (m, c) last ``t`` with S = 0; ``cusum_counts`` (m, c, k)
    counts since that zero; ``bank_s`` (m, D); ``bank_zero`` (m, D);
    ``bank_counts`` (m, D, 3) = (from-category, to-category, all defects) since the last zero.
    """

    t: np.ndarray
    ewma_z: np.ndarray
    ewma_v: np.ndarray
    ewma_calm: np.ndarray
    cusum_s: np.ndarray
    cusum_zero: np.ndarray
    cusum_counts: np.ndarray
    bank_s: np.ndarray
    bank_zero: np.ndarray
    bank_counts: np.ndarray


_INT_FIELDS = ("t", "ewma_calm", "cusum_zero", "bank_zero")


def init_state(design: SequentialDesign) -> SequentialState:
    """Every chart at its start value: Z = p0, v = 0, S = 0, t = 0."""
    m, k, c, d = design.m, design.k, design.c, design.d
    zi = np.zeros
    return SequentialState(
        t=_ro(zi(m, dtype=np.int64)), ewma_z=_ro(design.p0.copy()), ewma_v=_ro(zi(m)),
        ewma_calm=_ro(zi(m, dtype=np.int64)), cusum_s=_ro(zi((m, c))),
        cusum_zero=_ro(zi((m, c), dtype=np.int64)), cusum_counts=_ro(zi((m, c, k))),
        bank_s=_ro(zi((m, d))), bank_zero=_ro(zi((m, d), dtype=np.int64)),
        bank_counts=_ro(zi((m, d, 3))),
    )


def reset_lines(state: SequentialState, design: SequentialDesign,
                lines: Sequence[int] | np.ndarray) -> SequentialState:
    """Restart the charts of some lines; the other lines keep their values.

    Use on a baseline change (pass the design built on the new baseline) and on an
    acknowledgement with "cause removed" (same design). Restarted lines get t = 0. The design
    must keep the lines, k and the chart list; a line whose k changes joins another chart set
    with :func:`init_state`.
    """
    idx = np.asarray(lines, dtype=int).reshape(-1)
    if idx.size and (idx.min() < 0 or idx.max() >= design.m):
        raise InvalidArgumentError("lines", f"line index out of 0..{design.m - 1}")
    _check_state(state, design)
    fresh = init_state(design)
    out = {}
    for f in fields(SequentialState):
        a = np.array(getattr(state, f.name))
        a[idx] = getattr(fresh, f.name)[idx]
        out[f.name] = _ro(a)
    return SequentialState(**out)


def stack_states(parts: Sequence[tuple[SequentialState, int]]) -> SequentialState:
    """One state whose line ``i`` is line ``parts[i][1]`` of state ``parts[i][0]`` (exact
    copies of the values; runs of consecutive lines of one state are taken as one slice, and
    a single run covering a whole state returns that state)."""
    if not parts:
        raise InvalidArgumentError("parts", "no lines")
    runs: list[tuple[SequentialState, int, int]] = []
    for st, i in parts:
        if runs and runs[-1][0] is st and runs[-1][2] == i:
            runs[-1] = (st, runs[-1][1], i + 1)
        else:
            runs.append((st, i, i + 1))
    if len(runs) == 1:
        st, a, b = runs[0]
        if a == 0 and b == st.t.shape[0]:
            return st
    out = {}
    for f in fields(SequentialState):
        pieces = [getattr(st, f.name)[a:b] for st, a, b in runs]
        out[f.name] = _ro(pieces[0].copy() if len(pieces) == 1 else np.concatenate(pieces))
    return SequentialState(**out)


def state_to_json(state: SequentialState) -> list[dict[str, Any]]:
    """One plain dict per line (JSON-able lists); exact round trip with state_from_json."""
    m = state.t.shape[0]
    rows = []
    for i in range(m):
        row: dict[str, Any] = {"format": STATE_FORMAT}
        for f in fields(SequentialState):
            row[f.name] = getattr(state, f.name)[i].tolist()
        rows.append(row)
    return rows


def state_from_json(rows: Sequence[Mapping[str, Any]]) -> SequentialState:
    """Stack per-line dicts (from :func:`state_to_json`, possibly via json) into a state."""
    if not rows:
        raise InvalidArgumentError("state", "no lines")
    out = {}
    for f in fields(SequentialState):
        try:
            vals = [r[f.name] for r in rows]
        except KeyError as exc:
            raise InvalidArgumentError("state", f"missing field {exc.args[0]!r}") from exc
        dtype = np.int64 if f.name in _INT_FIELDS else float
        try:
            out[f.name] = _ro(np.array(vals, dtype=dtype))
        except ValueError as exc:
            raise InvalidArgumentError("state", f"field {f.name!r} has ragged or bad values") from exc
    for r in rows:
        if r.get("format") != STATE_FORMAT:
            raise InvalidArgumentError("state", f"unknown state format {r.get('format')!r}")
    m = out["t"].shape[0]
    try:  # empty chart groups (no concerns, no bank) come back from JSON as (m, 0)
        k = out["ewma_z"].shape[1]
        c, d = out["cusum_s"].reshape(m, -1).shape[1], out["bank_s"].reshape(m, -1).shape[1]
        for name, shape in (("cusum_s", (m, c)), ("cusum_zero", (m, c)),
                            ("cusum_counts", (m, c, k)), ("bank_s", (m, d)),
                            ("bank_zero", (m, d)), ("bank_counts", (m, d, 3))):
            out[name] = _ro(out[name].reshape(shape))
    except (ValueError, IndexError) as exc:
        raise InvalidArgumentError("state", "inconsistent array shapes between fields") from exc
    if out["ewma_z"].ndim != 2 or any(out[n].shape != (m,) for n in ("t", "ewma_v", "ewma_calm")):
        raise InvalidArgumentError("state", "inconsistent array shapes between fields")
    return SequentialState(**out)


def _check_state(state: SequentialState, design: SequentialDesign) -> None:
    m, k, c, d = design.m, design.k, design.c, design.d
    want = {"t": (m,), "ewma_z": (m, k), "ewma_v": (m,), "ewma_calm": (m,), "cusum_s": (m, c),
            "cusum_zero": (m, c), "cusum_counts": (m, c, k), "bank_s": (m, d),
            "bank_zero": (m, d), "bank_counts": (m, d, 3)}
    for name, shape in want.items():
        got = getattr(state, name).shape
        if got != shape and not (0 in shape and np.prod(got) == 0):
            raise InvalidArgumentError("state", f"{name} has shape {got}, the design needs {shape}")


def _check_counts(counts: Any, design: SequentialDesign) -> np.ndarray:
    x = np.asarray(counts, dtype=float)
    if x.shape != (design.m, design.k):
        raise InvalidArgumentError("counts", f"needs shape {(design.m, design.k)}, got {x.shape}")
    bad = ~np.isfinite(x) | (x < 0) | (x != np.round(x))
    if np.any(bad):
        i, j = np.argwhere(bad)[0]
        raise InvalidArgumentError("counts", f"not a count (>= 0, whole) at [{i}, {j}]: {x[i, j]}")
    return x


# ---------------------------------------------------------------------------------- update


@dataclass(frozen=True, slots=True)
class SequentialStep:
    """Statistics and signals of one shift for ``m`` lines (arrays read-only).

    ``ewma_stat`` (m,) Q_t; ``ewma_contrib`` (m, k) per-category terms of Q_t;
    ``ewma_start`` (m,) estimated first shift (t index) of the change;
    ``concern_stat``/``concern_start`` (m, c); ``bank_stat`` (m,) max over the bank,
    ``bank_top`` (m,) index of that pair, ``bank_start`` (m,) its last zero + 1;
    ``*_signal`` booleans; ``signal`` (m,) any chart signalled; ``t`` (m,) this shift's index.
    """

    t: np.ndarray
    ewma_stat: np.ndarray
    ewma_contrib: np.ndarray
    ewma_start: np.ndarray
    ewma_signal: np.ndarray
    concern_stat: np.ndarray
    concern_start: np.ndarray
    concern_signal: np.ndarray
    bank_stat: np.ndarray
    bank_top: np.ndarray
    bank_start: np.ndarray
    bank_signal: np.ndarray
    signal: np.ndarray


def _ewma_step(design, state, x, n, t1):
    lam, p0 = design.ewma_lambda, design.p0
    has = n > 0
    safe_n = np.where(has, n, 1.0)
    if lam > 0:
        z = np.where(has[:, None], (1 - lam) * state.ewma_z + lam * x / safe_n[:, None], state.ewma_z)
        v = np.where(has, (1 - lam) ** 2 * state.ewma_v + lam**2 / safe_n, state.ewma_v)
        contrib = (z - p0) ** 2 / p0 / np.where(v > 0, v, 1.0)[:, None]
        contrib = np.where((v > 0)[:, None], contrib, 0.0)
    else:
        z, v, contrib = state.ewma_z, state.ewma_v, np.zeros_like(p0)
    q = contrib.sum(axis=1)
    calm = np.where(q <= design.k - 1, t1, state.ewma_calm)
    return z, v, calm, q, contrib


def _cusum_step(s_old, zero_old, cnt_old, inc, add, t1):
    s = np.maximum(0.0, s_old + inc)
    at0 = s == 0
    zero = np.where(at0, t1[:, None], zero_old)
    cnt = np.where(at0[..., None], 0.0, cnt_old + add)
    return s, zero, cnt


def update(state: SequentialState, counts: Any, design: SequentialDesign,
           limits: SequentialLimits) -> tuple[SequentialState, SequentialStep]:
    """Advance every chart of every line by one shift; counts (m, k) defects per category.

    Cost per line: O(k) for the MEWMA and each concern CUSUM, O(k(k-1)) for the bank.
    """
    _check_state(state, design)
    x = _check_counts(counts, design)
    n = x.sum(axis=1)
    t1 = state.t + 1
    z, v, calm, q, contrib = _ewma_step(design, state, x, n, t1)
    inc_c = np.einsum("mk,mck->mc", x, design.concern_weights)
    cs, cz, cc = _cusum_step(state.cusum_s, state.cusum_zero, state.cusum_counts, inc_c,
                             x[:, None, :], t1)
    pairs = design.bank_pairs
    xa, xb = x[:, pairs[:, 0]], x[:, pairs[:, 1]]
    inc_b = xa * design.bank_weights[:, :, 0] + xb * design.bank_weights[:, :, 1]
    add_b = np.stack([xa, xb, np.broadcast_to(n[:, None], xa.shape)], axis=2)
    bs, bz, bc = _cusum_step(state.bank_s, state.bank_zero, state.bank_counts, inc_b, add_b, t1)
    new = SequentialState(t=_ro(t1), ewma_z=_ro(z), ewma_v=_ro(v), ewma_calm=_ro(calm),
                          cusum_s=_ro(cs), cusum_zero=_ro(cz), cusum_counts=_ro(cc),
                          bank_s=_ro(bs), bank_zero=_ro(bz), bank_counts=_ro(bc))
    return new, _step(design, limits, new, q, contrib)


def _step(design, limits, st, q, contrib) -> SequentialStep:
    m = design.m
    if design.d:
        top = np.argmax(st.bank_s, axis=1)
        bstat = st.bank_s[np.arange(m), top]
        bstart = st.bank_zero[np.arange(m), top] + 1
    else:
        top = np.zeros(m, dtype=np.int64)
        bstat = np.zeros(m)
        bstart = st.t.copy()
    e_sig = (q >= limits.ewma) & (design.ewma_lambda > 0)
    c_sig = st.cusum_s >= limits.concerns
    b_sig = (bstat >= limits.bank) & (design.d > 0)
    return SequentialStep(
        t=_ro(st.t.copy()), ewma_stat=_ro(q), ewma_contrib=_ro(contrib),
        ewma_start=_ro(np.minimum(st.ewma_calm + 1, st.t)), ewma_signal=_ro(e_sig),
        concern_stat=_ro(st.cusum_s.copy()), concern_start=_ro(st.cusum_zero + 1),
        concern_signal=_ro(c_sig), bank_stat=_ro(bstat), bank_top=_ro(top),
        bank_start=_ro(bstart), bank_signal=_ro(b_sig),
        signal=_ro(e_sig | c_sig.any(axis=1) | b_sig),
    )


def run(design: SequentialDesign, limits: SequentialLimits, counts: Any,
        state: SequentialState | None = None) -> tuple[SequentialState, list[SequentialStep]]:
    """Apply :func:`update` to counts of shape (T, m, k), shift by shift."""
    st = init_state(design) if state is None else state
    steps = []
    for x in np.asarray(counts):
        st, s = update(st, x, design, limits)
        steps.append(s)
    return st, steps


# ------------------------------------------------------------------------------ attribution


@dataclass(frozen=True, slots=True)
class CategoryMove:
    """A category that drives a statistic: its share in the baseline and as now estimated.

    ``direction`` is "up" or "down"; ``contribution`` is its part of the statistic (MEWMA: its
    term of Q; CUSUM: (C_j - N p0_j) ln(p1_j/p0_j) over the run since the last zero).
    """

    category: int
    direction: str
    baseline_share: float
    estimated_share: float
    contribution: float


@dataclass(frozen=True, slots=True)
class SignalReport:
    """One chart signal on one line, ready for the alarm log.

    ``chart`` is "ewma", "concern" or "bank"; ``name`` the concern name or the bank pair
    ("cat1->cat4"); ``start`` the t index of the shift where the change most likely began and
    ``shifts_back`` = t - start (0: it began this shift); ``defects_since_start`` the defects
    counted from ``start`` on (CUSUMs; -1 for the MEWMA).
    """

    line: int
    t: int
    chart: str
    name: str
    statistic: float
    limit: float
    start: int
    shifts_back: int
    defects_since_start: int
    drivers: tuple[CategoryMove, ...]


def _pick(moves: list[CategoryMove]) -> tuple[CategoryMove, ...]:
    moves = sorted(moves, key=lambda mv: -mv.contribution)
    total = sum(max(mv.contribution, 0.0) for mv in moves)
    out, acc = [], 0.0
    for mv in moves:
        if mv.contribution <= 0 or len(out) >= MAX_DRIVERS:
            break
        out.append(mv)
        acc += mv.contribution
        if acc >= DRIVER_COVERAGE * total:
            break
    return tuple(out or moves[:1])


def _move(j: int, p0j: float, est: float, contribution: float) -> CategoryMove:
    return CategoryMove(int(j), "up" if est >= p0j else "down", float(p0j), float(est),
                        float(contribution))


def _cusum_moves(p0, w, cnt, cats, n_since: float) -> tuple[tuple[CategoryMove, ...], int]:
    moves = []
    for pos, j in enumerate(cats):
        c = float(cnt[pos])
        est = c / n_since if n_since > 0 else float(p0[j])
        moves.append(_move(j, p0[j], est, (c - n_since * p0[j]) * w[pos]))
    return _pick(moves), int(round(n_since))


def signal_reports(step: SequentialStep, state: SequentialState, design: SequentialDesign,
                   limits: SequentialLimits) -> list[SignalReport]:
    """Describe every signal of ``step`` (``state`` is the state returned with it)."""
    out: list[SignalReport] = []
    p0 = design.p0
    for i in np.flatnonzero(step.signal):
        t = int(step.t[i])
        if step.ewma_signal[i]:
            moves = [_move(j, p0[i, j], state.ewma_z[i, j], step.ewma_contrib[i, j])
                     for j in range(design.k)]
            start = int(step.ewma_start[i])
            out.append(SignalReport(int(i), t, "ewma", f"lambda {design.ewma_lambda:g}",
                                    float(step.ewma_stat[i]), float(limits.ewma[i]), start,
                                    t - start, -1, _pick(moves)))
        for c in np.flatnonzero(step.concern_signal[i]):
            drivers, nd = _cusum_moves(p0[i], design.concern_weights[i, c],
                                       state.cusum_counts[i, c], list(range(design.k)),
                                       float(state.cusum_counts[i, c].sum()))
            start = int(step.concern_start[i, c])
            out.append(SignalReport(int(i), t, "concern", design.concern_names[c],
                                    float(step.concern_stat[i, c]), float(limits.concerns[i, c]),
                                    start, t - start, nd, drivers))
        if step.bank_signal[i]:
            d = int(step.bank_top[i])
            a, b = (int(v) for v in design.bank_pairs[d])
            drivers, nd = _cusum_moves(p0[i], design.bank_weights[i, d],
                                       state.bank_counts[i, d], [a, b],
                                       float(state.bank_counts[i, d, 2]))
            start = int(step.bank_start[i])
            out.append(SignalReport(int(i), t, "bank", f"cat{a}->cat{b}",
                                    float(step.bank_stat[i]), float(limits.bank[i]), start,
                                    t - start, nd, drivers))
    return out
