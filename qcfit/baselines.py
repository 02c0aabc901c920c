"""Baselines: which version a line is held to, and the Phase I study that fits a new one.

Pure (no store, file or clock; the CLI and the service hand the data in):

* :func:`baseline_in_force` resolves the baseline version in force for a line at a shift's
  start, as a :class:`~qcfit.model.BaselineRef` carrying the store's version id.
* :func:`fit_study` is the Phase I study of a history window given as a shifts x categories
  count array (plus units inspected per shift): is the window stable, which mix and rate does
  it estimate (with simultaneous intervals), is it long enough? :func:`baseline_block` turns
  the result into a ready-to-paste ``[baseline.NAME]`` TOML table.

Phase I as used here (Jones-Farmer, Woodall, Steiner & Champ, "An overview of Phase I analysis
for process improvement and monitoring", Journal of Quality Technology 46(3), 2014): check that
the window is stable, list the shifts that stand out with their reason, remove them only when
asked (the engineer should know an assignable cause), then estimate the in-control parameters.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Literal

import numpy as np
from scipy import stats as sps
from scipy.special import xlogy

from qcfit.config import baseline_for
from qcfit.errors import BaselineError, InvalidArgumentError
from qcfit.model import BaselineRef, ShiftInstance
from qcfit.stats import (
    adjust_pvalues,
    chisq_power,
    compare_each_to_rest,
    compare_groups,
    detectable_effect,
    multinomial_intervals,
    poisson_rate_interval,
    sample_size_for_power,
)

log = logging.getLogger(__name__)

__all__ = [
    "ARL_FIGURES",
    "ChangePointCheck",
    "FitSettings",
    "FitStudy",
    "HomogeneityCheck",
    "PowerCheck",
    "ProportionEstimate",
    "RateEstimate",
    "RoundSummary",
    "ShiftFlag",
    "arl_warning",
    "baseline_block",
    "baseline_in_force",
    "baselines_in_force",
    "block_proportions",
    "cohen_w",
    "fit_study",
    "version_diff",
]

IntervalMethod = Literal["sison-glaz", "goodman"]
INTERVAL_METHODS: tuple[str, ...] = ("sison-glaz", "goodman")

DEFAULT_CONFIDENCE = 0.95
DEFAULT_OUTLIER_LEVEL = 0.01  # adjusted p below this (and the effect at its floor) flags a shift
DEFAULT_MAX_ROUNDS = 5  # exclusion rounds with --exclude-outliers
DEFAULT_PERMUTATIONS = 999  # change-point scan
HOMOGENEITY_DRAWS = 2000  # Monte Carlo tables for the shifts x categories test (sparse windows)
DEFAULT_MIN_CHANGE_W = 0.10  # lasting change in the window that makes it unstable
DEFAULT_MIN_SHIFTS = 100  # shorter windows get the false-alarm warning (see ARL_FIGURES)
SISON_GLAZ_MIN_K = 7  # Sison & Glaz (1995, JASA 90:366-369) designed their method for k >= 7
RESIDUAL_NOTE = 2.0  # |adjusted residual| named in a reason: common practice, no source
PROPORTION_DECIMALS = 6  # shares in the TOML block; they sum to 1 exactly at this precision
RATE_DIGITS = 4  # significant digits of the rate in the TOML block

# Lower quartile of the in-control run length (shifts between false alarms) of a chart set
# for 370 when the baseline mix is estimated from 10, 30 or 100 in-control shifts: one chart
# in four alarms at least this often. From bench/baseline_window_study.py (seeded, 400
# replicates: a tuned multinomial CUSUM, 200 defects a shift, ARL by the Brook-Evans chain);
# the figures depend on the chart and the line and show the size of the effect only.
ARL_FIGURES: tuple[tuple[int, float], ...] = ((10, 122.0), (30, 218.0), (100, 280.0))
ARL_FIGURES_TARGET = 370.0


# --------------------------------------------------------------------------- baseline in force


def baseline_in_force(
    config: Any, versions: Mapping[str, int], line: str, shift: ShiftInstance
) -> BaselineRef | None:
    """The baseline version ``line`` is held to in ``shift``, or None when none applies.

    The spec is :func:`qcfit.config.baseline_for` at ``shift.date`` (the plant-local date the
    shift starts on): the one naming ``line`` explicitly (else a ``"*"`` one) with the latest
    ``effective`` on or before that date. A baseline therefore applies to shifts that start on
    or after its effective date, and adding a baseline never changes what older shifts were
    tested against. ``versions`` maps ``content_hash`` -> ``baseline_version.id`` (from
    :func:`qcfit.store.baselines.sync_baseline_versions`); proportions come in
    ``config.categories`` order. BaselineError (naming the baseline) when its content has no
    version yet.
    """
    spec = baseline_for(config, line, shift.date)
    if spec is None:
        return None
    return _to_ref(spec, tuple(config.categories), versions)


def baselines_in_force(
    config: Any, versions: Mapping[str, int], lines: Sequence[str], shift: ShiftInstance
) -> dict[str, BaselineRef | None]:
    """:func:`baseline_in_force` for each of ``lines`` (the mapping evaluation takes)."""
    return {line: baseline_in_force(config, versions, line, shift) for line in lines}


def _to_ref(spec: Any, categories: tuple[str, ...], versions: Mapping[str, int]) -> BaselineRef:
    key = f"baseline.{spec.name}"
    if spec.content_hash not in versions:
        raise BaselineError(key, "this baseline's content has no version in the store yet "
                                 "(run qcfit init, which records it)")
    missing = [c for c in categories if c not in spec.proportions]
    if missing:
        raise BaselineError(f"{key}.proportions", f"no share for plant category {missing[0]}")
    return BaselineRef(
        version_id=int(versions[spec.content_hash]),
        name=str(spec.name),
        effective=spec.effective,
        categories=categories,
        proportions=tuple(float(spec.proportions[c]) for c in categories),
        rate=None if spec.rate is None else float(spec.rate),
        thresholds=tuple(sorted((str(k), v) for k, v in dict(spec.thresholds or {}).items())),
    )


# --------------------------------------------------------------------------- results


@dataclass(frozen=True, slots=True)
class FitSettings:
    """Options of :func:`fit_study` (the CLI fills them from ``[thresholds]``).

    A shift stands out when its adjusted p-value (``adjust`` across the round's shifts) is
    below ``outlier_level`` AND its effect reaches the floor that an alarm needs
    (``min_effect_w`` for the mix, ``min_rate_ratio`` either way for the rate). The power check
    asks whether a chi-square test at level ``alpha`` on the window's defects detects a mix
    change of Cohen's w = ``min_effect_w`` with probability ``power``. The change-point scan
    calls the window unstable when its permutation p-value is below ``outlier_level`` and the
    mix after the split differs from the mix before by at least ``min_change_w``: a lasting
    change matters at a smaller size than one shift can show (default 0.10, Cohen's "small"
    effect: Cohen, Statistical Power Analysis, 2nd ed. 1988, ch. 7).
    """

    method: IntervalMethod = "sison-glaz"
    confidence: float = DEFAULT_CONFIDENCE
    exclude_outliers: bool = False
    max_rounds: int = DEFAULT_MAX_ROUNDS
    outlier_level: float = DEFAULT_OUTLIER_LEVEL
    adjust: Literal["bh", "holm", "by", "none"] = "bh"
    min_effect_w: float = 0.10
    min_change_w: float = DEFAULT_MIN_CHANGE_W
    min_rate_ratio: float = 1.25
    alpha: float = 0.01
    power: float = 0.80
    min_shifts: int = DEFAULT_MIN_SHIFTS
    permutations: int = DEFAULT_PERMUTATIONS
    seed: int = 20260105


@dataclass(frozen=True, slots=True)
class ShiftFlag:
    """A shift that stands out from the pooled window (``kind`` mix or rate), and why."""

    shift_id: str
    round: int
    kind: Literal["mix", "rate"]
    pvalue: float
    adjusted_pvalue: float
    effect_size: float  # Cohen's w (mix) or observed / pooled rate (rate)
    defects: int
    reason: str
    excluded: bool


@dataclass(frozen=True, slots=True)
class RoundSummary:
    round: int
    shifts: int  # shifts in the study this round
    defects: int
    flagged: tuple[str, ...]  # shift ids that stood out this round


@dataclass(frozen=True, slots=True)
class HomogeneityCheck:
    """Shifts x categories test of homogeneity on the kept shifts with defects;
    ``dispersion`` = X^2 / dof, about 1 when the shifts are multinomial around one mix."""

    statistic: float
    dof: int
    pvalue: float
    method: str
    cramers_v: float
    dispersion: float
    shifts: int
    stable: bool


@dataclass(frozen=True, slots=True)
class ChangePointCheck:
    """Largest 2 x k G^2 over every split of the kept shifts in time order, with a permutation
    p-value (whole shifts shuffled); ``split_shift_id`` is the first shift after the split and
    ``effect_size`` Cohen's w of the after-split mix against the before-split mix."""

    statistic: float
    pvalue: float
    permutations: int
    seed: int
    split_shift_id: str
    before: tuple[float, ...]
    after: tuple[float, ...]
    effect_size: float
    stable: bool


@dataclass(frozen=True, slots=True)
class ProportionEstimate:
    """Pooled shares with simultaneous intervals (all k cover together at ``confidence``)."""

    categories: tuple[str, ...]
    counts: tuple[int, ...]
    proportions: tuple[float, ...]
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    method: str
    confidence: float
    defects: int


@dataclass(frozen=True, slots=True)
class RateEstimate:
    """Defects per inspected unit over the kept shifts with known units (exact interval)."""

    defects: int
    units: float
    shifts: int
    rate: float
    lower: float
    upper: float
    confidence: float


@dataclass(frozen=True, slots=True)
class PowerCheck:
    """Can the window's defects detect a mix change of Cohen's w = ``min_effect_w``?"""

    min_effect_w: float
    alpha: float
    target_power: float
    dof: int
    defects: int
    power: float
    defects_needed: int
    detectable_w: float  # smallest w reaching the target power with this many defects
    enough: bool
    more_shifts: int  # 0 when enough; else at the window's mean defects per shift


@dataclass(frozen=True, slots=True)
class FitStudy:
    """Result of :func:`fit_study`; ``stable`` is the verdict on the kept shifts."""

    categories: tuple[str, ...]
    window_shifts: tuple[str, ...]
    kept_shifts: tuple[str, ...]
    flags: tuple[ShiftFlag, ...]
    rounds: tuple[RoundSummary, ...]
    cap_reached: bool
    empty_shifts: tuple[str, ...]  # kept shifts with no defects (in the rate, not the mix)
    homogeneity: HomogeneityCheck | None
    change_point: ChangePointCheck | None
    proportions: ProportionEstimate
    rate: RateEstimate | None
    power: PowerCheck
    stable: bool
    warnings: tuple[str, ...] = ()
    settings: FitSettings = field(default_factory=FitSettings)

    @property
    def excluded(self) -> tuple[ShiftFlag, ...]:
        return tuple(f for f in self.flags if f.excluded)

    @property
    def verdict(self) -> str:
        if not self.stable:
            return "not stable"
        return "stable" if self.power.enough else "stable, too few defects"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready form (what ``--format json`` prints)."""
        return _study_dict(self)


# --------------------------------------------------------------------------- the study


@dataclass(frozen=True, slots=True)
class _Window:
    counts: np.ndarray  # (m, k) int64
    units: np.ndarray  # (m,) float, NaN unknown
    ids: tuple[str, ...]
    categories: tuple[str, ...]
    settings: FitSettings


def fit_study(
    counts: Any,
    units: Any = None,
    *,
    shift_ids: Sequence[str],
    categories: Sequence[str],
    settings: FitSettings | None = None,
) -> FitStudy:
    """Phase I study of a history window.

    ``counts``: int array (m, k): defects per shift (rows in time order) and category;
    ``units``: float array (m,): units inspected per shift, NaN where unknown (or None);
    ``shift_ids``: the m shift ids naming the rows; ``categories``: the k category codes.

    Each round tests each kept shift's mix against the pooled rest of the kept shifts
    (2 x k Pearson X^2 by ``qcfit.stats.compare_each_to_rest``, p-value ``auto``) and, with
    units, its defect count against the pooled rate (exact two-sided Poisson test, twice the
    smaller tail); p-values are adjusted across the round's shifts. With ``exclude_outliers`` flagged
    shifts are removed and the round repeated until none stand out or ``max_rounds`` rounds
    have removed shifts (then the shifts still standing out are listed, kept). On the kept
    shifts follow: shifts x categories homogeneity (``compare_groups``), a change-point scan,
    shares with simultaneous intervals (``multinomial_intervals``), the rate with its exact
    Poisson interval and the power check (``chisq_power``, ``sample_size_for_power``).
    BaselineError for an empty window, a window with no defects or one left with no shifts.
    """
    settings = settings or FitSettings()
    win = _validate(counts, units, shift_ids, categories, settings)
    keep = np.ones(len(win.ids), dtype=bool)
    flags, rounds, cap_reached = _rounds(win, keep)
    if win.counts[keep].sum() == 0:
        raise BaselineError("--exclude-outliers", "the shifts left after excluding outliers "
                                                  "hold no defects; nothing is left to fit")
    return _summarise(win, keep, flags, rounds, cap_reached)


def _validate(counts: Any, units: Any, shift_ids: Sequence[str], categories: Sequence[str],
              settings: FitSettings) -> _Window:
    arr = np.asarray(counts, dtype=float)
    if arr.ndim != 2:
        raise InvalidArgumentError("counts", f"must be shifts x categories, got shape {arr.shape}")
    m, k = arr.shape
    if m == 0:
        raise BaselineError("--from/--to", "the history window holds no shifts with data")
    if len(shift_ids) != m:
        raise InvalidArgumentError("shift_ids", f"has {len(shift_ids)} ids for {m} rows of counts")
    if len(set(shift_ids)) != m:
        raise InvalidArgumentError("shift_ids", "has a shift id twice")
    if len(categories) != k or k < 2:
        raise InvalidArgumentError("categories", f"needs one code per column (k = {k} >= 2)")
    bad = ~np.isfinite(arr) | (arr < 0) | (arr != np.round(arr))
    if bad.any():
        where = [int(i) for i in np.argwhere(bad)[0]]
        raise InvalidArgumentError("counts", f"has a negative, fractional or NaN count at {where}")
    if settings.method not in INTERVAL_METHODS:
        raise InvalidArgumentError("--method", f"must be one of {', '.join(INTERVAL_METHODS)}")
    if settings.max_rounds < 1:
        raise InvalidArgumentError("max_rounds", "must be at least 1")
    units_a = np.full(m, np.nan) if units is None else np.asarray(units, dtype=float)
    if units_a.shape != (m,):
        raise InvalidArgumentError("units", f"must have shape ({m},), got {units_a.shape}")
    if np.any(units_a[np.isfinite(units_a)] < 0):
        raise InvalidArgumentError("units", "has a negative number of units inspected")
    if arr.sum() == 0:
        raise BaselineError("--from/--to", f"the {m} shift(s) in the window hold no defects")
    return _Window(arr.astype(np.int64), units_a, tuple(map(str, shift_ids)),
                   tuple(map(str, categories)), settings)


def _rounds(win: _Window, keep: np.ndarray) -> tuple[list[ShiftFlag], list[RoundSummary], bool]:
    """Flag (and with exclude_outliers remove) outlying shifts round by round; updates keep."""
    s = win.settings
    flags: list[ShiftFlag] = []
    rounds: list[RoundSummary] = []
    for number in range(1, s.max_rounds + 1):
        found = _flag_round(win, keep, number, exclude=s.exclude_outliers)
        rounds.append(RoundSummary(number, int(keep.sum()), int(win.counts[keep].sum()),
                                   tuple(f.shift_id for f in found)))
        flags.extend(found)
        if not found or not s.exclude_outliers:
            return flags, rounds, False
        keep[[win.ids.index(f.shift_id) for f in found]] = False
        if not keep.any():
            raise BaselineError(
                "--exclude-outliers",
                f"every shift in the window stood out within {number} round(s); nothing is "
                "left to fit (look at the flagged shifts, or choose another window)",
            )
    rest = _flag_round(win, keep, s.max_rounds + 1, exclude=False)
    flags.extend(rest)
    return flags, rounds, bool(rest)


def _flag_round(win: _Window, keep: np.ndarray, number: int, *, exclude: bool) -> list[ShiftFlag]:
    """Kept shifts whose mix or rate stands out from the pooled kept shifts (one flag each)."""
    idx = np.flatnonzero(keep)
    seen: dict[str, ShiftFlag] = {}
    for flag in _mix_flags(win, idx, number) + _rate_flags(win, idx, number):
        seen.setdefault(flag.shift_id, replace(flag, excluded=exclude))
    return sorted(seen.values(), key=lambda f: win.ids.index(f.shift_id))


def _adjust(p: np.ndarray, method: str) -> np.ndarray:
    if method == "none" or len(p) < 2:
        return p.copy()
    return np.asarray(adjust_pvalues(p, method=method), dtype=float)


def _mix_flags(win: _Window, idx: np.ndarray, number: int) -> list[ShiftFlag]:
    """Each kept shift with defects against the pooled rest of the kept shifts (2 x k test of
    homogeneity, ``qcfit.stats.compare_each_to_rest``, p-value ``auto``); the effect is
    Cohen's w of the shift's mix against the rest's, w = sqrt(sum (p_j - r_j)^2 / r_j)."""
    s = win.settings
    tested = idx[win.counts[idx].sum(axis=1) > 0]
    table = win.counts[tested]
    if len(tested) < 2 or (table.sum(axis=0) > 0).sum() < 2:
        return []
    res = compare_each_to_rest(table, statistic="pearson", pvalue="auto", seed=s.seed)
    p = np.where(np.asarray(res.tested), np.asarray(res.pvalue, dtype=float), 1.0)
    adj = _adjust(p, s.adjust)
    w = _w_against_rest(table)
    resid = np.asarray(res.adjusted_residuals, dtype=float)
    out = []
    for j in np.flatnonzero((adj < s.outlier_level) & (w >= s.min_effect_w)):
        reason = (f"mix differs from the rest of the window (w = {w[j]:.3f}, adjusted p = "
                  f"{_fmt_p(adj[j])}){_top_categories(resid[j], win.categories)}")
        out.append(ShiftFlag(win.ids[tested[j]], number, "mix", float(p[j]), float(adj[j]),
                             float(w[j]), int(table[j].sum()), reason, False))
    return out


def _w_against_rest(table: np.ndarray) -> np.ndarray:
    """Cohen's w of each row's shares against the pooled other rows' shares (where the rest
    has no defect in a category the pooled window's share stands in)."""
    total = table.sum(axis=0).astype(float)
    rest = total[None, :] - table
    n = table.sum(axis=1, keepdims=True).astype(float)
    ref = rest / np.maximum(rest.sum(axis=1, keepdims=True), 1.0)
    ref = np.where(ref > 0, ref, total / total.sum())
    keep = total > 0
    dev = (table / n - ref)[:, keep]
    return np.sqrt(np.sum(dev**2 / ref[:, keep], axis=1))


def _top_categories(resid: np.ndarray, codes: Sequence[str]) -> str:
    parts = [f"{codes[i]} {'up' if resid[i] > 0 else 'down'} (adjusted residual {resid[i]:+.1f})"
             for i in np.argsort(-np.abs(resid))[:2] if abs(resid[i]) >= RESIDUAL_NOTE]
    return ": " + ", ".join(parts) if parts else ""


def _rate_flags(win: _Window, idx: np.ndarray, number: int) -> list[ShiftFlag]:
    s = win.settings
    known = idx[np.isfinite(win.units[idx]) & (win.units[idx] > 0)]
    d = win.counts[known].sum(axis=1)
    u = win.units[known]
    if len(known) < 2 or d.sum() == 0:
        return []
    mu = u * (d.sum() / u.sum())
    # exact two-sided Poisson test: twice the smaller tail, capped at 1 (common practice)
    p = np.minimum(1.0, 2.0 * np.minimum(sps.poisson.cdf(d, mu), sps.poisson.sf(d - 1, mu)))
    adj = _adjust(p, s.adjust)
    ratio = d / mu
    big = (ratio >= s.min_rate_ratio) | (ratio <= 1.0 / s.min_rate_ratio)
    out = []
    for j in np.flatnonzero((adj < s.outlier_level) & big):
        reason = (f"defect rate {ratio[j]:.2f} x the pooled window ({int(d[j])} defects in "
                  f"{u[j]:.0f} units, adjusted p = {_fmt_p(adj[j])})")
        out.append(ShiftFlag(win.ids[known[j]], number, "rate", float(p[j]), float(adj[j]),
                             float(ratio[j]), int(d[j]), reason, False))
    return out


def _fmt_p(p: float) -> str:
    return f"{p:.2g}" if p >= 1e-4 else f"{p:.1e}"


# --------------------------------------------------------------------------- on the kept shifts


def _summarise(win: _Window, keep: np.ndarray, flags: list[ShiftFlag],
               rounds: list[RoundSummary], cap_reached: bool) -> FitStudy:
    s = win.settings
    kept = np.flatnonzero(keep)
    n = win.counts[kept].sum(axis=1)
    with_defects = kept[n > 0]
    homogeneity = _homogeneity(win, with_defects)
    change_point = _change_point(win, with_defects)
    props = _proportions(win, kept)
    rate = _rate(win, kept)
    power = _power(win, kept)
    standing_out = [f for f in flags if not f.excluded]
    stable = (not standing_out
              and (homogeneity is None or homogeneity.stable)
              and (change_point is None or change_point.stable))
    study = FitStudy(
        categories=win.categories,
        window_shifts=win.ids,
        kept_shifts=tuple(win.ids[i] for i in kept),
        flags=tuple(flags),
        rounds=tuple(rounds),
        cap_reached=cap_reached,
        empty_shifts=tuple(win.ids[i] for i in kept[n == 0]),
        homogeneity=homogeneity,
        change_point=change_point,
        proportions=props,
        rate=rate,
        power=power,
        stable=stable,
        settings=s,
    )
    return replace(study, warnings=tuple(_warnings(study, win)))


def _homogeneity(win: _Window, rows: np.ndarray) -> HomogeneityCheck | None:
    if len(rows) < 2:
        return None
    table = win.counts[rows]
    table = table[:, table.sum(axis=0) > 0]
    if table.shape[1] < 2:
        return None
    # a Phase I window can be a thousand shifts: fewer Monte Carlo tables, refined only near
    # the one decision level (the stats engine adds draws when p is close to it)
    g = compare_groups(table, statistic="pearson", pvalue="auto", seed=win.settings.seed,
                       draws=HOMOGENEITY_DRAWS, levels=(win.settings.outlier_level,))
    dof = int(g.dof)
    stat = float(g.statistic)
    pvalue = float(g.pvalue)
    return HomogeneityCheck(
        statistic=stat, dof=dof, pvalue=pvalue, method=str(g.method),
        cramers_v=float(g.effect_size), dispersion=stat / dof if dof else float("nan"),
        shifts=len(rows), stable=pvalue >= win.settings.outlier_level,
    )


def _g2_splits(table: np.ndarray) -> np.ndarray:
    """G^2 of the 2 x k table (shifts before vs after) for each split 1..m-1 of ``table``
    (..., m, k); returns (..., m-1). G^2 = 2 sum O ln(O / E), E = row x column / N
    (Agresti, An Introduction to Categorical Data Analysis, 2nd ed. 2007, sec. 2.4.5)."""
    cum = np.cumsum(table, axis=-2, dtype=np.float64)
    total = cum[..., -1:, :]
    before = cum[..., :-1, :]
    after = total - before
    a = before.sum(axis=-1)
    b = after.sum(axis=-1)
    cols = total[..., 0, :]
    big_n = cols.sum(axis=-1, keepdims=True)
    cells = xlogy(before, before).sum(axis=-1) + xlogy(after, after).sum(axis=-1)
    const = xlogy(big_n, big_n) - xlogy(cols, cols).sum(axis=-1, keepdims=True)
    return np.maximum(2.0 * (cells - xlogy(a, a) - xlogy(b, b) + const), 0.0)


def _change_point(win: _Window, rows: np.ndarray) -> ChangePointCheck | None:
    s = win.settings
    if len(rows) < 4:
        return None
    table = win.counts[rows]
    table = table[:, table.sum(axis=0) > 0]
    observed = _g2_splits(table)
    best = int(np.argmax(observed))
    stat = float(observed[best])
    rng = np.random.default_rng(s.seed)
    exceed = 0
    chunk = max(1, 2_000_000 // table.size)
    done = 0
    while done < s.permutations:
        size = min(chunk, s.permutations - done)
        perm = rng.permuted(np.broadcast_to(np.arange(len(rows)), (size, len(rows))), axis=1)
        exceed += int((_g2_splits(table[perm]).max(axis=-1) >= stat - 1e-9).sum())
        done += size
    pvalue = (1 + exceed) / (1 + s.permutations)
    before = win.counts[rows[: best + 1]].sum(axis=0)
    after = win.counts[rows[best + 1:]].sum(axis=0)
    pb, pa = before / before.sum(), after / after.sum()
    pos = pb > 0
    w = float(np.sqrt(np.sum((pa[pos] - pb[pos]) ** 2 / pb[pos])))
    return ChangePointCheck(
        statistic=stat, pvalue=float(pvalue), permutations=s.permutations, seed=s.seed,
        split_shift_id=win.ids[rows[best + 1]], before=tuple(map(float, pb)),
        after=tuple(map(float, pa)), effect_size=w,
        stable=not (pvalue < s.outlier_level and w >= s.min_change_w),
    )


def _proportions(win: _Window, kept: np.ndarray) -> ProportionEstimate:
    s = win.settings
    pooled = win.counts[kept].sum(axis=0)
    total = int(pooled.sum())
    ci = np.asarray(multinomial_intervals(pooled, s.confidence, method=s.method), dtype=float)
    return ProportionEstimate(
        categories=win.categories,
        counts=tuple(int(c) for c in pooled),
        proportions=tuple(float(c) / total for c in pooled),
        lower=tuple(float(x) for x in ci[:, 0]),
        upper=tuple(float(x) for x in ci[:, 1]),
        method=s.method,
        confidence=s.confidence,
        defects=total,
    )


def _rate(win: _Window, kept: np.ndarray) -> RateEstimate | None:
    known = kept[np.isfinite(win.units[kept]) & (win.units[kept] > 0)]
    if len(known) == 0:
        return None
    d = int(win.counts[known].sum())
    u = float(win.units[known].sum())
    lower, upper = poisson_rate_interval(d, u, win.settings.confidence)
    return RateEstimate(d, u, len(known), d / u, lower, upper, win.settings.confidence)


def _power(win: _Window, kept: np.ndarray) -> PowerCheck:
    s = win.settings
    k = len(win.categories)
    dof = k - 1
    total = int(win.counts[kept].sum())
    power = float(chisq_power(s.min_effect_w, dof, total, s.alpha))
    needed = int(sample_size_for_power(s.min_effect_w, dof, s.alpha, s.power))
    enough = total >= needed
    per_shift = total / len(kept)
    more = 0 if enough else int(math.ceil((needed - total) / per_shift))
    detectable = float(detectable_effect(total, dof, s.alpha, s.power))
    return PowerCheck(s.min_effect_w, s.alpha, s.power, dof, total, power, needed,
                      detectable, enough, more)


# --------------------------------------------------------------------------- warnings


def arl_warning(shifts: int) -> str:
    """The false-alarm warning for a baseline estimated from ``shifts`` shifts."""
    (m0, arl0), rest = ARL_FIGURES[0], ARL_FIGURES[1:]
    figures = ", ".join([f"{arl0:.0f} or fewer with a baseline from {m0} shifts"]
                        + [f"{arl:.0f} or fewer from {m}" for m, arl in rest])
    return (
        f"only {shifts} shift(s) in the fit: a baseline estimated from few shifts makes charts "
        f"alarm more or less often than configured, by chance. In a simulation (rough figures: "
        f"they depend on the chart and the line), one chart in four that was set for "
        f"{ARL_FIGURES_TARGET:.0f} in-control shifts between false alarms ran {figures}. "
        f"Aim for at least {DEFAULT_MIN_SHIFTS} shifts."
    )


def _warnings(study: FitStudy, win: _Window) -> list[str]:
    s = win.settings
    out: list[str] = []
    kept = len(study.kept_shifts)
    if kept < s.min_shifts:
        out.append(arl_warning(kept))
    if not study.power.enough:
        p = study.power
        out.append(
            f"the window holds {p.defects} defects; detecting a mix change of w = "
            f"{p.min_effect_w:g} with power {p.target_power:g} at level {p.alpha:g} needs "
            f"{p.defects_needed} (about {p.more_shifts} more shift(s) like these)")
    out += _stability_warnings(study)
    if s.method == "sison-glaz" and len(win.categories) < SISON_GLAZ_MIN_K:
        out.append(f"Sison-Glaz intervals were designed for {SISON_GLAZ_MIN_K} or more categories;"
                   f" with {len(win.categories)} consider --method goodman")
    zero = [c for c, n in zip(study.categories, study.proportions.counts, strict=True) if n == 0]
    if zero:
        out.append(f"no defects in {', '.join(zero)}: a baseline share must be > 0, so the TOML "
                   "block adds half a defect to every category ((x + 1/2) / (N + k/2))")
    if study.rate is None:
        out.append("units inspected are unknown for every kept shift: no baseline rate")
    elif study.rate.shifts < kept:
        out.append(f"the rate uses the {study.rate.shifts} of {kept} kept shifts with known units")
    if study.cap_reached:
        still = sum(1 for f in study.flags if not f.excluded)
        out.append(f"stopped after {s.max_rounds} exclusion rounds; {still} shift(s) still "
                   "stand out (the window may hold a lasting change rather than odd shifts)")
    return out


def _stability_warnings(study: FitStudy) -> list[str]:
    """What to do about an unstable window (Phase I: investigate before fitting)."""
    out = []
    h, c = study.homogeneity, study.change_point
    if c is not None and not c.stable:
        date = c.split_shift_id.partition("_")[0]
        out.append(f"the mix changed around shift {c.split_shift_id} (w = {c.effect_size:.3f}): "
                   f"a baseline from the whole window mixes two processes; fit the part that is "
                   f"in control (e.g. --from {date} if the change is the new normal)")
    if h is not None and not h.stable:
        out.append(f"the shifts vary more than one multinomial mix allows (X2/df = "
                   f"{h.dispersion:.2f}, p = {_fmt_p(h.pvalue)}): per-shift alarms on this "
                   "baseline will fire more often than configured until the cause is found")
    return out


# --------------------------------------------------------------------------- TOML block


def block_proportions(counts: Sequence[int], categories: Sequence[str]) -> dict[str, float]:
    """Shares for the TOML block from pooled ``counts``: rounded to PROPORTION_DECIMALS so
    that they sum to 1 exactly (largest remainder), each at least one unit of the last
    decimal (a config share must be > 0). With a zero count every category gets half a defect
    more, (x + 1/2) / (N + k/2) (the Jeffreys prior's posterior mean)."""
    arr = np.asarray(counts, dtype=float)
    if np.any(arr == 0):
        arr = arr + 0.5
    scale = 10**PROPORTION_DECIMALS
    raw = arr / arr.sum() * scale
    units = np.floor(raw).astype(np.int64)
    short = scale - int(units.sum())
    for i in np.argsort(-(raw - units), kind="stable")[:short]:
        units[i] += 1
    while np.any(units == 0):
        units[np.argmax(units)] -= 1
        units[np.flatnonzero(units == 0)[0]] += 1
    return {str(c): int(u) / scale for c, u in zip(categories, units, strict=True)}


def _key(text: str) -> str:
    import tomlkit

    return tomlkit.key(text).as_string()


def _value(value: Any) -> str:
    import tomlkit

    return tomlkit.item(value).as_string()


def _round_sig(x: float, digits: int) -> float:
    if x == 0:
        return 0.0
    return round(x, digits - 1 - int(math.floor(math.log10(abs(x)))))


def baseline_block(study: FitStudy, *, name: str, lines: Sequence[str], effective: Any,
                   window: tuple[Any, Any]) -> str:
    """A ``[baseline.NAME]`` table (with its ``proportions`` sub-table) for the config file,
    with the intervals and the verdict as comments. ``window`` is (first date, last date)."""
    p = study.proportions
    shares = block_proportions(p.counts, p.categories)
    first, last = window
    note = (f"fitted from {first} to {last}: {len(study.kept_shifts)} shifts, {p.defects} "
            f"defects, {len(study.excluded)} shift(s) excluded; {study.verdict}")
    head = f"baseline.{_key(name)}"
    out = [
        f"# Phase I fit of {', '.join(lines)} from {first} to {last} by qcfit baseline fit: "
        f"{study.verdict}.",
        f"[{head}]",
        f"lines = {_value(list(lines))}",
        f"effective = {_value(effective)}",
    ]
    if study.rate is not None:
        r = study.rate
        out.append(f"rate = {_value(_round_sig(r.rate, RATE_DIGITS))}  # {r.confidence:.0%} "
                   f"exact interval {_round_sig(r.lower, 3):g} to {_round_sig(r.upper, 3):g}")
    out.append(f"note = {_value(note)}")
    out.append("")
    out.append(f"[{head}.proportions]  # {p.confidence:.0%} simultaneous intervals "
               f"({_method_name(p.method)})")
    width = max(len(_key(c)) for c in p.categories)
    for i, code in enumerate(p.categories):
        share = f"{shares[code]:.{PROPORTION_DECIMALS}f}".rstrip("0").rstrip(".")
        out.append(f"{_key(code):<{width}} = {share:<{PROPORTION_DECIMALS + 2}}  "
                   f"# {p.lower[i]:.4f} to {p.upper[i]:.4f}")
    return "\n".join(out) + "\n"


def _method_name(method: str) -> str:
    return {"sison-glaz": "Sison-Glaz", "goodman": "Goodman"}.get(method, method)


# --------------------------------------------------------------------------- JSON form


def _study_dict(study: FitStudy) -> dict[str, Any]:
    p = study.proportions
    return {
        "verdict": study.verdict,
        "stable": study.stable,
        "categories": list(study.categories),
        "window_shifts": len(study.window_shifts),
        "kept_shifts": len(study.kept_shifts),
        "empty_shifts": list(study.empty_shifts),
        "rounds": [
            {"round": r.round, "shifts": r.shifts, "defects": r.defects, "flagged": list(r.flagged)}
            for r in study.rounds
        ],
        "cap_reached": study.cap_reached,
        "excluded": [_flag_dict(f) for f in study.flags if f.excluded],
        "standing_out": [_flag_dict(f) for f in study.flags if not f.excluded],
        "homogeneity": None if study.homogeneity is None else _plain(study.homogeneity),
        "change_point": None if study.change_point is None else _plain(study.change_point),
        "proportions": {
            "method": p.method,
            "confidence": p.confidence,
            "defects": p.defects,
            "by_category": {
                c: {"count": p.counts[i], "share": p.proportions[i], "lower": p.lower[i],
                    "upper": p.upper[i]}
                for i, c in enumerate(p.categories)
            },
        },
        "rate": None if study.rate is None else _plain(study.rate),
        "power": _plain(study.power),
        "warnings": list(study.warnings),
    }


def _flag_dict(flag: ShiftFlag) -> dict[str, Any]:
    return _plain(flag)


def _plain(obj: Any) -> dict[str, Any]:
    out = {}
    for name in obj.__slots__:
        value = getattr(obj, name)
        out[name] = list(value) if isinstance(value, tuple) else value
    return out


# --------------------------------------------------------------------------- comparisons


def cohen_w(p: Sequence[float], p0: Sequence[float]) -> float:
    """Cohen's w of mix ``p`` against mix ``p0``: sqrt(sum (p - p0)^2 / p0) over p0 > 0
    (Cohen, Statistical Power Analysis for the Behavioral Sciences, 2nd ed. 1988, ch. 7)."""
    a, b = np.asarray(p, dtype=float), np.asarray(p0, dtype=float)
    if a.shape != b.shape:
        raise InvalidArgumentError("p", f"has {a.size} shares for {b.size} in p0")
    keep = b > 0
    return float(np.sqrt(np.sum((a[keep] - b[keep]) ** 2 / b[keep])))


# --------------------------------------------------------------------------- version diff


def version_diff(old: Any, new: Any) -> dict[str, Any]:
    """What changed between two baseline versions (``BaselineVersionRow``-like: proportions,
    rate, lines, effective, thresholds): per category the old and new share, the change and
    the relative change, plus Cohen's w of the new mix against the old one,
    w = sqrt(sum (new - old)^2 / old) (Cohen, Statistical Power Analysis, 2nd ed. 1988, ch. 7),
    when both cover the same categories."""
    codes = list(old.proportions) + [c for c in new.proportions if c not in old.proportions]
    rows = []
    for code in codes:
        a, b = old.proportions.get(code), new.proportions.get(code)
        change = None if a is None or b is None else float(b) - float(a)
        relative = None if change is None or not a else change / float(a)
        rows.append({"code": code, "old": a, "new": b, "change": change, "relative": relative})
    same = set(old.proportions) == set(new.proportions) and all(v > 0 for v in old.proportions.values())
    w = (cohen_w([new.proportions[c] for c in old.proportions], list(old.proportions.values()))
         if same else None)
    return {
        "old_id": old.id, "new_id": new.id, "categories": rows, "cohen_w": w,
        "rate": {"old": old.rate, "new": new.rate},
        "lines": {"old": list(old.lines), "new": list(new.lines)},
        "effective": {"old": old.effective.isoformat(), "new": new.effective.isoformat()},
        "thresholds": {"old": dict(old.thresholds), "new": dict(new.thresholds)},
    }
