"""Tests for pipeline.methods.replicate_factors.

Yardsticks from outside the project, named beside each check:
* the definition of a Hadamard matrix: entries ±1 and H·Hᵀ = n·I (Hadamard 1893);
* scipy.linalg.hadamard, Sylvester's construction for powers of two (Sylvester 1867);
* Paley's construction I (Paley 1933, J. Math. Phys. 12:311), rebuilt here from Euler's criterion
  for the quadratic character, independently of the module's own code;
* the identity of Fay & Train (1995, Proc. Section on Government Statistics, ASA, 154-159): with
  m = R clusters, (4/R)·Σ_r (Σ_i f_ir·y_i − Σ_i y_i)² equals ½·Σ_i (y_i − y_{i+1})², y_{m+1} = y_1.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from pipeline.methods.replicate_factors import hadamard, successive_difference_factors


def _prime(n: int) -> bool:
    return n >= 2 and all(n % d for d in range(2, math.isqrt(n) + 1))


def _constructible(order: int) -> bool:
    """The orders the module promises: 2^k, or 2^k·(q+1) with q prime ≡ 3 (mod 4)."""
    if order & (order - 1) == 0:
        return True
    while order % 2 == 0:
        if (order - 1) % 4 == 3 and _prime(order - 1):
            return True
        order //= 2
    return False


SUPPORTED = [n for n in range(2, 257) if _constructible(n)]
UNSUPPORTED = [n for n in range(2, 257) if not _constructible(n)]


def test_the_orders_the_demo_and_users_need_are_in_the_supported_list():
    # 80 = 79 + 1 (79 prime, 79 ≡ 3 mod 4); 12, 20 likewise from 11, 19; 160 = 2·80, 40 = 2·20.
    for order in (2, 4, 8, 12, 16, 20, 24, 40, 44, 48, 60, 68, 72, 80, 84, 160, 256):
        assert order in SUPPORTED


@pytest.mark.parametrize("order", SUPPORTED)
def test_supported_orders_give_a_normalised_hadamard_matrix(order):
    h = hadamard(order)
    assert h.shape == (order, order)
    assert set(np.unique(h)) <= {-1, 1}  # definition (Hadamard 1893): entries ±1
    gram = h.astype(np.int64) @ h.T.astype(np.int64)
    np.testing.assert_array_equal(gram, order * np.eye(order, dtype=np.int64))  # H·Hᵀ = n·I
    assert (h[0] == 1).all() and (h[:, 0] == 1).all()  # normalised, as specified


@pytest.mark.parametrize("order", UNSUPPORTED)
def test_other_orders_are_refused_naming_the_order(order):
    with pytest.raises(ValueError, match=rf"order \({order}\) must be a power of two"):
        hadamard(order)


@pytest.mark.parametrize("order", [0, -4, 50, 28, 36])
def test_refusals_include_non_positive_orders_and_those_that_need_other_constructions(order):
    # 28, 36: Hadamard matrices exist (Paley construction II) but are not promised here.
    with pytest.raises(ValueError, match=rf"order \({order}\)"):
        hadamard(order)


@pytest.mark.parametrize("bad", [80.0, "80", True])
def test_order_must_be_an_integer(bad):
    with pytest.raises(TypeError, match="order"):
        hadamard(bad)


@pytest.mark.parametrize("order", [1, 2, 4, 8, 16, 32, 64, 128, 256])
def test_powers_of_two_match_scipy(order):
    # scipy.linalg.hadamard: Sylvester's construction (Sylvester 1867); already normalised.
    np.testing.assert_array_equal(hadamard(order), scipy.linalg.hadamard(order))


def _jacobsthal(q: int) -> np.ndarray:
    """Q[a, b] = χ(a − b), χ by Euler's criterion: x^((q−1)/2) ≡ ±1 (mod q) (Paley 1933)."""
    chi = [0] + [1 if pow(x, (q - 1) // 2, q) == 1 else -1 for x in range(1, q)]
    return np.array([[chi[(a - b) % q] for b in range(q)] for a in range(q)])


@pytest.mark.parametrize("order, q", [(12, 11), (20, 19), (24, 23), (80, 79)])
def test_paley_orders_are_built_from_the_prime_q(order, q):
    # Paley (1933) construction I: H = I + [[0, 1ᵀ], [−1, Q]]; negating rows 1..q to normalise
    # the first column leaves the core −(I + Q). For order 80 this is the prime q = 79.
    h = hadamard(order)
    core = -(np.eye(q, dtype=np.int64) + _jacobsthal(q))
    np.testing.assert_array_equal(h[1:, 1:], core)


@pytest.mark.parametrize("order, half", [(160, 80), (40, 20), (24 * 4, 48)])
def test_doubled_orders_are_sylvester_doublings(order, half):
    # Sylvester (1867): [[H, H], [H, −H]] of a Hadamard matrix is Hadamard of twice the order.
    h = hadamard(half)
    np.testing.assert_array_equal(hadamard(order), np.block([[h, h], [h, -h]]))


# ---- successive-difference factors ---------------------------------------------------------

SQRT_HALF = 2.0 ** -0.5


def test_factors_shape_and_only_three_values():
    # Fay & Train (1995): f = 1 + 2^(-3/2)(±1) − 2^(-3/2)(±1) ∈ {1 − 2^(-1/2), 1, 1 + 2^(-1/2)}.
    f = successive_difference_factors(250, replicates=80)
    assert f.shape == (250, 80)
    assert f.dtype == np.float64
    allowed = np.array([1 - SQRT_HALF, 1.0, 1 + SQRT_HALF])
    distance = np.abs(f[..., None] - allowed).min(axis=-1)
    assert distance.max() < 1e-15
    assert (f > 0).all()


def test_factors_follow_the_row_pair_rule_and_cycle():
    # Fay & Train (1995): cluster i takes rows a_i = i mod R and b_i = (i+1) mod R of H.
    r = 12
    h = hadamard(r)
    f = successive_difference_factors(30, replicates=r)
    for i in range(30):
        expected = 1 + 2**-1.5 * h[i % r] - 2**-1.5 * h[(i + 1) % r]
        np.testing.assert_allclose(f[i], expected, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(f[:r], f[r:2 * r])


def _circular_successive_difference(y: np.ndarray) -> float:
    return 0.5 * float(((y - np.roll(y, -1)) ** 2).sum())


@pytest.mark.parametrize("replicates", [4, 12, 16, 20, 80, 160])
def test_replicate_variance_equals_successive_difference_estimator(replicates):
    # Fay & Train (1995): with m = R clusters, (4/R)·Σ_r (Σ_i f_ir y_i − Σ_i y_i)² =
    # ½·Σ_i (y_i − y_{i+1})², y_{m+1} = y_1. Exact algebra, so 1e-9 relative is only rounding.
    rng = np.random.default_rng(replicates)
    f = successive_difference_factors(replicates, replicates=replicates)
    for _ in range(5):
        y = rng.gamma(2.0, 50.0, replicates)
        total = y.sum()
        replicate_variance = 4.0 / replicates * float(((y @ f - total) ** 2).sum())
        assert replicate_variance == pytest.approx(_circular_successive_difference(y), rel=1e-9)


def test_hand_worked_case_of_the_identity():
    # R = m = 4, y = (1, 0, 0, 0): ½·Σ(y_i − y_{i+1})² = ½·(1 + 0 + 0 + 1) = 1 (Fay & Train 1995).
    f = successive_difference_factors(4, replicates=4)
    y = np.array([1.0, 0.0, 0.0, 0.0])
    assert 4 / 4 * ((y @ f - 1.0) ** 2).sum() == pytest.approx(1.0, rel=1e-12)


def test_identity_fails_for_a_wrong_step():
    # Guards the test itself: a factor step other than 2^(-3/2) breaks the identity.
    y = np.random.default_rng(1).normal(size=16)
    f = 1 + 0.9 * (successive_difference_factors(16, replicates=16) - 1)
    v = 4 / 16 * (((y @ f) - y.sum()) ** 2).sum()
    assert abs(v - _circular_successive_difference(y)) > 1e-3 * _circular_successive_difference(y)


@pytest.mark.parametrize("kwargs, pattern", [
    (dict(n_clusters=0), r"n_clusters \(0\) must be at least 1"),
    (dict(n_clusters=10, replicates=50), r"order \(50\)"),
    (dict(n_clusters=10, replicates=1), r"replicates \(1\) must be at least 2"),
])
def test_factor_arguments_are_checked(kwargs, pattern):
    with pytest.raises(ValueError, match=pattern):
        successive_difference_factors(**kwargs)


def test_replicates_is_keyword_only():
    with pytest.raises(TypeError):
        successive_difference_factors(10, 80)  # type: ignore[misc]
