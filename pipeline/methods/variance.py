"""Variances of a ratio estimate p̂ = Σwy/Σw, as arrays over cells (DESIGN.md §4).

Simple random sampling (with an optional finite population correction), Kish's effective sample
size, and replicate-weight variances. Design effect and effective n turn any of these into the
quantities the interval methods and reliability rules need.

Adding a replicate method is local: one `ReplicateMethod` member and one `_REPLICATE_METHODS`
line giving its scale factor, the options it uses, and a one-line description. Per-replicate
multipliers (e.g. (n_h − 1)/n_h for a stratified jackknife) are already carried by
`replicate_variance`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum
from typing import Callable

import numpy as np
from scipy import sparse

from pipeline.methods import lookup_member

__all__ = [
    "REPLICATE_DESCRIPTIONS",
    "ReplicateMethod",
    "SINGLE_CLUSTER_DESCRIPTIONS",
    "LinearizationVariance",
    "SingleClusterStrata",
    "design_effect",
    "effective_n",
    "kish_effective_n",
    "kish_variance",
    "linearization_variance",
    "replicate_estimates",
    "replicate_scale",
    "replicate_variance",
    "srs_variance",
]


def _arr(values) -> np.ndarray:
    return np.asarray(values, dtype=float)


def _pq(p_hat) -> np.ndarray:
    p = _arr(p_hat)
    return p * (1.0 - p)


# ---------------------------------------------------------------------------------------------
# Simple random sampling and Kish.


def srs_variance(p_hat, n, *, population_size=None, fpc_threshold: float = 0.10) -> np.ndarray:
    """p̂q̂/n, times (1 − n/N) where N is known and the sampling fraction n/N exceeds
    `fpc_threshold` (common practice: no correction while the sample is under 10% of the
    population). N may be None, a scalar or an array with NaN for "unknown". n <= 0 gives NaN."""
    if not (0.0 <= float(fpc_threshold) <= 1.0):
        raise ValueError(f"fpc_threshold ({fpc_threshold!r}) must be in [0, 1]")
    n = _arr(n)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = np.where(n > 0, _pq(p_hat) / np.where(n > 0, n, 1.0), np.nan)
        if population_size is None:
            return v
        big_n = np.broadcast_to(_arr(population_size), v.shape)
        known = np.isfinite(big_n) & (big_n > 0)
        fraction = np.where(known, n / np.where(known, big_n, 1.0), 0.0)
    if np.any(fraction > 1.0):
        raise ValueError("sample size n exceeds population_size N in some cell")
    # Finite population correction (1 − n/N) for sampling without replacement
    # (Cochran 1977, Sampling Techniques, ch. 3).
    return np.where(fraction > fpc_threshold, v * (1.0 - fraction), v)


def kish_effective_n(sum_w, sum_w2) -> np.ndarray:
    """(Σw)²/Σw², the sample size that gives the same variance under equal weights
    (Kish 1992, J. Official Statistics 8:183). NaN where Σw² <= 0."""
    sw, sw2 = _arr(sum_w), _arr(sum_w2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(sw2 > 0, sw * sw / np.where(sw2 > 0, sw2, 1.0), np.nan)


def kish_variance(p_hat, sum_w, sum_w2) -> np.ndarray:
    """p̂q̂/n_eff with n_eff the Kish effective sample size (Kish 1992)."""
    n_eff = kish_effective_n(sum_w, sum_w2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(n_eff > 0, _pq(p_hat) / np.where(n_eff > 0, n_eff, 1.0), np.nan)


# ---------------------------------------------------------------------------------------------
# Replicate weights.


class ReplicateMethod(str, Enum):
    """Stable names of the replicate variance methods (values appear in configs and metadata)."""

    SUCCESSIVE_DIFFERENCE = "successive_difference"
    JACKKNIFE_DELETE1 = "jackknife_delete1"
    BRR = "brr"
    FAY = "fay"
    CUSTOM = "custom"
    JACKKNIFE_STRATIFIED = "jackknife_stratified"
    BOOTSTRAP = "bootstrap"


@dataclass(frozen=True)
class _Replicate:
    scale: Callable[[int, float | None, float | None], float]  # (R, fay_rho, factor) -> scale
    description: str
    options: tuple[str, ...] = ()  # which of fay_rho / factor the method requires
    needs_multipliers: bool = False
    # squared deviations from p̂ ("estimate") or from the mean of the replicate estimates
    centre: str = "estimate"


_REPLICATE_METHODS: dict[ReplicateMethod, _Replicate] = {
    ReplicateMethod.SUCCESSIVE_DIFFERENCE: _Replicate(
        lambda r, rho, f: 4.0 / r,
        "v = (4/R) Σ_r (p̂_r − p̂)² (Fay & Train 1995, ASA Proc. Govt. Stat. Section)",
    ),
    ReplicateMethod.JACKKNIFE_DELETE1: _Replicate(
        lambda r, rho, f: (r - 1.0) / r,
        "v = ((R−1)/R) Σ_r (p̂_r − p̂)², one unit deleted per replicate (Wolter 2007, ch. 4)",
    ),
    ReplicateMethod.BRR: _Replicate(
        lambda r, rho, f: 1.0 / r,
        "v = (1/R) Σ_r (p̂_r − p̂)², balanced half-samples (McCarthy 1969; Wolter 2007, ch. 3)",
    ),
    ReplicateMethod.FAY: _Replicate(
        lambda r, rho, f: 1.0 / (r * (1.0 - rho) ** 2),
        "v = (1/(R(1−ρ)²)) Σ_r (p̂_r − p̂)², half-samples perturbed by ρ (Judkins 1990, "
        "J. Official Statistics 6:223)",
        options=("fay_rho",),
    ),
    ReplicateMethod.CUSTOM: _Replicate(
        lambda r, rho, f: f,
        "v = factor · Σ_r m_r (p̂_r − p̂)², factor and per-replicate multipliers m_r supplied "
        "with the replicate weights",
        options=("factor",),
    ),
    ReplicateMethod.JACKKNIFE_STRATIFIED: _Replicate(
        lambda r, rho, f: 1.0,
        "v = Σ_r ((n_h−1)/n_h) (p̂_r − p̂)², one cluster deleted per replicate, n_h the clusters of "
        "that replicate's stratum, the multipliers (n_h−1)/n_h supplied per replicate "
        "(Wolter 2007, Introduction to Variance Estimation, ch. 4)",
        needs_multipliers=True,
    ),
    ReplicateMethod.BOOTSTRAP: _Replicate(
        lambda r, rho, f: 1.0 / (r - 1.0),
        "v = (1/(R−1)) Σ_r (p̂_r − p̄)², p̄ the mean of the replicate estimates: the bootstrap "
        "variance about the replicate mean (Rao & Wu 1988, JASA 83:231; Efron 1979)",
        centre="replicate_mean",
    ),
}

REPLICATE_DESCRIPTIONS: dict[str, str] = {
    m.value: spec.description for m, spec in _REPLICATE_METHODS.items()
}


def _lookup_replicate(method: str) -> ReplicateMethod:
    return lookup_member(ReplicateMethod, method, what="replicate method")


def replicate_scale(
    method: str,
    *,
    replicates: int,
    fay_rho: float | None = None,
    factor: float | None = None,
) -> float:
    """The constant in front of Σ_r m_r (p̂_r − p̂)² for `method` with R = `replicates`.

    successive_difference 4/R (Fay & Train 1995); jackknife_delete1 (R−1)/R; brr 1/R;
    fay 1/(R(1−ρ)²) (Judkins 1990); custom: `factor` as given. fay_rho is required by (and only
    allowed with) fay, factor by (and only with) custom, so a misplaced option cannot pass silently.
    """
    chosen = _lookup_replicate(method)
    spec = _REPLICATE_METHODS[chosen]
    if isinstance(replicates, bool) or int(replicates) != replicates or replicates < 2:
        raise ValueError(f"replicates ({replicates!r}) must be >= 2")
    given = {"fay_rho": fay_rho, "factor": factor}
    for name, value in given.items():
        if name in spec.options and value is None:
            raise ValueError(f"replicate method {chosen.value!r} needs {name}")
        if name not in spec.options and value is not None:
            raise ValueError(f"{name} ({value!r}) is not used by replicate method {chosen.value!r}")
    if fay_rho is not None and not (0.0 <= float(fay_rho) < 1.0):
        raise ValueError(f"fay_rho ({fay_rho!r}) must be in [0, 1)")
    if factor is not None and not (math.isfinite(float(factor)) and float(factor) > 0.0):
        raise ValueError(f"factor ({factor!r}) must be a finite number > 0")
    return float(spec.scale(int(replicates), fay_rho, factor))


def replicate_estimates(sum_wy_r, sum_w_r) -> np.ndarray:
    """p̂_r = Σ w_r y / Σ w_r for every cell and replicate, shape (cells, R); NaN where Σ w_r = 0."""
    num, den = _arr(sum_wy_r), _arr(sum_w_r)
    if num.shape != den.shape:
        raise ValueError(f"sum_wy_r has shape {num.shape} but sum_w_r has shape {den.shape}")
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den != 0, num / np.where(den != 0, den, 1.0), np.nan)


def replicate_variance(
    p_hat,
    p_hat_replicates,
    *,
    method: str,
    fay_rho: float | None = None,
    factor: float | None = None,
    multipliers=None,
) -> np.ndarray:
    """v = scale · Σ_r m_r (p̂_r − p̂)² per cell (DESIGN.md §4), p_hat shape (cells,),
    p_hat_replicates shape (cells, R), multipliers m_r shape (R,) defaulting to 1.

    A NaN replicate estimate (the cell has zero weight in that replicate, e.g. a jackknife
    replicate that deletes the only cluster holding the cell) contributes 0: the replicate carries
    no information about the cell, and one such replicate must not blank the cell's variance.
    This can understate the variance of very thin cells, which the reliability rules withhold
    anyway. A NaN p_hat gives a NaN variance.
    """
    p = _arr(p_hat)
    reps = _arr(p_hat_replicates)
    if reps.ndim != 2 or p.ndim != 1 or reps.shape[0] != p.shape[0]:
        raise ValueError(
            f"p_hat_replicates has shape {reps.shape}; expected (cells, R) with cells = "
            f"{p.shape[0] if p.ndim == 1 else p.shape} from p_hat"
        )
    r = reps.shape[1]
    scale = replicate_scale(method, replicates=r, fay_rho=fay_rho, factor=factor)
    spec = _REPLICATE_METHODS[_lookup_replicate(method)]
    if spec.needs_multipliers and multipliers is None:
        raise ValueError(f"replicate method {method!r} needs multipliers, one per replicate")
    if multipliers is None:
        m = np.ones(r)
    else:
        m = _arr(multipliers)
        if m.shape != (r,):
            raise ValueError(f"multipliers has shape {m.shape}; expected ({r},), one per replicate")
        if not np.all(np.isfinite(m) & (m >= 0)):
            raise ValueError("multipliers must be finite and >= 0")
    if spec.centre == "replicate_mean":
        finite = np.isfinite(reps)
        with np.errstate(invalid="ignore", divide="ignore"):
            centre = np.where(finite, reps, 0.0).sum(axis=1) / finite.sum(axis=1)
    else:
        centre = p
    squared = np.nan_to_num((reps - centre[:, None]) ** 2, nan=0.0, posinf=np.inf)
    v = scale * (squared @ m)
    return np.where(np.isfinite(p), v, np.nan)


# ---------------------------------------------------------------------------------------------
# Taylor linearization for stratified cluster samples (DESIGN.md §4).


class SingleClusterStrata(str, Enum):
    """What to do with a stratum that holds one sampled cluster, where n_h/(n_h − 1) is
    undefined. Stable names (values appear in configs and metadata)."""

    ERROR = "error"
    SKIP = "skip"
    GRAND_MEAN = "grand_mean"
    COLLAPSE = "collapse"


SINGLE_CLUSTER_DESCRIPTIONS: dict[str, str] = {
    SingleClusterStrata.ERROR.value:
        "a stratum with one sampled cluster stops the run: its variance contribution cannot be "
        "estimated from one cluster",
    SingleClusterStrata.SKIP.value:
        "a stratum with one sampled cluster contributes nothing, so the variance of every cell "
        "holding records there is understated",
    SingleClusterStrata.GRAND_MEAN.value:
        "the lone cluster's total u_hi deviates from the mean of all cluster totals of the sample, "
        "ū = Σ u_hi / (all clusters): (1 − f_h)·(u_hi − ū)², without the n_h/(n_h − 1) factor",
    SingleClusterStrata.COLLAPSE.value:
        "each stratum with one sampled cluster is merged with the neighbouring stratum in sorted "
        "stratum order (the next one; the previous one for the last) and the merged strata are "
        "treated as one stratum (collapsed strata, Wolter 2007, Introduction to Variance "
        "Estimation, 2nd ed., ch. 2); this tends to overstate the variance",
}


@dataclass(frozen=True)
class LinearizationVariance:
    """Result of `linearization_variance`, row-aligned with the cells.

    variance: v(p̂) per cell; NaN where the cell has no base record.
    degrees_of_freedom: clusters − strata that hold base records of the cell, at least 1; NaN
        where the cell has no base record.
    variance_stratum: (strata,) the stratum each input stratum is counted in, numbered 0.. in
        stratum order: its own unless `collapse` merged it with a neighbour.
    single_cluster_strata: positions of the input strata with one sampled cluster.
    """

    variance: np.ndarray
    degrees_of_freedom: np.ndarray
    variance_stratum: np.ndarray
    single_cluster_strata: np.ndarray


def _as_csr(values, name: str) -> sparse.csr_matrix:
    matrix = sparse.csr_matrix(values if sparse.issparse(values) else np.asarray(values, dtype=float),
                               dtype=np.float64, copy=True)
    matrix.sum_duplicates()
    if matrix.ndim != 2:
        raise ValueError(f"{name} must be 2-D (cells, clusters)")
    if not np.all(np.isfinite(matrix.data)):
        raise ValueError(f"{name} must be finite")
    return matrix


def linearization_variance(
    weighted_count,
    weighted_base,
    *,
    cluster_stratum,
    population_clusters=None,
    single_cluster_strata: str = "error",
    stratum_labels=None,
) -> LinearizationVariance:
    """Taylor-linearization variance of the ratio p̂ = Σwy/Σw for every cell at once
    (Woodruff 1971, JASA 66:411; Binder 1983, Int. Statistical Review 51:279): clusters treated
    as drawn with replacement within strata, with an optional first-stage finite population
    correction.

    weighted_count, weighted_base: (cells, clusters) Σw·y and Σw over the cell's base records in
        each cluster, dense or scipy sparse. Every sampled cluster of the design is a column,
        whether or not it holds records of a given cell: a domain keeps every cluster (records
        outside it have u = 0); the data are never subset.
    cluster_stratum: (clusters,) position 0..H−1 of each cluster's stratum, positions in stratum
        order (that order decides which stratum is a neighbour for `collapse`); every stratum
        needs at least one cluster.
    population_clusters: (H,) N_h, the clusters in the population of each stratum, or None
        (f_h = 0, no correction).
    single_cluster_strata: error | skip | grand_mean | collapse, see SINGLE_CLUSTER_DESCRIPTIONS.
    stratum_labels: (H,) stratum codes for error messages.

    With u_i = w_i (y_i − p̂)/W over the cell's base (W = Σw), cluster totals
    u_hi = (a_hi − p̂·b_hi)/W, and n_h the sampled clusters of stratum h in the whole sample:
        v = Σ_h (1 − f_h) · n_h/(n_h − 1) · Σ_i (u_hi − ū_h)²,   f_h = n_h/N_h.
    Clusters without records of the cell have u_hi = 0 and add nothing to Σu_hi or Σu_hi², so
    Σ_i (u_hi − ū_h)² = Σu_hi² − (Σu_hi)²/n_h over the clusters that hold records: the work
    follows the non-zero cluster totals, while n_h still counts every sampled cluster.
    """
    choice = lookup_member(SingleClusterStrata, single_cluster_strata, what="single_cluster_strata choice")
    a = _as_csr(weighted_count, "weighted_count")
    b = _as_csr(weighted_base, "weighted_base")
    if a.shape != b.shape:
        raise ValueError(f"weighted_count has shape {a.shape} but weighted_base has shape {b.shape}")
    if np.any(b.data < 0):
        raise ValueError("weighted_base must be >= 0 (sums of positive weights)")
    cells, clusters = b.shape
    stratum = np.asarray(cluster_stratum)
    if (clusters == 0 or stratum.shape != (clusters,) or not np.issubdtype(stratum.dtype, np.integer)
            or stratum.min() < 0):
        raise ValueError(f"cluster_stratum has shape {stratum.shape}; expected ({clusters},) integer "
                         "stratum positions >= 0, and at least one cluster")
    stratum = stratum.astype(np.int64)
    n_strata = int(stratum.max()) + 1
    n_h = np.bincount(stratum, minlength=n_strata)
    labels = [str(s) for s in stratum_labels] if stratum_labels is not None else [str(h) for h in range(n_strata)]
    if len(labels) != n_strata:
        raise ValueError(f"stratum_labels has {len(labels)} entries; expected {n_strata}, one per stratum")
    if np.any(n_h == 0):
        raise ValueError(f"stratum {labels[int(np.flatnonzero(n_h == 0)[0])]!r} has no cluster; "
                         "stratum positions must run 0..H−1")
    big_n = None
    if population_clusters is not None:
        big_n = _arr(population_clusters)
        if big_n.shape != (n_strata,):
            raise ValueError(f"population_clusters has shape {big_n.shape}; expected ({n_strata},), one per stratum")
        bad = ~(np.isfinite(big_n) & (big_n >= n_h))  # n_h >= 1, so this also asks N_h > 0
        if bad.any():
            h = int(np.flatnonzero(bad)[0])
            raise ValueError(f"population_clusters of stratum {labels[h]!r} ({big_n[h]:g}) must be a "
                             f"number >= its {n_h[h]} sampled cluster(s)")

    single = np.flatnonzero(n_h == 1)
    group = np.arange(n_strata)
    if single.size and choice is SingleClusterStrata.ERROR:
        shown = ", ".join(repr(labels[h]) for h in single[:5]) + (" ..." if single.size > 5 else "")
        raise ValueError(f"stratum {shown} has one sampled cluster, so n_h/(n_h − 1) is undefined; "
                         "choose single_cluster_strata skip, grand_mean or collapse")
    if single.size and choice is SingleClusterStrata.COLLAPSE:
        if n_strata == 1:
            raise ValueError("the sample has one stratum with one cluster: there is no neighbouring "
                             "stratum to collapse it with")
        # joined[h]: strata h and h + 1 form one variance stratum. A lone-cluster stratum joins
        # the next one, the last joins the previous one; chains of joins merge transitively.
        joined = np.zeros(n_strata - 1, dtype=bool)
        joined[np.minimum(single, n_strata - 2)] = True
        group = np.concatenate(([0], np.cumsum(~joined)))
    n_groups = int(group[-1]) + 1
    cluster_group = group[stratum]
    n_g = np.bincount(cluster_group, minlength=n_groups).astype(np.float64)
    # (1 − f_h) with f_h = n_h/N_h, the first-stage sampling fraction of the (collapsed) stratum
    keep = np.ones(n_groups) if big_n is None else 1.0 - n_g / np.bincount(group, weights=big_n, minlength=n_groups)

    big_w = np.asarray(b.sum(axis=1)).ravel()
    has = big_w > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        p_hat = np.where(has, np.asarray(a.sum(axis=1)).ravel() / np.where(has, big_w, 1.0), 0.0)
    inverse_w = np.where(has, 1.0 / np.where(has, big_w, 1.0), 0.0)
    u = (sparse.diags(inverse_w) @ (a - sparse.diags(p_hat) @ b)).tocoo()

    # Σu_hi and Σu_hi² per (cell, stratum) over the clusters holding records of the cell
    code = u.row.astype(np.int64) * n_groups + cluster_group[u.col]
    keys, position = np.unique(code, return_inverse=True)
    s1 = np.bincount(position, weights=u.data, minlength=len(keys))
    s2 = np.bincount(position, weights=u.data * u.data, minlength=len(keys))
    row, grp = keys // n_groups, keys % n_groups
    n_k = n_g[grp]
    with np.errstate(invalid="ignore", divide="ignore"):
        factor = np.where(n_k > 1, keep[grp] * n_k / np.where(n_k > 1, n_k - 1.0, 1.0), 0.0)
        within = np.maximum(s2 - s1 * s1 / n_k, 0.0)  # rounding can leave a tiny negative
    v = np.bincount(row, weights=factor * within, minlength=cells)
    if single.size and choice is SingleClusterStrata.GRAND_MEAN:
        # ū over every cluster of the sample, those without records of the cell at 0. (For this
        # ratio Σ_all u_hi = Σ_i w_i (y_i − p̂)/W = 0, so ū is 0 up to rounding.)
        u_bar = np.asarray(u.sum(axis=1)).ravel() / clusters
        lone = n_k == 1
        v += np.bincount(row[lone], weights=keep[grp[lone]] * (s1[lone] - u_bar[row[lone]]) ** 2, minlength=cells)
        # lone clusters without records of the cell: u_hi = 0, contribution (1 − f_h)·ū²
        untouched = keep[n_g == 1].sum() - np.bincount(row[lone], weights=keep[grp[lone]], minlength=cells)
        v += untouched * u_bar * u_bar

    present = b.tocoo()
    held = present.data > 0
    cells_row, cells_col = present.row[held].astype(np.int64), present.col[held]
    clusters_in = np.bincount(cells_row, minlength=cells)
    strata_in = np.bincount(np.unique(cells_row * n_groups + cluster_group[cells_col]) // n_groups, minlength=cells)
    df = np.where(has, np.maximum(clusters_in - strata_in, 1), np.nan).astype(np.float64)
    return LinearizationVariance(variance=np.where(has, v, np.nan), degrees_of_freedom=df,
                                 variance_stratum=group, single_cluster_strata=single)


# ---------------------------------------------------------------------------------------------
# From a variance to design effect and effective n (DESIGN.md §4).


def design_effect(variance, p_hat, n) -> np.ndarray:
    """v / (p̂q̂/n): the variance relative to simple random sampling of the same n
    (Kish 1965, Survey Sampling). NaN where p̂q̂ = 0 or n <= 0."""
    v, pq, n = _arr(variance), _pq(p_hat), _arr(n)
    ok = (pq > 0) & (n > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(ok, v * np.where(ok, n, 1.0) / np.where(ok, pq, 1.0), np.nan)


def effective_n(variance, p_hat, n) -> np.ndarray:
    """p̂q̂/v, the SRS size with the same variance, capped at n; n where v = 0 (no information
    to go below n, e.g. p̂ = 0 or 1). NaN where v or p̂ is NaN."""
    v, pq, n = _arr(variance), _pq(p_hat), _arr(n)
    with np.errstate(divide="ignore", invalid="ignore"):
        raw = np.where(v > 0, pq / np.where(v > 0, v, 1.0), n)
    out = np.minimum(raw, n)
    return np.where(np.isnan(v) | np.isnan(pq), np.nan, out)
