"""Reference figures for SCENARIO.md ("What qcfit should find"), independent of qcfit.

Run ``python sample_lines/reference_check.py [--lambda 0.2]`` (numpy, scipy, pandas; ~15 s,
seeded). It reads
the generated data and prints, for the drift line and the healthy lines:

* the per-shift Pearson X^2 goodness of fit against the baseline (scipy.stats.chisquare), at
  p < 1/370 (the false-alarm rate of an in-control ARL of 370 shifts) and at p < 0.01;
* the first signal of two simple sequential charts, each with its limit set by simulation to an
  in-control ARL of 370 shifts at Poisson(200) defects a shift:
  - a multivariate EWMA of the standardised count vector (lambda 0.2 by default, as in
    qcfit's [sequential] default), with the asymptotic
    covariance lambda/(2 - lambda) Sigma (Lowry, Woodall, Champ & Rigdon 1992, Technometrics
    34(1), eq. 2-3, applied to the multinomial residual vector);
  - a multinomial log-likelihood-ratio CUSUM for "sink mark share x1.5, others scaled"
    (Page 1954, Biometrika 41; the multinomial form as in Ryan, Wells & Woodall 2011);
* the median first-signal step of each chart over replays of the same drift.

These are deliberately small check implementations (no variable-n correction of the MEWMA
covariance, no head start): they say what a sequential chart can do on these data, so qcfit's
own charts can be compared against them. They are not qcfit's method.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

HERE = Path(__file__).resolve().parent
SEED = 20261019
ARL0 = 370.0
LAMBDA = 0.2  # set from --lambda in main()
CUSUM_FACTOR = 1.5
N_PER_SHIFT = 200


def _generator():
    spec = importlib.util.spec_from_file_location("qcfit_demo_generate", HERE / "generate.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


gen = _generator()
P0 = np.array(gen.MIX["housings"])
K = len(P0)
SK = gen.CATEGORIES.index(gen.DRIFT_CATEGORY)


def mewma(x: np.ndarray) -> np.ndarray:
    """T^2 of the MEWMA for counts ``x`` (replicates, shifts, K) -> (replicates, shifts)."""
    sigma = (np.diag(P0) - np.outer(P0, P0))[: K - 1, : K - 1] * LAMBDA / (2 - LAMBDA)
    inverse = np.linalg.inv(sigma)
    n = x.sum(axis=2, keepdims=True)
    z = ((x - n * P0) / np.sqrt(np.maximum(n, 1)))[..., : K - 1]
    state = np.zeros((x.shape[0], K - 1))
    out = np.empty(x.shape[:2])
    for t in range(x.shape[1]):
        state = LAMBDA * z[:, t] + (1 - LAMBDA) * state
        out[:, t] = np.einsum("ri,ij,rj->r", state, inverse, state)
    return out


def cusum(x: np.ndarray) -> np.ndarray:
    """Multinomial LLR CUSUM for the sink-mark share x CUSUM_FACTOR (others scaled)."""
    p1 = gen._move_share(P0.copy(), SK, P0[SK] * CUSUM_FACTOR)
    score = x @ np.log(p1 / P0)
    state = np.zeros(x.shape[0])
    out = np.empty(x.shape[:2])
    for t in range(x.shape[1]):
        state = np.maximum(0.0, state + score[:, t])
        out[:, t] = state
    return out


def first_signal(statistic: np.ndarray, limit: float) -> np.ndarray:
    """1-based shift of the first value above ``limit`` per replicate (length + 1 if none)."""
    hit = statistic > limit
    return np.where(hit.any(axis=1), hit.argmax(axis=1) + 1, statistic.shape[1] + 1)


def simulate(rng: np.random.Generator, shifts: int, replicates: int, mix) -> np.ndarray:
    n = rng.poisson(N_PER_SHIFT, size=(replicates, shifts))
    x = np.empty((replicates, shifts, K), dtype=np.int64)
    for t in range(shifts):
        x[:, t] = rng.multinomial(n[:, t], mix(t))
    return x


def calibrate(chart, rng: np.random.Generator, grid: np.ndarray) -> float:
    """Limit with in-control ARL ~ ARL0 (interpolated over ``grid``; runs censored at 1500)."""
    statistic = chart(simulate(rng, 1500, 1000, lambda t: P0))
    arl = [first_signal(statistic, h).mean() for h in grid]
    return float(np.interp(ARL0, arl, grid))


def observed_counts() -> tuple[list[str], dict[str, np.ndarray]]:
    table = pd.read_csv(HERE / "data" / "shift_counts.csv")
    ids = list(dict.fromkeys(table["shift"]))
    wide = table.pivot_table(index=["line", "shift"], columns="category", values="count")
    wide = wide.reindex(columns=list(gen.CATEGORIES))
    lines = {line: wide.loc[line].reindex(ids).to_numpy(np.int64) for line in gen.LINES}
    return ids, lines


def main(argv: list[str] | None = None) -> int:
    global LAMBDA
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lambda", dest="lam", type=float, default=LAMBDA,
                        help="MEWMA smoothing weight (default 0.2)")
    LAMBDA = parser.parse_args(argv).lam
    rng = np.random.default_rng(SEED)
    limits = {
        "MEWMA": calibrate(mewma, rng, np.linspace(14, 26, 25)),
        "CUSUM": calibrate(cusum, rng, np.linspace(3, 7, 17)),
    }
    print(f"MEWMA lambda {LAMBDA}; limits for ARL0 370:", {k: round(v, 2) for k, v in limits.items()})
    ids, lines = observed_counts()
    start = ids.index(gen.DRIFT_FIRST)
    for line in ("IM1", "IM2", "IM3", "IM4"):
        x = lines[line]
        n = x.sum(axis=1, keepdims=True)
        p = stats.chisquare(x, f_exp=n * P0, axis=1).pvalue
        print(f"{line} per-shift X^2 p < 1/370: {[ids[i] for i in np.flatnonzero(p < 1 / ARL0)]}")
        for name, chart in (("MEWMA", mewma), ("CUSUM", cusum)):
            above = np.flatnonzero(chart(x[None])[0] > limits[name])
            print(f"{line} {name} above its limit: {[ids[i] for i in above][:8]}"
                  f"{' ...' if len(above) > 8 else ''}")
        if line == gen.DRIFT_LINE:
            for level in (1 / ARL0, 0.01):
                i = start + int(np.argmax(p[start:] < level))
                print(f"  drift: first per-shift p < {level:.4f}: {ids[i]} (step {i - start + 1})")

    def drifted(t: int, before: int = 60) -> np.ndarray:
        if t < before:
            return P0
        step = min(t - before + 1, gen.DRIFT_RAMP_SHIFTS)
        share = P0[SK] + gen.DRIFT_RISE * step / gen.DRIFT_RAMP_SHIFTS
        return gen._move_share(P0.copy(), SK, share)

    replays = simulate(rng, 60 + 80, 2000, drifted)
    n = replays.sum(axis=2, keepdims=True)
    x2 = (((replays - n * P0) ** 2) / (n * P0)).sum(axis=2)[:, 60:]
    steps = {name: first_signal(chart(replays)[:, 60:], limits[name])
             for name, chart in (("MEWMA", mewma), ("CUSUM", cusum))}
    for level in (1 / ARL0, 0.01):
        steps[f"X^2 p<{level:.4f}"] = first_signal(x2, stats.chi2.isf(level, K - 1))
    print("replays of the drift (2000, 60 in-control shifts first): first signal step")
    for name, s in steps.items():
        q = np.percentile(s, [10, 50, 90])
        print(f"  {name:14s} median {q[1]:.0f}  (10%-90%: {q[0]:.0f}-{q[2]:.0f})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
