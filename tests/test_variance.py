"""Tests for pipeline.methods.variance.

Checks are against the formulas of DESIGN.md §4 written out independently (explicit loops),
hand-worked examples, and textbook identities (delete-one jackknife of a mean = s²/n; balanced
half-samples of a total = the paired-PSU stratified variance; successive-difference replicates of
a total = the circular successive-difference variance). Each names its source.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import hadamard

from pipeline.methods.variance import (
    REPLICATE_DESCRIPTIONS,
    ReplicateMethod,
    design_effect,
    effective_n,
    kish_effective_n,
    kish_variance,
    replicate_estimates,
    replicate_scale,
    replicate_variance,
    srs_variance,
)

# Sums of a few hundred squared O(1) terms in a different order than a loop: relative rounding
# of order 1e-15, so 1e-12 relative is tight yet safe.
REL_TOL = 1e-12


# --- Simple random sampling and Kish -------------------------------------------------------------


def test_srs_variance_without_and_with_finite_population_correction():
    # p̂q̂/n = 0.3·0.7/100 = 0.0021 (worked by hand). N = 2000 is a 5% sample: under the 10% rule
    # of thumb, no correction. N = 500 is 20%: times (1 − 0.2) = 0.00168 (DESIGN.md §4).
    p = np.array([0.3, 0.3, 0.3, 0.3])
    n = np.array([100, 100, 100, 100])
    v = srs_variance(p, n, population_size=[2000, 500, np.nan, 1000])
    assert v[0] == pytest.approx(0.0021, rel=REL_TOL)
    assert v[1] == pytest.approx(0.0021 * 0.8, rel=REL_TOL)
    assert v[2] == pytest.approx(0.0021, rel=REL_TOL)  # N unknown: no correction
    assert v[3] == pytest.approx(0.0021, rel=REL_TOL)  # exactly 10% does not exceed 10%
    np.testing.assert_allclose(srs_variance(p, n), 0.0021, rtol=REL_TOL)


def test_srs_variance_threshold_option_and_edges():
    v = srs_variance([0.5], [50], population_size=[1000], fpc_threshold=0.0)
    assert v[0] == pytest.approx(0.25 / 50 * 0.95, rel=REL_TOL)  # 5% > 0%: corrected
    assert np.isnan(srs_variance([0.5], [0])[0])
    assert srs_variance([0.0], [10])[0] == 0.0
    with pytest.raises(ValueError, match=r"fpc_threshold \(1.5\) must be in \[0, 1\]"):
        srs_variance([0.5], [10], fpc_threshold=1.5)
    with pytest.raises(ValueError, match="exceeds population_size"):
        srs_variance([0.5], [10], population_size=[5])


def test_kish_effective_n_equal_weights_and_worked_example():
    # Definition (Kish 1992): (Σw)²/Σw². Equal weights give n; weights (1, 1, 2, 4) give
    # 8²/(1 + 1 + 4 + 16) = 64/22 (by hand).
    w_equal = np.full(37, 3.5)
    w = np.array([1.0, 1.0, 2.0, 4.0])
    got = kish_effective_n([w_equal.sum(), w.sum()], [(w_equal**2).sum(), (w**2).sum()])
    assert got[0] == pytest.approx(37, rel=REL_TOL)
    assert got[1] == pytest.approx(64 / 22, rel=REL_TOL)
    assert np.isnan(kish_effective_n([0.0], [0.0])[0])


def test_kish_design_effect_is_one_plus_squared_cv_of_weights():
    # Identity (Kish 1992): n/n_eff = 1 + CV²(w), CV with the population (1/n) variance; and
    # design_effect of the Kish variance reproduces it.
    rng = np.random.default_rng(7)
    w = rng.lognormal(0.0, 0.8, size=250)
    n_eff = kish_effective_n(w.sum(), (w**2).sum())
    assert len(w) / n_eff == pytest.approx(1 + w.var() / w.mean() ** 2, rel=REL_TOL)
    v = kish_variance([0.4], [w.sum()], [(w**2).sum()])
    assert v[0] == pytest.approx(0.24 / n_eff, rel=REL_TOL)
    deff = design_effect(v, [0.4], [len(w)])
    assert deff[0] == pytest.approx(1 + w.var() / w.mean() ** 2, rel=REL_TOL)


# --- Replicate scale factors against DESIGN.md §4 -----------------------------------------------


@pytest.mark.parametrize(
    "method, kwargs, expected",
    [
        # DESIGN.md §4: successive_difference 4/R (Fay & Train 1995)
        ("successive_difference", {"replicates": 80}, 4 / 80),
        # jackknife_delete1 (R − 1)/R
        ("jackknife_delete1", {"replicates": 50}, 49 / 50),
        # brr 1/R
        ("brr", {"replicates": 16}, 1 / 16),
        # fay 1/(R(1 − ρ)²) (Judkins 1990): 1/(16·0.25) = 0.25
        ("fay", {"replicates": 16, "fay_rho": 0.5}, 0.25),
        ("fay", {"replicates": 4, "fay_rho": 0.0}, 1 / 4),  # ρ = 0 is BRR
        # custom: the factor as given
        ("custom", {"replicates": 10, "factor": 0.7}, 0.7),
    ],
)
def test_replicate_scale_matches_design_formulas(method, kwargs, expected):
    assert replicate_scale(method, **kwargs) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: replicate_scale("fay", replicates=4, fay_rho=1.2), r"fay_rho \(1.2\) must be in \[0, 1\)"),
        (lambda: replicate_scale("fay", replicates=4, fay_rho=1.0), r"fay_rho \(1.0\) must be in \[0, 1\)"),
        (lambda: replicate_scale("brr", replicates=0), r"replicates \(0\) must be >= 2"),
        (lambda: replicate_scale("brr", replicates=1), r"replicates \(1\) must be >= 2"),
        (lambda: replicate_scale("brr", replicates=2.5), r"replicates \(2.5\) must be >= 2"),
        (lambda: replicate_scale("fay", replicates=4), "needs fay_rho"),
        (lambda: replicate_scale("custom", replicates=4), "needs factor"),
        (lambda: replicate_scale("custom", replicates=4, factor=-1.0), r"factor \(-1.0\)"),
        (lambda: replicate_scale("brr", replicates=4, fay_rho=0.5), "not used by replicate method 'brr'"),
        (lambda: replicate_scale("jackknife", replicates=4), "did you mean 'jackknife_delete1'"),
    ],
)
def test_replicate_scale_rejects_bad_options(call, message):
    with pytest.raises(ValueError, match=message):
        call()


def test_unknown_replicate_method_lists_allowed_names():
    with pytest.raises(ValueError) as err:
        replicate_variance([0.5], [[0.4, 0.6]], method="bootstrapp")
    assert "'bootstrapp'" in str(err.value)
    for m in ReplicateMethod:
        assert m.value in str(err.value)


# --- replicate_variance against a direct loop ---------------------------------------------------


def loop_variance(p, reps, scale, multipliers):
    """DESIGN.md §4 written out cell by cell: v = scale · Σ_r m_r (p̂_r − p̂)²."""
    out = []
    for c in range(len(p)):
        total = 0.0
        for r in range(reps.shape[1]):
            total += multipliers[r] * (reps[c, r] - p[c]) ** 2
        out.append(scale * total)
    return np.array(out)


@pytest.mark.parametrize(
    "method, options, scale",
    [
        ("successive_difference", {}, 4 / 12),
        ("jackknife_delete1", {}, 11 / 12),
        ("brr", {}, 1 / 12),
        ("fay", {"fay_rho": 0.5}, 1 / (12 * 0.25)),
        ("custom", {"factor": 0.37}, 0.37),
    ],
)
def test_replicate_variance_against_direct_loop(method, options, scale):
    rng = np.random.default_rng(11)
    p = rng.uniform(0.05, 0.95, size=9)
    reps = np.clip(p[:, None] + rng.normal(0, 0.03, size=(9, 12)), 0, 1)
    multipliers = rng.uniform(0.5, 1.5, size=12) if method == "custom" else np.ones(12)
    kw = {"multipliers": multipliers} if method == "custom" else {}
    got = replicate_variance(p, reps, method=method, **options, **kw)
    np.testing.assert_allclose(got, loop_variance(p, reps, scale, multipliers), rtol=REL_TOL)


def test_nan_replicate_contributes_zero_and_nan_p_hat_gives_nan():
    # Documented convention: a replicate with zero base weight (0/0 estimate) adds nothing.
    reps = replicate_estimates([[1.0, 0.0, 3.0, 2.0], [1.0, 1.0, 1.0, 1.0]],
                               [[4.0, 0.0, 4.0, 4.0], [2.0, 2.0, 2.0, 2.0]])
    assert np.isnan(reps[0, 1]) and reps[0, 0] == 0.25 and reps[0, 2] == 0.75
    v = replicate_variance([0.5, np.nan], reps, method="brr")
    # By hand: (1/4)·((0.25 − 0.5)² + 0 + (0.75 − 0.5)² + (0.5 − 0.5)²) = 0.03125
    assert v[0] == pytest.approx(0.03125, rel=REL_TOL)
    assert np.isnan(v[1])


def test_replicate_variance_rejects_bad_shapes_and_multipliers():
    with pytest.raises(ValueError, match="expected \\(cells, R\\)"):
        replicate_variance([0.5, 0.5], [[0.4, 0.6]], method="brr")
    with pytest.raises(ValueError, match="one per replicate"):
        replicate_variance([0.5], [[0.4, 0.6]], method="custom", factor=1.0, multipliers=[1.0])
    with pytest.raises(ValueError, match="finite and >= 0"):
        replicate_variance([0.5], [[0.4, 0.6]], method="custom", factor=1.0,
                           multipliers=[1.0, -1.0])
    with pytest.raises(ValueError, match="shape"):
        replicate_estimates([[1.0, 2.0]], [[1.0, 2.0, 3.0]])


# --- Identities ----------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["binary", "continuous"])
def test_delete_one_jackknife_of_a_mean_is_s2_over_n(kind):
    # Identity (Quenouille/Tukey; Wolter 2007 ch. 4): delete-1 replicate weights (0 for the
    # deleted record, n/(n − 1) for the others) give v_J = ((n − 1)/n) Σ (ȳ_(i) − ȳ)² = s²/n,
    # s² with the n − 1 denominator. Built from records, through replicate_estimates.
    rng = np.random.default_rng(3)
    n = 41
    y = rng.integers(0, 2, n).astype(float) if kind == "binary" else rng.normal(5, 2, n)
    weights = np.full((n, n), n / (n - 1))  # weights[record, replicate]
    np.fill_diagonal(weights, 0.0)
    sum_w_r = weights.sum(axis=0)[None, :]
    sum_wy_r = (weights * y[:, None]).sum(axis=0)[None, :]
    reps = replicate_estimates(sum_wy_r, sum_w_r)
    v = replicate_variance([y.mean()], reps, method="jackknife_delete1")
    assert v[0] == pytest.approx(y.var(ddof=1) / n, rel=REL_TOL)


@pytest.mark.parametrize("method, rho", [("brr", None), ("fay", 0.5), ("fay", 0.3)])
def test_half_samples_of_a_total_equal_paired_psu_variance(method, rho):
    # Identity (McCarthy 1969; Wolter 2007 ch. 3): with 2 PSUs per stratum and a full orthogonal
    # (Hadamard) balance, BRR and Fay replicates of a linear estimator (a total) reproduce
    # v = Σ_h (t_h1 − t_h2)² exactly. Replicate r scales PSU 1 of stratum h by 1 + (1−ρ)·H[r, h]
    # and PSU 2 by 1 − (1−ρ)·H[r, h] (ρ = 0 for BRR).
    rng = np.random.default_rng(5)
    strata, r = 7, 8
    h = hadamard(r)
    t = rng.gamma(3.0, 50.0, size=(strata, 2))  # weighted PSU totals t_hi
    k = 1.0 - (rho or 0.0)
    full = t.sum()
    reps = np.array([
        sum(t[s, 0] * (1 + k * h[rep, s]) + t[s, 1] * (1 - k * h[rep, s]) for s in range(strata))
        for rep in range(r)
    ])
    options = {"fay_rho": rho} if method == "fay" else {}
    v = replicate_variance([full], reps[None, :], method=method, **options)
    assert v[0] == pytest.approx(((t[:, 0] - t[:, 1]) ** 2).sum(), rel=REL_TOL)


def test_successive_difference_of_a_total_equals_circular_successive_differences():
    # Identity (factors as in Fay & Train 1995, DESIGN.md §4; derived from row orthogonality): with
    # f_ir = 1 + 2^(-3/2)·H[a_i, r] − 2^(-3/2)·H[b_i, r], a_i = i, b_i = i + 1 (mod m), and
    # m <= R distinct Hadamard rows, the 4/R replicate variance of a total is
    # ½ Σ_i (t_i − t_{i+1})² around the circle (row orthogonality: Σ_r H[i, r]H[j, r] = R·[i=j]).
    rng = np.random.default_rng(9)
    m, r = 13, 16
    h = hadamard(r)
    t = rng.gamma(2.0, 30.0, size=m)
    a = np.arange(m)
    b = (a + 1) % m
    factors = 1 + 2 ** -1.5 * h[a, :] - 2 ** -1.5 * h[b, :]  # (clusters, replicates)
    reps = (t[:, None] * factors).sum(axis=0)
    v = replicate_variance([t.sum()], reps[None, :], method="successive_difference")
    assert v[0] == pytest.approx(0.5 * ((t - np.roll(t, -1)) ** 2).sum(), rel=REL_TOL)


# --- Design effect and effective n ---------------------------------------------------------------


def test_design_effect_and_effective_n_on_srs_variance():
    # Identity: the SRS variance has design effect 1 and effective n = n.
    p = np.array([0.1, 0.5, 0.77])
    n = np.array([30.0, 200.0, 1234.0])
    v = srs_variance(p, n)
    np.testing.assert_allclose(design_effect(v, p, n), 1.0, rtol=REL_TOL)
    np.testing.assert_allclose(effective_n(v, p, n), n, rtol=REL_TOL)


def test_design_effect_and_effective_n_worked_example_and_cap():
    # By hand: p̂ = 0.2, n = 100, v = 0.0032 -> deff = 0.0032/0.0016 = 2, n_eff = 0.16/0.0032 = 50.
    assert design_effect([0.0032], [0.2], [100])[0] == pytest.approx(2.0, rel=REL_TOL)
    assert effective_n([0.0032], [0.2], [100])[0] == pytest.approx(50.0, rel=REL_TOL)
    # v smaller than SRS (deff 0.5) would give 200 > n: capped at n (DESIGN.md §4).
    assert effective_n([0.0008], [0.2], [100])[0] == 100.0


def test_design_effect_and_effective_n_edges():
    # DESIGN.md §4: v = 0 -> effective n = n; p̂q̂ = 0 -> design effect undefined (NaN).
    assert effective_n([0.0], [0.3], [40])[0] == 40.0
    assert effective_n([0.0], [0.0], [40])[0] == 40.0
    assert effective_n([0.0], [1.0], [40])[0] == 40.0
    assert np.isnan(design_effect([0.0], [0.0], [40])[0])
    assert np.isnan(design_effect([0.0], [1.0], [40])[0])
    assert np.isnan(design_effect([0.01], [0.3], [0])[0])
    assert np.isnan(effective_n([np.nan], [0.3], [40])[0])


def test_every_replicate_method_is_described():
    assert set(REPLICATE_DESCRIPTIONS) == {m.value for m in ReplicateMethod}
    assert all(len(text) > 20 and "\n" not in text for text in REPLICATE_DESCRIPTIONS.values())


# --- Stratified jackknife and bootstrap ---------------------------------------------------------


def test_stratified_jackknife_equals_its_definition_on_a_mean():
    # Two strata of 3 and 4 clusters, each a single record with value y; the delete-one-cluster
    # stratified jackknife of the weighted mean with multipliers (n_h−1)/n_h (Wolter 2007, ch. 4)
    # equals, for a stratified total, Σ_h (n_h/(n_h−1))·Σ_i (t_hi − t̄_h)² scaled to the mean.
    rng = np.random.default_rng(11)
    strata = np.array([0, 0, 0, 1, 1, 1, 1])
    y = rng.uniform(0, 1, 7)
    w = np.array([2.0, 2.0, 2.0, 3.0, 3.0, 3.0, 3.0])
    n_h = np.bincount(strata)
    reps, mult = [], []
    for i in range(7):
        h = strata[i]
        wr = w.copy()
        same = strata == h
        wr[same] *= n_h[h] / (n_h[h] - 1)
        wr[i] = 0.0
        reps.append((wr * y).sum() / wr.sum())
        mult.append((n_h[h] - 1) / n_h[h])
    p = (w * y).sum() / w.sum()
    v = replicate_variance([p], np.array([reps]), method="jackknife_stratified", multipliers=mult)[0]
    direct = sum(mult[i] * (reps[i] - p) ** 2 for i in range(7))
    assert v == pytest.approx(direct, rel=1e-12)
    with pytest.raises(ValueError, match="needs multipliers"):
        replicate_variance([p], np.array([reps]), method="jackknife_stratified")


def test_bootstrap_is_centred_on_the_replicate_mean():
    # Classic bootstrap variance: (1/(R−1)) Σ (θ_r − θ̄)² — numpy's var with ddof=1 (Efron 1979).
    rng = np.random.default_rng(5)
    reps = rng.uniform(0.2, 0.4, size=(3, 50))
    v = replicate_variance([0.3, 0.31, 0.29], reps, method="bootstrap")
    np.testing.assert_allclose(v, reps.var(axis=1, ddof=1), rtol=1e-12)
