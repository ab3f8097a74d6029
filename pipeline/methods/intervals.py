"""Confidence intervals for a proportion, vectorised over cells, on the effective sample size.

Every method works on the design-based effective sample size n_eff (with simple random sampling
n_eff = n), so the score, exact and Bayesian forms carry the survey design through n_eff and
x = p̂·n_eff, which need not be integers (DESIGN.md §4).

    >>> iv = proportion_interval([81 / 263], [263], method="wilson")
    >>> round(float(iv.lower[0]), 4), round(float(iv.upper[0]), 4)
    (0.2553, 0.3662)

Adding a method is local: write one function taking `_Cells` and returning (lower, upper), add one
`IntervalMethod` member and one `_METHODS` line. The dispatcher does validation, NaN handling for
unusable cells, and the final [0, 1] / lower <= p̂ <= upper guarantee, so method functions only do
the formula, on valid cells only.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum
from typing import Callable

import numpy as np
from scipy import special, stats

from pipeline.methods import lookup_member

__all__ = [
    "Interval",
    "IntervalMethod",
    "METHOD_DESCRIPTIONS",
    "proportion_interval",
    "z_value",
]

# p̂ = Σwy/Σw from separately accumulated sums can overshoot [0, 1] by rounding; anything further
# out is a bug upstream and is refused rather than silently clipped.
_P_HAT_SLACK = 1e-12


class IntervalMethod(str, Enum):
    """Stable names of the interval methods (the values appear in configs and metadata)."""

    WALD = "wald"
    WILSON = "wilson"
    WILSON_CC = "wilson_cc"
    CLOPPER_PEARSON = "clopper_pearson"
    AGRESTI_COULL = "agresti_coull"
    JEFFREYS = "jeffreys"
    LOGIT = "logit"
    KORN_GRAUBARD = "korn_graubard"


@dataclass(frozen=True)
class Interval:
    """Bounds for each cell (NaN where the cell cannot have an interval), and how they were made."""

    lower: np.ndarray
    upper: np.ndarray
    method: str
    confidence: float


@dataclass(frozen=True)
class _Cells:
    """What a method function sees: only usable cells (finite p in [0, 1], finite n > 0)."""

    p: np.ndarray
    n: np.ndarray
    z: float
    alpha: float
    std_error: np.ndarray | None
    df: np.ndarray | None
    sample_size: np.ndarray | None

    @property
    def x(self) -> np.ndarray:
        # Effective number of "yes": x = p̂·n_eff, generally not an integer (Korn & Graubard 1998).
        return self.p * self.n


# ---------------------------------------------------------------------------------------------
# Methods. Each returns raw (lower, upper); the dispatcher clips to [0, 1].


def _wald(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # p̂ ± z·SE (Newcombe 1998, method 1). A design SE, when given, replaces √(p̂q̂/n_eff).
    se = c.std_error if c.std_error is not None else np.sqrt(c.p * (1.0 - c.p) / c.n)
    return c.p - c.z * se, c.p + c.z * se


def _wilson(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Score interval (Wilson 1927, JASA 22:209; Newcombe 1998, method 3):
    # (p̂ + z²/2n ± z·√(p̂q̂/n + z²/4n²)) / (1 + z²/n).
    z2 = c.z * c.z
    denom = 1.0 + z2 / c.n
    centre = (c.p + z2 / (2.0 * c.n)) / denom
    half = c.z * np.sqrt(c.p * (1.0 - c.p) / c.n + z2 / (4.0 * c.n * c.n)) / denom
    # At p̂ = 0 (or 1) centre − half is 0 (or centre + half is 1) in exact arithmetic only.
    lower = np.where(c.p == 0.0, 0.0, centre - half)
    upper = np.where(c.p == 1.0, 1.0, centre + half)
    return lower, upper


def _wilson_cc(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Score interval with continuity correction (Newcombe 1998, method 4):
    # L = (2np̂ + z² − 1 − z√(z² − 2 − 1/n + 4p̂(nq̂ + 1))) / 2(n + z²), 0 when p̂ = 0;
    # U = (2np̂ + z² + 1 + z√(z² + 2 − 1/n + 4p̂(nq̂ − 1))) / 2(n + z²), 1 when p̂ = 1.
    z, n, p = c.z, c.n, c.p
    q = 1.0 - p
    z2 = z * z
    denom = 2.0 * (n + z2)
    # With a fractional n_eff below 1 the radicands can dip under 0; the correction then
    # means nothing anyway, so take the root of 0 instead of producing NaN.
    root_lo = np.sqrt(np.maximum(z2 - 2.0 - 1.0 / n + 4.0 * p * (n * q + 1.0), 0.0))
    root_hi = np.sqrt(np.maximum(z2 + 2.0 - 1.0 / n + 4.0 * p * (n * q - 1.0), 0.0))
    lower = (2.0 * n * p + z2 - 1.0 - z * root_lo) / denom
    upper = (2.0 * n * p + z2 + 1.0 + z * root_hi) / denom
    # With a fractional x below ½ the corrected lower limit can exceed p̂ itself; the dispatcher
    # then caps it at p̂ (and the upper limit symmetrically).
    return np.where(p == 0.0, 0.0, lower), np.where(p == 1.0, 1.0, upper)


def _beta_limits(p, alpha, a_lo, b_lo, a_hi, b_hi):
    # Central Beta quantiles with α/2 in each tail; exact 0 / 1 at the ends where the Beta
    # parameter would be 0 (Clopper & Pearson 1934; Brown, Cai & DasGupta 2001 for Jeffreys).
    with np.errstate(invalid="ignore", divide="ignore"):
        lower = np.where(p == 0.0, 0.0, stats.beta.ppf(alpha / 2.0, a_lo, b_lo))
        # isf keeps full precision in the upper tail, where ppf(1 − α/2) would lose digits.
        upper = np.where(p == 1.0, 1.0, stats.beta.isf(alpha / 2.0, a_hi, b_hi))
    return lower, upper


def _clopper_pearson(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Exact interval (Clopper & Pearson 1934, Biometrika 26:404; Newcombe 1998, method 5):
    # lower = Beta⁻¹(α/2; x, n − x + 1), upper = Beta⁻¹(1 − α/2; x + 1, n − x), x = p̂·n_eff.
    x, n = c.x, c.n
    return _beta_limits(c.p, c.alpha, x, n - x + 1.0, x + 1.0, n - x)


def _agresti_coull(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # "Add z²/2 successes and z²/2 failures" variant (Agresti & Coull 1998, Am. Stat. 52:119;
    # Brown, Cai & DasGupta 2001, Stat. Sci. 16:101): ñ = n + z², p̃ = (x + z²/2)/ñ,
    # p̃ ± z√(p̃q̃/ñ). Not the "add 2 and 2" shortcut, which only matches at 95%.
    z2 = c.z * c.z
    n_tilde = c.n + z2
    p_tilde = (c.x + z2 / 2.0) / n_tilde
    half = c.z * np.sqrt(p_tilde * (1.0 - p_tilde) / n_tilde)
    return p_tilde - half, p_tilde + half


def _jeffreys(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Equal-tailed Beta(x + ½, n − x + ½) posterior interval, with lower 0 at x = 0 and upper 1
    # at x = n (Brown, Cai & DasGupta 2001, Stat. Sci. 16:101, §4.1.2).
    x, n = c.x, c.n
    return _beta_limits(c.p, c.alpha, x + 0.5, n - x + 0.5, x + 0.5, n - x + 0.5)


def _logit(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Wald interval on the log-odds scale, back-transformed: logit(p̂) ± z·SE/(p̂q̂), SE the design
    # standard error (delta method; Korn & Graubard 1999, Analysis of Health Surveys, §3.2).
    # At p̂ = 0 or 1 the log-odds are infinite, so those cells take the Clopper–Pearson bounds
    # on the same n_eff (lower 0 at p̂ = 0, upper 1 at p̂ = 1).
    p = c.p
    inside = (p > 0.0) & (p < 1.0)
    safe_p = np.where(inside, p, 0.5)
    se = c.std_error if c.std_error is not None else np.sqrt(safe_p * (1.0 - safe_p) / c.n)
    half = c.z * se / (safe_p * (1.0 - safe_p))
    centre = special.logit(safe_p)
    cp_lower, cp_upper = _clopper_pearson(c)
    return (np.where(inside, special.expit(centre - half), cp_lower),
            np.where(inside, special.expit(centre + half), cp_upper))


def _korn_graubard(c: _Cells) -> tuple[np.ndarray, np.ndarray]:
    # Korn & Graubard 1998 (Survey Methodology 24:193): Clopper–Pearson on the degrees-of-freedom
    # adjusted effective size n* = n_eff·(t_{n−1}/t_{df})², x* = p̂·n*, n the records in the base.
    q = 1.0 - c.alpha / 2.0
    # t with <= 0 degrees of freedom is undefined: such cells get NaN, not a made-up value.
    base_df = c.sample_size - 1.0
    t_base = np.where(base_df > 0, stats.t.ppf(q, np.where(base_df > 0, base_df, 1.0)), np.nan)
    t_design = np.where(c.df > 0, stats.t.ppf(q, np.where(c.df > 0, c.df, 1.0)), np.nan)
    n_star = c.n * (t_base / t_design) ** 2
    x_star = c.p * n_star
    return _beta_limits(c.p, c.alpha, x_star, n_star - x_star + 1.0, x_star + 1.0, n_star - x_star)


@dataclass(frozen=True)
class _Method:
    function: Callable[[_Cells], tuple[np.ndarray, np.ndarray]]
    description: str
    needs: tuple[str, ...] = ()  # keyword inputs that must not be None for this method


_METHODS: dict[IntervalMethod, _Method] = {
    IntervalMethod.WALD: _Method(
        _wald,
        "p̂ ± z·SE, SE the design standard error if given, else √(p̂q̂/n_eff); clipped to [0, 1] "
        "(simple asymptotic interval, Newcombe 1998 Stat. Med. 17:857, method 1)",
    ),
    IntervalMethod.WILSON: _Method(
        _wilson,
        "(p̂ + z²/2n ± z√(p̂q̂/n + z²/4n²))/(1 + z²/n), n = n_eff "
        "(Wilson 1927 JASA 22:209; Newcombe 1998 Stat. Med. 17:857, method 3)",
    ),
    IntervalMethod.WILSON_CC: _Method(
        _wilson_cc,
        "Wilson score interval with continuity correction, n = n_eff "
        "(Newcombe 1998 Stat. Med. 17:857, method 4)",
    ),
    IntervalMethod.CLOPPER_PEARSON: _Method(
        _clopper_pearson,
        "Beta⁻¹(α/2; x, n−x+1) to Beta⁻¹(1−α/2; x+1, n−x), x = p̂·n_eff, n = n_eff "
        "(Clopper & Pearson 1934 Biometrika 26:404)",
    ),
    IntervalMethod.AGRESTI_COULL: _Method(
        _agresti_coull,
        "p̃ ± z√(p̃q̃/ñ), ñ = n_eff + z², p̃ = (x + z²/2)/ñ (add z² variant); clipped to [0, 1] "
        "(Agresti & Coull 1998 Am. Stat. 52:119)",
    ),
    IntervalMethod.JEFFREYS: _Method(
        _jeffreys,
        "equal-tailed Beta(x+½, n−x+½) interval, x = p̂·n_eff, lower 0 at x = 0, upper 1 at x = n "
        "(Brown, Cai & DasGupta 2001 Stat. Sci. 16:101)",
    ),
    IntervalMethod.LOGIT: _Method(
        _logit,
        "expit(logit(p̂) ± z·SE/(p̂q̂)), SE the design standard error; at p̂ = 0 or 1 the "
        "Clopper–Pearson bounds on n_eff (Korn & Graubard 1999, Analysis of Health Surveys)",
    ),
    IntervalMethod.KORN_GRAUBARD: _Method(
        _korn_graubard,
        "Clopper–Pearson on n* = n_eff·(t_{n−1}/t_{df})², x* = p̂·n* "
        "(Korn & Graubard 1998 Survey Methodology 24:193)",
        needs=("df", "sample_size"),
    ),
}

METHOD_DESCRIPTIONS: dict[str, str] = {m.value: spec.description for m, spec in _METHODS.items()}


# ---------------------------------------------------------------------------------------------
# Public functions.


def _check_confidence(confidence: float) -> float:
    try:
        value = float(confidence)
    except (TypeError, ValueError):
        raise ValueError(f"confidence ({confidence!r}) must be in (0, 1)") from None
    if not (0.0 < value < 1.0):  # also refuses NaN
        raise ValueError(f"confidence ({confidence!r}) must be in (0, 1)")
    return value


def z_value(confidence: float) -> float:
    """Φ⁻¹(1 − α/2) with α = 1 − confidence: the two-sided standard normal critical value."""
    c = _check_confidence(confidence)
    return float(special.ndtri(0.5 + 0.5 * c))


def _lookup_method(method: str) -> IntervalMethod:
    return lookup_member(IntervalMethod, method, what="interval method")


def _as_float(name: str, values, shape: tuple[int, ...]) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.shape != shape:
        if arr.ndim == 0:
            return np.broadcast_to(arr, shape)
        raise ValueError(f"{name} has shape {arr.shape} but p_hat has shape {shape}")
    return arr


def proportion_interval(
    p_hat,
    n_eff,
    *,
    method: str,
    confidence: float = 0.95,
    std_error=None,
    df=None,
    sample_size=None,
) -> Interval:
    """Confidence interval for each cell's proportion.

    p_hat, n_eff: array-likes of equal shape (a scalar broadcasts); p_hat in [0, 1] or NaN,
    n_eff the effective sample size (float). Cells with NaN p_hat or n_eff <= 0 (or NaN) get NaN
    bounds. Bounds always lie in [0, 1] with lower <= p̂ <= upper; Wald and Agresti–Coull are
    clipped to [0, 1] to get there.

    std_error: design standard errors, used by wald only. df: design degrees of freedom and
    sample_size: records in the base, both needed by korn_graubard only (ignored elsewhere).
    """
    chosen = _lookup_method(method)
    spec = _METHODS[chosen]
    z = z_value(confidence)
    alpha = 1.0 - float(confidence)

    p = np.array(p_hat, dtype=float)
    shape = p.shape
    n = _as_float("n_eff", n_eff, shape)
    extras = {"std_error": std_error, "df": df, "sample_size": sample_size}
    for name in spec.needs:
        if extras[name] is None:
            raise ValueError(f"interval method {chosen.value!r} needs {name}")
    extras = {k: (None if v is None else _as_float(k, v, shape)) for k, v in extras.items()}

    finite_p = np.isfinite(p)
    bad = finite_p & ((p < -_P_HAT_SLACK) | (p > 1.0 + _P_HAT_SLACK))
    if bad.any():
        first = np.flatnonzero(bad.ravel())[0]
        raise ValueError(
            f"p_hat ({float(p.ravel()[first])!r} at position {first}) must be in [0, 1]"
        )
    p = np.clip(p, 0.0, 1.0)
    if extras["std_error"] is not None and np.any(extras["std_error"] < 0):
        raise ValueError("std_error must be >= 0")

    usable = finite_p & np.isfinite(n) & (n > 0)
    lower = np.full(shape, np.nan)
    upper = np.full(shape, np.nan)
    if usable.any():
        cells = _Cells(
            p=p[usable],
            n=n[usable],
            z=z,
            alpha=alpha,
            **{k: (None if v is None else v[usable]) for k, v in extras.items()},
        )
        lo, hi = spec.function(cells)
        # Clip to [0, 1] (Wald, Agresti–Coull overshoot by design), then make sure rounding in a
        # closed form never leaves p̂ outside its own interval. NaN (e.g. df <= 0) passes through.
        lo = np.minimum(np.clip(lo, 0.0, 1.0), cells.p)
        hi = np.maximum(np.clip(hi, 0.0, 1.0), cells.p)
        lower[usable] = lo
        upper[usable] = hi
    return Interval(lower=lower, upper=upper, method=chosen.value, confidence=float(confidence))
