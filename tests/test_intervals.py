"""Tests for pipeline.methods.intervals.

Every expected value names its source: Newcombe 1998 (Statistics in Medicine 17:857, Table I),
scipy.stats.binomtest(...).proportion_ci, statsmodels.stats.proportion.proportion_confint, or an
identity. Tolerances say why they are what they are.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.proportion import proportion_confint

from pipeline.methods.intervals import (
    METHOD_DESCRIPTIONS,
    Interval,
    IntervalMethod,
    proportion_interval,
    z_value,
)

# Newcombe 1998 Table I is printed to 4 decimals, so a correct value is within half a unit in
# the last place of the printed one.
TABLE_TOL = 5e-5
# Closed forms evaluated in a different but algebraically equal order: a few ulps of values
# that are O(1), far below 1e-10.
CLOSED_FORM_TOL = 1e-10
# scipy's 'exact' limits come from brentq root finding on the binomial cdf with scipy's default
# xtol = 2e-12 (absolute), so scipy itself only promises ~2e-12; 1e-11 leaves room for that and
# for rounding in the cdf, while any real formula slip is orders of magnitude larger.
ROOT_FINDING_TOL = 1e-11

LEVELS = (0.80, 0.90, 0.95, 0.99)
GRID_N = (1, 2, 5, 10, 29, 100, 1000)


def grid_counts(n: int) -> np.ndarray:
    """Every x for small n; for large n the ends and a spread of interior counts."""
    if n <= 29:
        return np.arange(n + 1)
    return np.unique(np.array([0, 1, 2, n // 10, n // 3, n // 2, n - 2, n - 1, n]))


def interval(x, n, method, confidence=0.95, **kw) -> Interval:
    x = np.asarray(x, dtype=float)
    n = np.broadcast_to(np.asarray(n, dtype=float), x.shape)
    return proportion_interval(x / n, n, method=method, confidence=confidence, **kw)


# --- Published values ---------------------------------------------------------------------------

NEWCOMBE_TABLE_I = [
    # (x, n, method, lower, upper) -- Newcombe 1998, Stat. Med. 17:857, Table I, 95%
    (81, 263, "wilson", 0.2553, 0.3662),
    (81, 263, "wilson_cc", 0.2535, 0.3682),
    (81, 263, "clopper_pearson", 0.2527, 0.3676),
    (15, 148, "wilson", 0.0624, 0.1605),
    (0, 20, "wilson", 0.0000, 0.1611),
    (0, 20, "clopper_pearson", 0.0000, 0.1684),
    (1, 29, "wilson", 0.0061, 0.1718),
    (1, 29, "clopper_pearson", 0.0009, 0.1776),
]


@pytest.mark.parametrize("x, n, method, lower, upper", NEWCOMBE_TABLE_I)
def test_newcombe_1998_table_1(x, n, method, lower, upper):
    iv = interval([x], n, method)
    assert iv.lower[0] == pytest.approx(lower, abs=TABLE_TOL)  # Newcombe 1998 Table I
    assert iv.upper[0] == pytest.approx(upper, abs=TABLE_TOL)  # Newcombe 1998 Table I


def test_z_value_matches_normal_quantile():
    # 1.959963984540054 is the 97.5% normal quantile (from memory); scipy.stats.norm is the
    # reference. Both are the same double up to the last ulp or two of the quantile routine.
    assert z_value(0.95) == pytest.approx(1.959963984540054, rel=1e-15)
    for level in LEVELS:
        assert z_value(level) == pytest.approx(stats.norm.ppf(0.5 + level / 2), rel=1e-14)


# --- scipy.stats.binomtest ----------------------------------------------------------------------

SCIPY_METHODS = [
    # (ours, scipy's proportion_ci method, tolerance)
    ("wilson", "wilson", CLOSED_FORM_TOL),
    ("wilson_cc", "wilsoncc", CLOSED_FORM_TOL),
    ("clopper_pearson", "exact", ROOT_FINDING_TOL),
]


@pytest.mark.parametrize("ours, theirs, tol", SCIPY_METHODS)
@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("n", GRID_N)
def test_against_scipy_binomtest(ours, theirs, tol, level, n):
    xs = grid_counts(n)
    iv = interval(xs, n, ours, level)
    for i, x in enumerate(xs):
        ref = stats.binomtest(int(x), n).proportion_ci(confidence_level=level, method=theirs)
        assert iv.lower[i] == pytest.approx(ref.low, abs=tol), (x, n, level)  # scipy binomtest
        assert iv.upper[i] == pytest.approx(ref.high, abs=tol), (x, n, level)  # scipy binomtest


# --- statsmodels proportion_confint -------------------------------------------------------------

STATSMODELS_METHODS = [
    # (ours, statsmodels' method). Both sides evaluate the same closed form or the same
    # scipy.stats.beta quantile, so agreement is to rounding: CLOSED_FORM_TOL.
    ("wald", "normal"),
    ("wilson", "wilson"),
    ("clopper_pearson", "beta"),
    ("agresti_coull", "agresti_coull"),
    ("jeffreys", "jeffreys"),
]


@pytest.mark.parametrize("ours, theirs", STATSMODELS_METHODS)
@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("n", GRID_N)
def test_against_statsmodels_proportion_confint(ours, theirs, level, n):
    xs = grid_counts(n)
    iv = interval(xs, n, ours, level)
    lo, hi = proportion_confint(xs, np.full(xs.shape, n), alpha=1 - level, method=theirs)
    # Our Wald is clipped to [0, 1]; statsmodels' 'normal' is clipped in some versions only.
    lo, hi = np.clip(lo, 0, 1), np.clip(hi, 0, 1)
    if ours == "jeffreys":
        # Brown, Cai & DasGupta 2001 §4.1.2 modify Jeffreys at the ends (lower 0 at x = 0, upper
        # 1 at x = n); statsmodels returns the unmodified Beta quantiles there.
        lo = np.where(xs == 0, 0.0, lo)
        hi = np.where(xs == n, 1.0, hi)
    np.testing.assert_allclose(iv.lower, lo, rtol=0, atol=CLOSED_FORM_TOL)  # statsmodels
    np.testing.assert_allclose(iv.upper, hi, rtol=0, atol=CLOSED_FORM_TOL)  # statsmodels


@pytest.mark.parametrize("ours, theirs", [("wilson", "wilson"), ("clopper_pearson", "beta"),
                                          ("wald", "normal"), ("jeffreys", "jeffreys")])
def test_non_integer_effective_n_against_statsmodels(ours, theirs):
    # statsmodels' closed forms and Beta quantiles accept real count and nobs, so they are an
    # outside reference for x = p̂·n_eff with fractional n_eff (same tolerance as above).
    n = np.array([0.7, 1.3, 4.6, 12.7, 87.25, 263.5])
    p = np.array([0.4, 0.5, 0.13, 0.3, 0.91, 81 / 263])
    iv = proportion_interval(p, n, method=ours, confidence=0.9)
    lo, hi = proportion_confint(p * n, n, alpha=0.1, method=theirs)
    np.testing.assert_allclose(iv.lower, np.clip(lo, 0, 1), rtol=0, atol=CLOSED_FORM_TOL)
    np.testing.assert_allclose(iv.upper, np.clip(hi, 0, 1), rtol=0, atol=CLOSED_FORM_TOL)


def test_wald_uses_design_standard_error_when_given():
    # Identity: p̂ ± z·SE with the supplied SE, n_eff not used for the width.
    p = np.array([0.2, 0.5, 0.02])
    se = np.array([0.05, 0.01, 0.03])
    iv = proportion_interval(p, [100, 100, 100], method="wald", std_error=se, confidence=0.9)
    z = stats.norm.ppf(0.95)
    np.testing.assert_allclose(iv.lower, np.clip(p - z * se, 0, 1), rtol=0, atol=1e-15)
    np.testing.assert_allclose(iv.upper, np.clip(p + z * se, 0, 1), rtol=0, atol=1e-15)
    assert iv.lower[2] == 0.0  # clipped, as documented


# --- Korn-Graubard (identities) -----------------------------------------------------------------


def test_korn_graubard_reduces_to_clopper_pearson_when_df_is_n_minus_1():
    # Identity: with df = n − 1 the factor (t_{n−1}/t_{df})² is exactly 1 (Korn & Graubard 1998).
    n = np.array([10.0, 29.0, 263.0, 1000.0])
    p = np.array([0.0, 1 / 29, 81 / 263, 1.0])
    kg = proportion_interval(p, n, method="korn_graubard", df=n - 1, sample_size=n)
    cp = proportion_interval(p, n, method="clopper_pearson")
    np.testing.assert_array_equal(kg.lower, cp.lower)
    np.testing.assert_array_equal(kg.upper, cp.upper)


def test_korn_graubard_matches_its_formula_and_widens_with_fewer_df():
    # Reference: the Korn & Graubard 1998 formula written out with scipy.stats t and beta.
    p, n_eff, n, df = 0.12, 140.0, 400.0, 15.0
    n_star = n_eff * (stats.t.ppf(0.975, n - 1) / stats.t.ppf(0.975, df)) ** 2
    x_star = p * n_star
    ref_lo = stats.beta.ppf(0.025, x_star, n_star - x_star + 1)
    ref_hi = stats.beta.ppf(0.975, x_star + 1, n_star - x_star)
    iv = proportion_interval([p], [n_eff], method="korn_graubard", df=[df], sample_size=[n])
    # ppf(0.975) vs our isf(0.025) of the same Beta: rounding only.
    assert iv.lower[0] == pytest.approx(ref_lo, abs=CLOSED_FORM_TOL)
    assert iv.upper[0] == pytest.approx(ref_hi, abs=CLOSED_FORM_TOL)
    wider = proportion_interval([p], [n_eff], method="korn_graubard", df=[5.0], sample_size=[n])
    assert wider.lower[0] < iv.lower[0] and wider.upper[0] > iv.upper[0]


def test_korn_graubard_needs_df_and_gives_nan_for_unusable_df():
    with pytest.raises(ValueError, match="needs df"):
        proportion_interval([0.1], [50], method="korn_graubard", sample_size=[50])
    iv = proportion_interval([0.1, 0.1], [50, 50], method="korn_graubard", df=[0, 10],
                             sample_size=[50, 50])
    assert np.isnan(iv.lower[0]) and np.isnan(iv.upper[0])
    assert np.isfinite(iv.lower[1]) and np.isfinite(iv.upper[1])


# --- Edges and invariants -----------------------------------------------------------------------

ALL_METHODS = [m.value for m in IntervalMethod]
KG_EXTRAS = {"df": 8.0, "sample_size": 1000.0}


def extras_for(method: str) -> dict:
    return KG_EXTRAS if method == "korn_graubard" else {}


@pytest.mark.parametrize("method", ["wilson", "wilson_cc", "clopper_pearson", "jeffreys",
                                    "korn_graubard", "logit"])
def test_x_zero_gives_lower_zero_and_x_n_gives_upper_one(method):
    # Exact equality, not approximate: published tables print 0.0000 / 1.0000 and rules that
    # test "lower == 0" must see it (DESIGN.md §4).
    n = np.array([1.0, 20.0, 29.0, 12.7, 1000.0])
    zero = proportion_interval(np.zeros_like(n), n, method=method, **extras_for(method))
    full = proportion_interval(np.ones_like(n), n, method=method, **extras_for(method))
    assert np.all(zero.lower == 0.0)
    assert np.all(full.upper == 1.0)
    assert np.all(zero.upper > 0.0) and np.all(full.lower < 1.0)


@pytest.mark.parametrize("method", ALL_METHODS)
@pytest.mark.parametrize("level", LEVELS)
def test_bounds_inside_unit_interval_and_contain_p_hat(method, level):
    rng = np.random.default_rng(20240601)
    n = np.concatenate([rng.uniform(0.2, 5, 200), rng.uniform(5, 3000, 200), [1, 2, 3]])
    p = np.concatenate([rng.uniform(0, 1, 400), [0.0, 1.0, 0.5]])
    p[::37] = 0.0
    p[::41] = 1.0
    iv = proportion_interval(p, n, method=method, confidence=level, **extras_for(method))
    assert np.all(np.isfinite(iv.lower)) and np.all(np.isfinite(iv.upper))
    assert np.all((0.0 <= iv.lower) & (iv.lower <= p) & (p <= iv.upper) & (iv.upper <= 1.0))


def assert_nested_as_n_grows(method, p_value, n, strict_width=True):
    iv = proportion_interval(np.full(n.shape, p_value), n, method=method, **extras_for(method))
    # 1e-15: consecutive grid points can give bounds equal up to rounding.
    assert np.all(np.diff(iv.lower) >= -1e-15), (method, p_value)
    assert np.all(np.diff(iv.upper) <= 1e-15), (method, p_value)
    width_step = np.diff(iv.upper - iv.lower)
    assert np.all(width_step < 0 if strict_width else width_step <= 1e-15), (method, p_value)


@pytest.mark.parametrize("method", ["wilson", "clopper_pearson", "agresti_coull", "korn_graubard"])
@pytest.mark.parametrize("p_value", [0.0, 0.03, 0.3, 0.5, 0.97, 1.0])
def test_interval_is_nested_and_narrows_as_effective_n_grows(method, p_value):
    # For a fixed p̂, more information gives a nested, strictly narrower interval; the grid
    # steps through fractional n_eff.
    assert_nested_as_n_grows(method, p_value, np.linspace(2.0, 400.0, 800))


@pytest.mark.parametrize("p_value", [0.0, 0.03, 0.3, 0.5, 0.97, 1.0])
def test_wald_is_nested_as_effective_n_grows(p_value):
    # Wald's width only weakly decreases: it is 0 at p̂ = 0 or 1 and clipped to [0, 1] at tiny n.
    assert_nested_as_n_grows("wald", p_value, np.linspace(2.0, 400.0, 800), strict_width=False)


@pytest.mark.parametrize("method", ["wilson_cc", "jeffreys"])
@pytest.mark.parametrize("p_value", [0.0, 0.03, 0.3, 0.5, 0.97, 1.0])
def test_cc_and_jeffreys_nested_once_x_reaches_one(method, p_value):
    # With fractional x = p̂·n_eff below 1 these two are not monotone in n (the continuity
    # correction of ½ exceeds x; the Beta(x + ½, ·) lower quantile bends), so the property is
    # checked only where both x and n − x are at least 1.
    n = np.linspace(2.0, 400.0, 800)
    if 0.0 < p_value < 1.0:
        n = n[(p_value * n >= 1) & ((1 - p_value) * n >= 1)]
    assert_nested_as_n_grows(method, p_value, n)


def test_unusable_cells_give_nan_without_raising():
    p = [0.2, np.nan, 0.2, 0.2, 0.2]
    n = [50, 50, 0, -3, np.nan]
    for method in ALL_METHODS:
        iv = proportion_interval(p, n, method=method, **extras_for(method))
        assert np.isfinite(iv.lower[0]) and np.isfinite(iv.upper[0])
        assert np.all(np.isnan(iv.lower[1:])) and np.all(np.isnan(iv.upper[1:]))


def test_higher_confidence_gives_wider_interval():
    # Identity: z (and the Beta tail areas) move monotonically with the level.
    for method in ALL_METHODS:
        widths = []
        for level in LEVELS:
            iv = proportion_interval([0.3], [40], method=method, confidence=level,
                                     **extras_for(method))
            widths.append(iv.upper[0] - iv.lower[0])
        assert np.all(np.diff(widths) > 0), method


@pytest.mark.parametrize("bad", [1.5, 0, 1, -0.1, float("nan")])
def test_invalid_confidence_raises(bad):
    with pytest.raises(ValueError, match=r"must be in \(0, 1\)"):
        proportion_interval([0.5], [10], method="wilson", confidence=bad)
    with pytest.raises(ValueError, match=r"must be in \(0, 1\)"):
        z_value(bad)


def test_invalid_confidence_message_is_exact():
    with pytest.raises(ValueError) as err:
        proportion_interval([0.5], [10], method="wilson", confidence=1.5)
    assert str(err.value) == "confidence (1.5) must be in (0, 1)"


def test_unknown_method_names_it_lists_allowed_and_suggests():
    with pytest.raises(ValueError) as err:
        proportion_interval([0.5], [10], method="wilsen")
    message = str(err.value)
    assert "'wilsen'" in message
    assert "did you mean 'wilson'?" in message
    for name in ("wald", "wilson", "clopper_pearson"):
        assert name in message


def test_p_hat_outside_unit_interval_and_shape_mismatch_raise():
    with pytest.raises(ValueError, match=r"p_hat \(1.2 at position 1\) must be in \[0, 1\]"):
        proportion_interval([0.5, 1.2], [10, 10], method="wilson")
    with pytest.raises(ValueError, match="shape"):
        proportion_interval([0.5, 0.2], [10, 10, 10], method="wilson")


def test_result_object_records_method_and_confidence_and_is_frozen():
    iv = proportion_interval([0.5], [10], method=IntervalMethod.CLOPPER_PEARSON, confidence=0.9)
    assert iv.method == "clopper_pearson" and iv.confidence == 0.9
    with pytest.raises(dataclasses.FrozenInstanceError):
        iv.method = "wald"


def test_every_method_is_registered_and_described():
    assert set(METHOD_DESCRIPTIONS) == {m.value for m in IntervalMethod}
    assert {"wald", "wilson", "clopper_pearson"} <= set(METHOD_DESCRIPTIONS)
    assert all(len(text) > 20 and "\n" not in text for text in METHOD_DESCRIPTIONS.values())
    assert "clipped" in METHOD_DESCRIPTIONS["wald"]


# --- Logit ---------------------------------------------------------------------------------------


def test_logit_is_a_wald_interval_on_the_log_odds_scale():
    # Published form (Korn & Graubard 1999, Analysis of Health Surveys, §3.2): the bounds are
    # expit(logit(p̂) ± z·SE/(p̂q̂)); so on the logit scale they sit symmetrically about logit(p̂)
    # with half-width z/√(n p̂ q̂) when SE = √(p̂q̂/n). Computed here with scipy.special directly.
    from scipy.special import expit, logit
    from scipy.stats import norm

    p = np.array([0.05, 0.3, 0.5, 0.81])
    n = np.array([40.0, 263.0, 12.5, 1000.0])
    iv = proportion_interval(p, n, method="logit", confidence=0.90)
    half = norm.ppf(0.95) / np.sqrt(n * p * (1 - p))
    np.testing.assert_allclose(iv.lower, expit(logit(p) - half), rtol=1e-12)
    np.testing.assert_allclose(iv.upper, expit(logit(p) + half), rtol=1e-12)


def test_logit_uses_the_design_standard_error():
    p, n, se = np.array([0.2]), np.array([100.0]), np.array([0.06])
    iv = proportion_interval(p, n, method="logit", std_error=se)
    from scipy.special import logit

    z = 1.959963984540054  # Φ⁻¹(0.975), from memory; checked by test_z_value_matches_normal_quantile
    assert logit(iv.upper[0]) - logit(0.2) == pytest.approx(z * 0.06 / (0.2 * 0.8), rel=1e-9)


def test_logit_at_the_boundary_takes_clopper_pearson():
    # p̂ = 0 or 1 has infinite log-odds; the documented fallback is the exact interval on n_eff.
    n = np.array([20.0, 20.0])
    p = np.array([0.0, 1.0])
    logit_iv = proportion_interval(p, n, method="logit")
    exact = proportion_interval(p, n, method="clopper_pearson")
    np.testing.assert_array_equal(logit_iv.lower, exact.lower)
    np.testing.assert_array_equal(logit_iv.upper, exact.upper)
    assert logit_iv.upper[0] == pytest.approx(0.1684, abs=5e-5)  # Newcombe 1998 Table I, 0/20
