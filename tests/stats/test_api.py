"""The public API of qcfit.stats and the import rule of the pure core."""

import ast
from pathlib import Path

import numpy as np

import qcfit.stats
from qcfit.stats import fit_to_baseline

CONTRACT = {
    "fit_to_baseline", "compare_groups", "compare_each_to_rest", "adjust_pvalues",
    "chisq_power", "sample_size_for_power", "detectable_effect", "multinomial_intervals",
    "rate_test", "poisson_rate_interval", "top_categories", "GoodnessResult",
    "HomogeneityResult", "EachVsRestResult", "RateResult",
}
MODULES = ["_checks", "_enumerate", "goodness", "homogeneity", "intervals", "multiplicity",
           "power", "pvalues", "rate", "residuals", "results"]


def test_contract_names_are_exported():
    assert CONTRACT <= set(qcfit.stats.__all__)
    for name in qcfit.stats.__all__:
        assert hasattr(qcfit.stats, name), name


def test_core_modules_import_only_errors_of_qcfit():
    root = Path(qcfit.stats.__file__).parent
    for name in MODULES:
        tree = ast.parse((root / f"{name}.py").read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module:
                mods = [node.module]
            elif isinstance(node, ast.Import):
                mods = [a.name for a in node.names]
            else:
                continue
            for mod in mods:
                if mod.startswith("qcfit"):
                    assert mod == "qcfit.errors" or mod.startswith("qcfit.stats"), (name, mod)
                assert not mod.startswith(("sqlalchemy", "pandas", "datetime")), (name, mod)


def test_per_line_baselines_in_one_batch():
    rng = np.random.default_rng(8)
    p0 = rng.dirichlet(np.full(5, 2.0), size=6)
    n = np.array([8, 15, 40, 120, 0, 15])
    obs = np.array([rng.multinomial(k, p) for k, p in zip(n, p0, strict=True)])
    batch = fit_to_baseline(obs, p0, seed=3)
    for i in range(6):
        single = fit_to_baseline(obs[i], p0[i], seed=3)
        assert batch.row(i).method == single.method
        np.testing.assert_equal(batch.pvalue[i], single.pvalue)
