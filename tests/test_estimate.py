"""The estimate stage: p̂, variance, design effect, effective n, interval and margin of error
from cell statistics, checked against the defining formulas (DESIGN §4) and statsmodels."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm
from statsmodels.stats.proportion import proportion_confint

from pipeline.config import load_config
from pipeline.stages.aggregate import CellTable
from pipeline.stages.estimate import estimate
from tests.conftest import demo_settings, write_config


def config_with(tmp_path, **design):
    settings = demo_settings()
    settings["design"] = {"weight": "wt", **design}
    return load_config(write_config(tmp_path / "c.yaml", settings))


def table(rows, replicate_base=None, replicate_count=None):
    f = pd.DataFrame(rows, columns=["sample_size", "respondents", "weighted_base", "weighted_count",
                                    "sum_squared_weights"])
    return CellTable(frame=f, replicate_base=replicate_base, replicate_count=replicate_count)


def test_simple_random_matches_statsmodels_wilson(tmp_path):
    config = config_with(tmp_path, variance="simple_random")
    # equal weights of 1: Σw = n, Σwy = x
    rows = [(263, 81, 263, 81, 263), (148, 15, 148, 15, 148), (20, 0, 20, 0, 20), (29, 29, 29, 29, 29)]
    out = estimate(table(rows), config)
    x = np.array([81, 15, 0, 29])
    n = np.array([263, 148, 20, 29])
    lower, upper = proportion_confint(x, n, alpha=0.05, method="wilson")
    np.testing.assert_allclose(out["ci_lower"], lower, atol=1e-12)
    np.testing.assert_allclose(out["ci_upper"], upper, atol=1e-12)
    p = x / n
    np.testing.assert_allclose(out["std_error"], np.sqrt(p * (1 - p) / n), rtol=1e-12)
    # margin of error at 90%: z = Φ⁻¹(0.95) = 1.6449 (scipy's normal quantile)
    np.testing.assert_allclose(out["margin_of_error"], norm.ppf(0.95) * out["std_error"], rtol=1e-12)
    np.testing.assert_allclose(out["design_effect"][:2], 1.0, rtol=1e-12)
    assert np.isnan(out["cv"].iloc[2])  # p̂ = 0: no coefficient of variation


def test_kish_uses_effective_n_in_the_interval(tmp_path):
    config = config_with(tmp_path, variance="kish")
    # weights (1, 1, 2, 4) repeated 25 times: n = 100, Σw = 200, Σw² = 550, n_eff = 200²/550 (Kish 1992)
    rows = [(100, 30, 200.0, 70.0, 550.0)]
    out = estimate(table(rows), config).iloc[0]
    n_eff = 200.0 ** 2 / 550.0
    p = 70.0 / 200.0
    assert out["effective_n"] == pytest.approx(n_eff, rel=1e-12)
    assert out["std_error"] ** 2 == pytest.approx(p * (1 - p) / n_eff, rel=1e-12)
    assert out["design_effect"] == pytest.approx(100 / n_eff, rel=1e-12)
    lower, upper = proportion_confint(p * n_eff, n_eff, alpha=0.05, method="wilson")
    assert (out["ci_lower"], out["ci_upper"]) == pytest.approx((lower, upper), abs=1e-12)


@pytest.mark.parametrize("method,scale", [("successive_difference", 4 / 4), ("jackknife_delete1", 3 / 4),
                                          ("brr", 1 / 4)])
def test_replicate_variance_from_replicate_sums(tmp_path, method, scale):
    config = config_with(tmp_path, variance="replicate", replicates={"prefix": "rw", "count": 4, "method": method})
    base = np.array([[90.0, 110.0, 100.0, 100.0]])
    count = np.array([[30.0, 40.0, 33.0, 37.0]])
    out = estimate(table([(50, 17, 100.0, 35.0, 250.0)], base, count), config).iloc[0]
    p_r = count[0] / base[0]
    # DESIGN §4: v = factor · Σ_r (p̂_r − p̂)², factor 4/R, (R−1)/R or 1/R with R = 4
    expected = scale * np.sum((p_r - 0.35) ** 2)
    assert out["variance"] == pytest.approx(expected, rel=1e-12)
    assert out["effective_n"] == pytest.approx(min(50, 0.35 * 0.65 / expected), rel=1e-12)


def test_replicate_variance_in_slices_of_cells_is_the_formula_cell_by_cell(tmp_path, monkeypatch):
    # slices of 2 cells over 5 cells: every slice boundary is crossed; DESIGN §4 with factor 4/R
    monkeypatch.setattr("pipeline.stages.estimate._CELLS_PER_SLICE", 2)
    config = config_with(tmp_path, variance="replicate",
                         replicates={"prefix": "rw", "count": 4, "method": "successive_difference"})
    rng = np.random.default_rng(5)
    base = rng.uniform(80, 120, (5, 4))
    count = base * rng.uniform(0.2, 0.5, (5, 4))
    rows = [(50, 17, 100.0, 30.0 + i, 250.0) for i in range(5)]
    out = estimate(table(rows, base, count), config)
    p_hat = (30.0 + np.arange(5)) / 100.0
    expected = ((count / base - p_hat[:, None]) ** 2).sum(axis=1)
    np.testing.assert_allclose(out["variance"], expected, rtol=1e-12)


def test_empty_cell_has_no_figures(tmp_path):
    config = config_with(tmp_path, variance="kish")
    out = estimate(table([(0, 0, 0.0, 0.0, 0.0)]), config).iloc[0]
    for col in ("estimate", "std_error", "ci_lower", "ci_upper", "margin_of_error", "cv", "design_effect"):
        assert np.isnan(out[col]), col


def test_simple_random_finite_population_correction(tmp_path):
    # Common practice: correct by (1 − n/N) only when the sample exceeds 10% of the population
    # (Cochran 1977, Sampling Techniques, ch. 3); N unknown (NaN) means no correction.
    config = config_with(tmp_path, variance="simple_random")
    rows = [(100, 40, 100.0, 40.0, 100.0)] * 3
    cells = table(rows)
    cells.frame["population"] = [500.0, 2000.0, np.nan]  # n/N = 20%, 5%, unknown
    out = estimate(cells, config)
    srs = 0.4 * 0.6 / 100
    np.testing.assert_allclose(out["variance"], [srs * (1 - 100 / 500), srs, srs], rtol=1e-12)


def test_degrees_of_freedom_by_method(tmp_path):
    rows = [(50, 17, 100.0, 35.0, 250.0)]
    reps = np.full((1, 4), 100.0), np.full((1, 4), 35.0)
    assert estimate(table(rows), config_with(tmp_path, variance="kish"))["degrees_of_freedom"].iloc[0] == 49
    rep_config = config_with(tmp_path, variance="replicate",
                             replicates={"prefix": "rw", "count": 4, "method": "jackknife_delete1"})
    assert estimate(table(rows, *reps), rep_config)["degrees_of_freedom"].iloc[0] == 3
    fixed = config_with(tmp_path, variance="kish", degrees_of_freedom=12)
    assert estimate(table(rows), fixed)["degrees_of_freedom"].iloc[0] == 12


def test_korn_graubard_through_the_stage(tmp_path):
    # Korn & Graubard 1998: Clopper–Pearson on n* = n_eff (t_{n−1}/t_df)², x* = p̂ n*;
    # computed here straight from scipy's t and beta quantiles.
    from scipy.stats import beta, t

    settings = demo_settings()
    settings["design"] = {"weight": "wt", "variance": "kish", "degrees_of_freedom": 20}
    settings["estimation"]["interval"] = "korn_graubard"
    config = load_config(write_config(tmp_path / "kg.yaml", settings))
    out = estimate(table([(100, 30, 200.0, 70.0, 550.0)]), config).iloc[0]
    n_eff = 200.0 ** 2 / 550.0
    n_star = n_eff * (t.ppf(0.975, 99) / t.ppf(0.975, 20)) ** 2
    x_star = 0.35 * n_star
    assert out["ci_lower"] == pytest.approx(beta.ppf(0.025, x_star, n_star - x_star + 1), rel=1e-10)
    assert out["ci_upper"] == pytest.approx(beta.ppf(0.975, x_star + 1, n_star - x_star), rel=1e-10)
