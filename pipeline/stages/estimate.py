"""Estimate: p̂, its design-based variance, standard error, design effect, effective n, the
confidence interval and the margin of error, for every rolled-up cell.

Computed from the cell statistics alone (DESIGN §2). The math is in pipeline.methods.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.methods import intervals, variance
from pipeline.stages.aggregate import CellTable


# Cells per slice of the replicate-variance computation (with 80 replicates, 40 MiB per array).
_CELLS_PER_SLICE = 65_536


def estimate(cells: CellTable, config) -> pd.DataFrame:
    f = cells.frame.copy()
    n = f["sample_size"].to_numpy(dtype=np.float64)
    base = f["weighted_base"].to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        p_hat = np.where(base > 0, f["weighted_count"].to_numpy() / base, np.nan)
    lin = linearization(cells, config) if config.design.variance == "linearization" else None
    v = cell_variance(cells, config, p_hat=p_hat, n=n, lin=lin)
    se = np.sqrt(v)
    n_eff = variance.effective_n(v, p_hat, n)
    f["estimate"] = p_hat
    f["variance"] = v
    f["degrees_of_freedom"] = cell_degrees_of_freedom(cells, config, n=n, lin=lin)
    f["std_error"] = se
    f["effective_n"] = n_eff
    f = with_interval(f, config)
    f["margin_of_error"] = intervals.z_value(config.estimation.margin_confidence) * se
    with np.errstate(invalid="ignore", divide="ignore"):
        f["cv"] = np.where(p_hat > 0, se / p_hat, np.nan)
    f["design_effect"] = variance.design_effect(v, p_hat, n)
    return f[[c for c in f.columns if c != "effective_n"] + ["effective_n"]]


def with_interval(frame: pd.DataFrame, config) -> pd.DataFrame:
    """`frame` (holding estimate, effective_n, std_error, degrees_of_freedom, sample_size) with
    ci_lower and ci_upper by the configured interval method. Apart from the other estimates, so a
    study can try several interval methods on one variance computation."""
    est = config.estimation
    interval = intervals.proportion_interval(
        frame["estimate"].to_numpy(), frame["effective_n"].to_numpy(), method=est.interval,
        confidence=est.confidence, std_error=frame["std_error"].to_numpy(),
        df=frame["degrees_of_freedom"].to_numpy(), sample_size=frame["sample_size"].to_numpy(dtype=np.float64))
    return frame.assign(ci_lower=interval.lower, ci_upper=interval.upper)


def cell_variance(cells: CellTable, config, *, p_hat: np.ndarray, n: np.ndarray,
                  lin: variance.LinearizationVariance | None = None) -> np.ndarray:
    """Variance of p̂ by the configured method; NaN where the cell has no sample. `lin` is the
    linearization result when already computed (it also gives the degrees of freedom)."""
    method = config.design.variance
    if method == "simple_random":
        # finite population correction where the lookup gives the population and n/N > 10%
        v = variance.srs_variance(p_hat, n, population_size=cells.frame.get("population"))
    elif method == "kish":
        v = variance.kish_variance(p_hat, cells.frame["weighted_base"].to_numpy(),
                                   cells.frame["sum_squared_weights"].to_numpy())
    elif method == "replicate":
        reps = config.design.replicates
        v = np.empty(len(p_hat))
        # in slices of cells: the replicate estimates and their squared deviations are cells × R
        # arrays each, several at once, which for a national table would outgrow the sums themselves
        for start in range(0, len(p_hat), _CELLS_PER_SLICE):
            part = slice(start, start + _CELLS_PER_SLICE)
            p_rep = variance.replicate_estimates(cells.replicate_count[part], cells.replicate_base[part])
            v[part] = variance.replicate_variance(p_hat[part], p_rep, method=reps.method, fay_rho=reps.fay_rho,
                                                  factor=reps.factor, multipliers=reps.multipliers)
    elif method == "linearization":
        v = (lin or linearization(cells, config)).variance
    else:  # the config only admits the methods above
        raise AssertionError(f"design.variance {method!r} has no estimator")
    return np.where(n > 0, v, np.nan)


def cell_degrees_of_freedom(cells: CellTable, config, *, n: np.ndarray,
                            lin: variance.LinearizationVariance | None = None) -> np.ndarray:
    """Design degrees of freedom per cell (for Korn–Graubard and the df review rule):
    design.degrees_of_freedom when given; n − 1 for simple_random and kish; R − 1 for replicate
    weights (common practice for replicate designs; set design.degrees_of_freedom to the
    design's own value, e.g. clusters − strata, where it is known)."""
    design = config.design
    method = design.variance
    if design.degrees_of_freedom is not None:
        df = np.full(len(n), float(design.degrees_of_freedom))
    elif method in ("simple_random", "kish"):
        df = n - 1.0
    elif method == "replicate":
        df = np.full(len(n), float(design.replicates.count - 1))
    elif method == "linearization":
        # clusters − strata holding base records of the cell, at least 1 (DESIGN §4)
        df = (lin or linearization(cells, config)).degrees_of_freedom
    else:  # the config only admits the methods above
        raise AssertionError(f"design.variance {method!r} has no degrees of freedom")
    return np.where(n > 0, df, np.nan)


def linearization(cells: CellTable, config) -> variance.LinearizationVariance:
    """Taylor-linearization variance and degrees of freedom of every cell, from the rolled
    per-cluster sums (Woodruff 1971; Binder 1983). Ingest has already stopped a design that
    single_cluster_strata 'error' or the population_clusters rules refuse."""
    totals = cells.clusters
    if totals is None:  # roll_up fills it whenever the batches carry a design
        raise AssertionError("design.variance is 'linearization' but the cells carry no cluster sums")
    lin = config.design.linearization
    return variance.linearization_variance(
        totals.weighted_count, totals.weighted_base, cluster_stratum=totals.cluster_stratum,
        population_clusters=totals.population_clusters, single_cluster_strata=lin.single_cluster_strata,
        stratum_labels=totals.strata)
