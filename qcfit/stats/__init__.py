"""Pure statistical core: numpy/scipy over arrays, no I/O, vectorized over many lines.

Arrays and keyword options in, frozen results out (see :mod:`qcfit.stats.results`). Imports
nothing of qcfit but :mod:`qcfit.errors`.
"""

from qcfit.stats.goodness import fit_to_baseline
from qcfit.stats.homogeneity import (
    bergsma_v,
    compare_each_to_rest,
    compare_groups,
    compare_with_rest,
    cramers_v,
)
from qcfit.stats.intervals import multinomial_intervals
from qcfit.stats.multiplicity import adjust_pvalues
from qcfit.stats.power import chisq_power, detectable_effect, sample_size_for_power
from qcfit.stats.rate import poisson_isf, poisson_rate_interval, poisson_sf, rate_test
from qcfit.stats.residuals import (
    CategoryShift,
    adjusted_residuals_gof,
    adjusted_residuals_table,
    expected_table,
    top_categories,
)
from qcfit.stats.results import EachVsRestResult, GoodnessResult, HomogeneityResult, RateResult
from qcfit.stats.sequential import (
    Concern,
    SequentialDesign,
    SequentialLimits,
    SequentialState,
    SequentialStep,
    SignalReport,
    concern_move,
    concern_share_up,
    init_state,
    make_design,
    make_limits,
    reset_lines,
    signal_reports,
    state_from_json,
    state_to_json,
    update,
)
from qcfit.stats.sequential_calibration import (
    SequentialCalibration,
    calibrate,
    calibration_key,
    conservative_limits,
)

__all__ = [
    "CategoryShift",
    "Concern",
    "SequentialCalibration",
    "SequentialDesign",
    "SequentialLimits",
    "SequentialState",
    "SequentialStep",
    "SignalReport",
    "calibrate",
    "calibration_key",
    "concern_move",
    "concern_share_up",
    "conservative_limits",
    "init_state",
    "make_design",
    "make_limits",
    "reset_lines",
    "signal_reports",
    "state_from_json",
    "state_to_json",
    "update",
    "EachVsRestResult",
    "GoodnessResult",
    "HomogeneityResult",
    "RateResult",
    "adjust_pvalues",
    "adjusted_residuals_gof",
    "adjusted_residuals_table",
    "bergsma_v",
    "chisq_power",
    "compare_each_to_rest",
    "compare_groups",
    "compare_with_rest",
    "cramers_v",
    "detectable_effect",
    "expected_table",
    "fit_to_baseline",
    "multinomial_intervals",
    "poisson_isf",
    "poisson_rate_interval",
    "poisson_sf",
    "rate_test",
    "sample_size_for_power",
    "top_categories",
]
