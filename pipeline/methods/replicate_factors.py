"""Hadamard matrices and successive-difference replicate factors.

Pure math: integers in, arrays out. Used to build replicate weights (the demo survey) and to
check them.

    >>> f = successive_difference_factors(5, replicates=4)
    >>> f.shape
    (5, 4)

Constructions of a Hadamard matrix H (entries ±1, H·Hᵀ = order·I), tried in this order:

* Sylvester (1867, Phil. Mag. 34:461): powers of two, via scipy.linalg.hadamard;
* Paley (1933, J. Math. Phys. 12:311), construction I: order q + 1 for a prime q ≡ 3 (mod 4)
  (12, 20, 24, 44, 48, 60, 68, 72, 80, 84, ...);
* Sylvester doubling [[H, H], [H, −H]] of a Paley matrix: 2^k·(q + 1) (40, 88, 96, 160, ...).

Every matrix returned is normalised: first row and first column all +1.
"""

from __future__ import annotations

import math
import operator

import numpy as np
import scipy.linalg

__all__ = ["hadamard", "successive_difference_factors", "SDR_FACTOR_STEP"]

# The step 2^(-3/2) of Fay & Train (1995): with it, (4/R)·Σ_r (replicate − full)² reproduces the
# successive-difference variance estimator ½·Σ_i (y_i − y_{i+1})².
SDR_FACTOR_STEP = 2.0 ** -1.5


def _as_count(value, name: str) -> int:
    """An exact integer (numpy integers too; bools and floats refused)."""
    if isinstance(value, bool):
        raise TypeError(f"{name} ({value!r}) must be an integer")
    try:
        return operator.index(value)
    except TypeError:
        raise TypeError(f"{name} ({value!r}) must be an integer") from None


def _is_prime(n: int) -> bool:
    # Trial division is plenty: Hadamard orders used for replicates are in the hundreds.
    if n < 2:
        return False
    if n % 2 == 0:
        return n == 2
    return all(n % d for d in range(3, math.isqrt(n) + 1, 2))


def _paley_prime(order: int) -> int | None:
    """q when order = q + 1 with q prime and q ≡ 3 (mod 4), else None."""
    q = order - 1
    return q if q % 4 == 3 and _is_prime(q) else None


def _paley_hadamard(q: int) -> np.ndarray:
    """Paley construction I (Paley 1933) for prime q ≡ 3 (mod 4), normalised.

    Jacobsthal matrix Q[a, b] = χ(a − b), χ the quadratic character mod q (Legendre symbol);
    C = [[0, 1ᵀ], [−1, Q]] and H = I + C. Negating rows 1..q makes the first column all +1, so the
    lower-right q×q core of the result is −(I + Q).
    """
    chi = -np.ones(q, dtype=np.int64)
    chi[0] = 0
    chi[(np.arange(1, q, dtype=np.int64) ** 2) % q] = 1  # the non-zero squares mod q
    idx = np.arange(q)
    jacobsthal = chi[np.subtract.outer(idx, idx) % q]
    h = np.ones((q + 1, q + 1), dtype=np.int64)
    h[1:, 1:] = -(np.eye(q, dtype=np.int64) + jacobsthal)
    return h


def hadamard(order: int) -> np.ndarray:
    """A normalised Hadamard matrix of the given order (int64, entries ±1, H·Hᵀ = order·I).

    Supported orders: powers of two (Sylvester), q + 1 with q prime ≡ 3 (mod 4) (Paley
    construction I, Paley 1933), and 2^k times such a q + 1 (Sylvester doubling). The first row
    and first column are all +1. Where several constructions apply, a power of two uses Sylvester
    and otherwise the largest Paley core is used (e.g. 80 from q = 79, 160 as 2 × 80).

    Raises ValueError for any other order, naming it and what is allowed.
    """
    order = _as_count(order, "order")
    if order >= 1 and order & (order - 1) == 0:
        return scipy.linalg.hadamard(order, dtype=np.int64)
    doublings, base = 0, order
    while base >= 4 and base % 2 == 0:
        q = _paley_prime(base)
        if q is not None:
            h = _paley_hadamard(q)
            for _ in range(doublings):
                h = np.block([[h, h], [h, -h]])  # Sylvester doubling keeps row/column 0 at +1
            return h
        base //= 2
        doublings += 1
    raise ValueError(
        f"order ({order}) must be a power of two, q+1 with q prime ≡ 3 (mod 4), "
        f"or 2^k times such a q+1 (e.g. 4, 12, 20, 40, 80, 160)"
    )


def successive_difference_factors(n_clusters: int, *, replicates: int = 80) -> np.ndarray:
    """Successive-difference replicate factors, shape (n_clusters, replicates), float64.

    For clusters i = 0..m−1 in their sort order (stratum, then systematic selection order) and an
    R×R Hadamard matrix H (R = `replicates`), Fay & Train (1995):

        f_ir = 1 + 2^(-3/2)·H[a_i, r] − 2^(-3/2)·H[b_i, r],  a_i = i mod R,  b_i = (i+1) mod R,

    so consecutive clusters take consecutive row pairs of H, cycling after R clusters. Every
    factor is 1 − 2^(-1/2), 1 or 1 + 2^(-1/2) (all positive). The variance of a replicated
    statistic is then (4/R)·Σ_r (θ̂_r − θ̂)². With m = R clusters this equals, for a total, the
    circular successive-difference estimator ½·Σ_i (y_i − y_{i+1})² with y_{m+1} = y_1; with
    m > R rows repeat and the equality is approximate.

    H is normalised, so its column 0 is all +1 and replicate 0 has every factor equal to 1: it
    reproduces the full sample and adds nothing to the sum, but it still counts in R, as the
    identity above requires.

    Fay, R.E. and Train, G.F. (1995). Aspects of survey and model-based postcensal estimation of
    income and poverty characteristics for states and counties. Proceedings of the Section on
    Government Statistics, American Statistical Association, 154-159.
    """
    n_clusters = _as_count(n_clusters, "n_clusters")
    replicates = _as_count(replicates, "replicates")
    if n_clusters < 1:
        raise ValueError(f"n_clusters ({n_clusters}) must be at least 1")
    if replicates < 2:
        raise ValueError(f"replicates ({replicates}) must be at least 2")
    h = hadamard(replicates).astype(np.float64)
    i = np.arange(n_clusters)
    a = i % replicates
    b = (i + 1) % replicates
    return 1.0 + SDR_FACTOR_STEP * h[a] - SDR_FACTOR_STEP * h[b]
