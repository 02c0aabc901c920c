"""Findings and their parts: kinds, verdicts, :class:`Finding`, :class:`CategoryShift`,
seeds, power, the categories that drive a departure."""

from __future__ import annotations

import dataclasses
import hashlib
import logging
import math
import operator
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special
from scipy import stats as sps

from qcfit import stats as qstats
from qcfit.model import BaselineRef
from qcfit.slotinit import direct_slot_init

log = logging.getLogger(__name__)


KIND_BASELINE = "baseline"
KIND_BETWEEN = "between-lines"
KIND_VS_REST = "line-vs-rest"
KIND_RATE = "rate"
KIND_SEQUENTIAL = "sequential"

# Verdicts this stage gives (the policy adds in-control / watch / alarm).
TESTED = "tested"
TOO_LITTLE_DATA = "too-little-data"
NOT_TESTED = "not-tested"
IMPOSSIBLE = "impossible-category"
NO_BASELINE = "no-baseline"
UNKNOWN_CATEGORY = "category-not-in-baseline"
FAULT = "fault"
TESTABLE = frozenset({TESTED, TOO_LITTLE_DATA})

TOP_CATEGORIES = 3
# |adjusted residual| worth naming: common practice, no source (about the two-sided 5% normal
# quantile, as in Agresti 2007, sec. 2.4.5, who reads |r| > 2 or 3 as a lack of fit).
RESIDUAL_WORTH_NAMING = 2.0


@direct_slot_init
@dataclass(frozen=True, slots=True)
class CategoryShift:
    """One category's departure: direction "up"/"down", the adjusted (Haberman) residual,
    observed count and share vs the reference share (baseline, or the pooled rest)."""

    code: str
    direction: str
    adjusted_residual: float
    observed: int
    expected: float
    share: float
    reference_share: float

    @property
    def ratio(self) -> float:
        """Observed share / reference share (inf when the reference share is 0)."""
        if self.reference_share <= 0:
            return math.inf
        return self.share / self.reference_share

    def as_json(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "direction": self.direction,
            "adjusted_residual": (round(self.adjusted_residual, 4)
                                  if math.isfinite(self.adjusted_residual) else None),
            "observed": self.observed,
            "expected": round(self.expected, 4),
            "share": round(self.share, 6),
            "reference_share": round(self.reference_share, 6),
        }


@direct_slot_init
@dataclass(frozen=True, slots=True)
class Finding:
    """One test of one shift (or why no test was run).

    ``effect_floor`` is the smallest effect that matters for this test (w, V or rate ratio);
    ``alarm_level`` / ``watch_level`` are the levels on the adjusted p-value for this test
    (per-baseline overrides already applied). ``adjusted_pvalue`` and ``severity`` are filled
    by the policy.
    """

    kind: str
    line: str | None
    verdict: str
    reason: str
    baseline_version_id: int | None = None
    statistic: float | None = None
    dof: int | None = None
    pvalue: float | None = None
    effect_size: float | None = None
    effect_name: str | None = None
    effect_floor: float | None = None
    alarm_level: float = 0.01
    watch_level: float = 0.05
    power: float | None = None
    power_needed: float | None = None
    method: str | None = None
    method_reason: str | None = None
    mc_se: float | None = None
    n: int | None = None
    min_expected: float | None = None
    top_categories: tuple[CategoryShift, ...] = ()
    categories: tuple[str, ...] = ()
    observed: tuple[float, ...] = ()
    expected: tuple[float, ...] = ()
    adjusted_residuals: tuple[float, ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)
    adjusted_pvalue: float | None = None
    severity: str | None = None

    @property
    def testable(self) -> bool:
        """True when the finding carries a p-value that takes part in the decision."""
        return self.verdict in TESTABLE and self.pvalue is not None

    def __reduce__(self) -> tuple[Any, tuple[Any, ...]]:
        # pickled as its constructor's arguments: about 5x faster to load than the
        # dataclass's field-by-field state (findings go between processes in a backfill)
        return (Finding, _finding_values(self))


_FINDING_FIELDS = tuple(f.name for f in dataclasses.fields(Finding))
_finding_values = operator.attrgetter(*_FINDING_FIELDS)
_COPIERS: dict[tuple[str, ...], Callable[..., Finding]] = {}


def with_values(f: Finding, **changes: Any) -> Finding:
    """``dataclasses.replace(f, **changes)`` for a :class:`Finding`, without its per-call field
    inspection (the policy copies every finding of a shift): one copying function per set of
    changed names, written once, passes the other fields straight through."""
    names = tuple(changes)
    copy = _COPIERS.get(names)
    if copy is None:
        copy = _COPIERS[names] = _copier(names)
    return copy(f, *changes.values())


def _copier(names: tuple[str, ...]) -> Callable[..., Finding]:
    unknown = sorted(set(names) - set(_FINDING_FIELDS))
    if unknown:
        raise TypeError(f"Finding has no field {', '.join(unknown)}")
    given = {name: f"v{i}" for i, name in enumerate(names)}
    args = ", ".join(given.get(name, f"f.{name}") for name in _FINDING_FIELDS)
    source = f"def copy(f, {', '.join(given.values())}):\n    return Finding({args})\n"
    scope: dict[str, Any] = {"Finding": Finding}
    exec(source, scope)  # noqa: S102 - generated from Finding's own field list
    return scope["copy"]


# ---------------------------------------------------------------------------------------
# seeds and thresholds


def derive_seed(base: int, *parts: object) -> int:
    """A non-negative 63-bit seed from a base seed and labels (sha256; stable across runs)."""
    text = ":".join([str(int(base))] + [str(p) for p in parts])
    return int.from_bytes(hashlib.sha256(text.encode("utf-8")).digest()[:8], "big") >> 1


def thresholds_for(thresholds: Any, baseline: BaselineRef | None) -> Any:
    """The thresholds with this baseline's overrides applied (unknown keys are ignored)."""
    if baseline is None or not baseline.thresholds:
        return thresholds
    names = {f.name for f in dataclasses.fields(thresholds)}
    overrides = {k: v for k, v in baseline.thresholds if k in names}
    if not overrides:
        return thresholds
    current = {k: getattr(thresholds, k) for k in overrides}
    typed = {k: type(current[k])(v) if isinstance(current[k], int | float) else v for k, v in overrides.items()}
    return dataclasses.replace(thresholds, **typed)


# ---------------------------------------------------------------------------------------
# power


def chisq_power(w: float, dof: int, n: int, alpha: float) -> float:
    """Noncentral chi-square power (Cohen 1988, ch. 7): P(chi2(dof, n w^2) > chi2_{1-alpha})."""
    if dof < 1 or n < 1:
        return 0.0
    return float(qstats.chisq_power(w, dof, n, alpha))


def chisq_powers(w: Any, dof: Any, n: Any, alpha: Any) -> np.ndarray:
    """:func:`chisq_power` for arrays (one scipy call; 0 where dof < 1 or n < 1)."""
    w, dof, n, alpha = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (w, dof, n, alpha)))
    ok = (dof >= 1) & (n >= 1)
    d = np.where(ok, dof, 1.0)
    if ((alpha > 0) & (alpha < 1)).all() and np.isfinite(d).all():
        crit = special.chdtri(d, alpha)  # = scipy.stats.chi2.isf(alpha, d), minus its overhead
    else:
        crit = sps.chi2.isf(alpha, d)
    return np.where(ok, sps.ncx2.sf(crit, d, np.where(ok, n, 1.0) * w * w), 0.0)


def poisson_powers(mu0: Any, ratio: Any, alpha: Any) -> np.ndarray:
    """:func:`poisson_power` for arrays."""
    mu0, ratio, alpha = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (mu0, ratio, alpha)))
    ok = mu0 > 0
    mu = np.where(ok, mu0, 1.0)
    c = qstats.poisson_isf(alpha, mu) + 1
    for _ in range(3):  # settle c onto the smallest count whose upper tail is <= alpha
        step = np.where((c > 0) & (qstats.poisson_sf(c - 2, mu) <= alpha), c - 1, c)
        step = np.where(qstats.poisson_sf(step - 1, mu) > alpha, step + 1, step)
        if np.array_equal(step, c):
            break  # settled: another round would change nothing
        c = step
    return np.where(ok, qstats.poisson_sf(c - 1, mu * ratio), 0.0)


def poisson_power(mu0: float, ratio: float, alpha: float) -> float:
    """Power of the exact one-sided Poisson test of mean mu0 against mean ratio * mu0.

    The critical count c is the smallest c with P(X >= c | mu0) <= alpha; power is
    P(X >= c | ratio * mu0).
    """
    if mu0 <= 0:
        return 0.0
    c = int(sps.poisson.isf(alpha, mu0)) + 1
    while c > 0 and sps.poisson.sf(c - 2, mu0) <= alpha:
        c -= 1
    while sps.poisson.sf(c - 1, mu0) > alpha:
        c += 1
    return float(sps.poisson.sf(c - 1, mu0 * ratio))


# ---------------------------------------------------------------------------------------
# helpers over stats results


def _row(value: Any, i: int) -> Any:
    arr = np.asarray(value)
    if arr.ndim == 0:
        return arr.item()
    return arr[i]


def _opt_float(value: Any) -> float | None:
    if value is None:
        return None
    out = float(value)
    return out if math.isfinite(out) else None


def _attr(result: Any, name: str, i: int) -> Any:
    value = getattr(result, name, None)
    if value is None:
        return None
    return _row(value, i)


def top_shifts(
    codes: Sequence[str],
    observed: np.ndarray,
    expected: np.ndarray,
    residuals: np.ndarray,
    reference: np.ndarray,
    *,
    limit: int = TOP_CATEGORIES,
) -> tuple[CategoryShift, ...]:
    """The categories with the largest |adjusted residual| (those >= 2 first; at least one)."""
    size = np.abs(residuals)
    order = np.argsort(-size, kind="stable")
    n = float(observed.sum())
    chosen = order[size[order] >= RESIDUAL_WORTH_NAMING][:limit].tolist()
    if not chosen and len(order) and np.isfinite(residuals[order[0]]):
        chosen = [int(order[0])]
    res, obs = np.asarray(residuals, dtype=float), np.asarray(observed)
    exp, ref = np.asarray(expected, dtype=float), np.asarray(reference, dtype=float)
    out = []
    for j in chosen:
        r = float(res[j])
        o = int(obs[j])
        out.append(CategoryShift(code=codes[j], direction="up" if r > 0 else "down",
                                 adjusted_residual=r, observed=o, expected=float(exp[j]),
                                 share=o / n if n > 0 else 0.0, reference_share=float(ref[j])))
    return tuple(out)


def top_shifts_rows(
    codes: Sequence[str],
    observed: np.ndarray,
    expected: np.ndarray,
    residuals: np.ndarray,
    reference: np.ndarray,
    *,
    limit: int = TOP_CATEGORIES,
) -> list[tuple[CategoryShift, ...]]:
    """:func:`top_shifts` of each row of (lines x categories) arrays, with one sort for all rows
    and plain Python numbers after that (same categories, same numbers as row by row)."""
    return _top_rows([codes] * np.shape(residuals)[0], observed, expected, residuals, reference,
                     limit=limit)


def _top_rows(codes_of_rows: Sequence[Sequence[str]], observed: np.ndarray,
              expected: np.ndarray, residuals: np.ndarray, reference: np.ndarray, *,
              limit: int = TOP_CATEGORIES) -> list[tuple[CategoryShift, ...]]:
    """:func:`top_shifts_rows` with each row's own category codes (rows of several shifts)."""
    res = np.asarray(residuals, dtype=float)
    size = np.abs(res)
    orders = np.argsort(-size, axis=1, kind="stable").tolist()
    obs = np.asarray(observed, dtype=np.int64)
    totals = obs.sum(axis=1).tolist()
    out = []
    for order, sz, r, o, e, ref, total, codes in zip(
            orders, size.tolist(), res.tolist(), obs.tolist(),
            np.asarray(expected, dtype=float).tolist(),
            np.asarray(reference, dtype=float).tolist(), totals, codes_of_rows, strict=True):
        chosen = []
        for j in order:  # by |residual|, largest first (NaN last)
            if not sz[j] >= RESIDUAL_WORTH_NAMING or len(chosen) == limit:
                break
            chosen.append(j)
        if not chosen and order and math.isfinite(r[order[0]]):
            chosen = [order[0]]
        n = float(total)
        out.append(tuple(
            CategoryShift(code=codes[j], direction="up" if r[j] > 0 else "down",
                          adjusted_residual=r[j], observed=o[j], expected=e[j],
                          share=o[j] / n if n > 0 else 0.0, reference_share=ref[j])
            for j in chosen))
    return out


def _contained(kind: str, line: str | None, version: int | None, fn: Callable[[], Finding]) -> Finding:
    try:
        return fn()
    except Exception as exc:  # one line's failure must not stop the others
        log.exception("%s test failed for line %s", kind, line)
        return Finding(
            kind=kind,
            line=line,
            verdict=FAULT,
            reason=f"{kind} test failed: {type(exc).__name__}: {exc}",
            baseline_version_id=version,
            details={"error": f"{type(exc).__name__}: {exc}"},
        )


def decision_levels(limits: Iterable[Any]) -> tuple[float, ...]:
    """The levels near which ``auto`` p-values are refined: every alarm and watch level."""
    out = {float(t.alarm_level) for t in limits} | {float(t.watch_level) for t in limits}
    return tuple(sorted(out))


def _power_reason(enough: bool, power: float, needed: float, name: str, floor: float, n: int) -> str:
    if enough:
        return f"power {power:.2f} to see {name} >= {floor:g} with n = {n}"
    return (
        f"too little data to tell: power {power:.2f} < {needed:.2f} to see "
        f"{name} >= {floor:g} with n = {n}"
    )


def cochran_ok(expected: np.ndarray) -> bool:
    """Cochran's rule on an array of expected counts."""
    e = np.asarray(expected, dtype=float).ravel()
    return bool(e.size and e.min() >= 1.0 and (e < 5.0).mean() <= 0.2)


def cochran_rows(expected: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """:func:`cochran_ok` of each row's expected counts where ``mask`` is True (lines x
    categories in, bool per line out)."""
    e = np.asarray(expected, dtype=float)
    cells = mask.sum(axis=1)
    smallest = np.where(mask, e, np.inf).min(axis=1)
    below_5 = ((e < 5.0) & mask).sum(axis=1)
    return (cells > 0) & (smallest >= 1.0) & (below_5 / np.maximum(cells, 1) <= 0.2)
