"""How a baseline estimated from few shifts changes a chart's in-control run length.

Setting: true baseline mix p0 = (0.40, 0.25, 0.15, 0.10, 0.06, 0.04), n = 200 defects per
shift. Chart: the one-sided log-likelihood-ratio CUSUM tuned to "category 3 up by half"
(weights ln(p1_j / p0_j), p1 = p0 with p0_3 * 1.5, renormalised), its limit set for an
in-control ARL of 370 shifts by the Brook-Evans Markov chain
(:func:`qcfit.stats.sequential_markov.calibrate_llr_cusum`).

Each replicate draws a Phase I window of ``m`` in-control shifts, estimates the mix from it
((x + 1/2) / (N + k/2), as ``qcfit baseline fit`` writes it), builds and calibrates the chart
on that estimate, and then computes that chart's in-control ARL under the TRUE mix, exactly,
with the same Markov chain (the weights take two values, so the increment's distribution is
binomial). The table gives, per ``m``, the median and quartiles of that realised ARL over the
replicates and the share of charts that alarm more often than configured (ARL below 370).
Seeded: the same command prints the same table.

    python -m bench.baseline_window_study [--replicates 400] [--seed 20260105]
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

from qcfit.stats.sequential_markov import calibrate_llr_cusum, lattice_arl, llr_increment_pmf

P0 = np.array([0.40, 0.25, 0.15, 0.10, 0.06, 0.04])
N_PER_SHIFT = 200
TARGET_ARL = 370.0
CONCERN = (3, 1.5)  # category index, factor
WINDOWS = (10, 30, 100, 300)


def weights_for(p0: np.ndarray) -> np.ndarray:
    """LLR weights ln(p1 / p0) of the tuned CUSUM for the concern, given a baseline p0."""
    j, factor = CONCERN
    p1 = p0.copy()
    p1[j] *= factor
    p1 /= p1.sum()
    return np.log(p1 / p0)


def realised_arl(p_hat: np.ndarray, p_true: np.ndarray) -> float:
    """In-control ARL under ``p_true`` of the chart built and calibrated on ``p_hat``."""
    w = weights_for(p_hat)
    cal = calibrate_llr_cusum(p_hat, w, [N_PER_SHIFT], TARGET_ARL)
    lp = llr_increment_pmf(p_true, w, [N_PER_SHIFT], cal.step)
    return lattice_arl(lp, cal.h)


def study(replicates: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    k = P0.size
    rows = [{"baseline shifts": "known", "median ARL": f"{realised_arl(P0, P0):.0f}",
             "quartiles": "-", "share < 370": "-"}]
    for m in WINDOWS:
        arls = np.empty(replicates)
        for r in range(replicates):
            counts = rng.multinomial(N_PER_SHIFT, P0, size=m).sum(axis=0)
            p_hat = (counts + 0.5) / (counts.sum() + k / 2)
            arls[r] = realised_arl(p_hat, P0)
        q1, med, q3 = np.quantile(arls, [0.25, 0.5, 0.75])
        rows.append({"baseline shifts": str(m), "median ARL": f"{med:.0f}",
                     "quartiles": f"{q1:.0f} - {q3:.0f}",
                     "share < 370": f"{np.mean(arls < TARGET_ARL):.2f}"})
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench.baseline_window_study")
    parser.add_argument("--replicates", type=int, default=400)
    parser.add_argument("--seed", type=int, default=20260105)
    args = parser.parse_args(argv)
    rows = study(args.replicates, args.seed)
    cols = list(rows[0])
    print(f"in-control ARL of a CUSUM set for {TARGET_ARL:.0f} when the baseline is estimated "
          f"from m shifts of {N_PER_SHIFT} defects ({args.replicates} replicates, "
          f"seed {args.seed})")
    print(" | ".join(cols))
    for row in rows:
        print(" | ".join(row[c] for c in cols))
    return 0


if __name__ == "__main__":
    sys.exit(main())
