"""Outside references for the sampling kernels (``rankfold.udfs.factor.sampling``).

* Sampled matrix product: Drineas, Kannan, Mahoney, "Fast Monte Carlo algorithms for matrices I:
  approximating matrix multiplication", SIAM J. Comput. 36(1):132-157, 2006 (references.md 1.1-1.4,
  1.6). Expectations are computed exactly by enumerating every ordered tuple of draws.
* Leverage scores: Drineas, Mahoney, Muthukrishnan, SIAM J. Matrix Anal. Appl. 30(2), 2008
  (references.md 3.1); hat matrix: Hoaglin, Welsch, "The hat matrix in regression and ANOVA",
  Am. Stat. 32(1), 1978 (from memory).
"""

from __future__ import annotations

import itertools
from fractions import Fraction

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from rankfold.udfs.factor import sampling


@pytest.fixture(autouse=True, scope="module")
def _one_blas_thread():
    # Small matrices: BLAS threads only add spin-waiting on a busy 2-core machine.
    with threadpool_limits(limits=1):
        yield


# The small published example of references.md 1.6 (values [N]: reproduced numerically there).
A = np.array([[1.0, 2.0, 0.0], [0.0, 1.0, 3.0]])
B = np.array([[1.0, 0.0], [2.0, 1.0], [0.0, 4.0]])


def probabilities(kind: str) -> np.ndarray:
    col2 = np.einsum("ij,ij->j", A, A)  # |A(:,k)|^2 = (1, 5, 9)
    row2 = np.einsum("ij,ij->i", B, B)  # |B(k,:)|^2 = (1, 5, 16)
    if kind == "length_squared":
        return sampling.length_squared_probabilities(col2)
    if kind == "optimal":  # p_k ~ |A(:,k)| |B(k,:)| (DKM 2006; references.md 1.3)
        w = np.sqrt(col2 * row2)
        return w / w.sum()
    return np.full(3, 1 / 3)


def sampled_product(indices: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """C, R of the DKM estimator: column t of C is A(:,k_t)/sqrt(s p_k), row t of R is
    B(k_t,:)/sqrt(s p_k)."""
    scale = sampling.rescaling(p, indices)
    return A[:, indices] * scale[None, :], B[indices, :] * scale[:, None]


def exact_expectations(kind: str, s: int):
    """E||AB - CR||_F^2, E[CR] and E[C C^T] by enumerating all 3^s ordered draws."""
    p = probabilities(kind)
    ab = A @ B
    mse, mean_cr, mean_cct, total = 0.0, np.zeros_like(ab), np.zeros((2, 2)), 0.0
    for draw in itertools.product(range(3), repeat=s):
        idx = np.array(draw)
        weight = float(np.prod(p[idx]))
        c, r = sampled_product(idx, p)
        mse += weight * np.sum((ab - c @ r) ** 2)
        mean_cr += weight * (c @ r)
        mean_cct += weight * (c @ c.T)
        total += weight
    return mse, mean_cr, mean_cct, total


def test_example_constants():
    # references.md 1.6: AB = [[5,2],[2,13]], ||AB||_F^2 = 202, ||A||_F^2 = 15, ||B||_F^2 = 22
    assert np.array_equal(A @ B, [[5, 2], [2, 13]])
    assert np.sum((A @ B) ** 2) == 202
    assert np.sum(A**2) == 15 and np.sum(B**2) == 22
    assert np.allclose(probabilities("length_squared"), np.array([1, 5, 9]) / 15, rtol=0, atol=1e-15)
    # optimal weights |A(:,k)||B(k,:)| = (1, 5, 12): the sum 18 gives 18^2 - 202 = 122
    assert np.allclose(probabilities("optimal"), np.array([1, 5, 12]) / 18, rtol=0, atol=1e-15)


@pytest.mark.parametrize("s", [1, 2, 3])
@pytest.mark.parametrize("kind,numerator", [("length_squared", 128), ("optimal", 122), ("uniform", 308)])
def test_exact_variance_of_sampled_product(kind, numerator, s):
    # DKM 2006 (references.md 1.2-1.3, 1.6): E||AB - CR||_F^2 = 128/s (length-squared),
    # 122/s (optimal), 308/s (uniform), by exhaustive enumeration of the 3^s ordered draws.
    mse, mean_cr, mean_cct, total = exact_expectations(kind, s)
    assert total == pytest.approx(1.0, abs=1e-14)
    assert mse == pytest.approx(numerator / s, rel=1e-12)
    # unbiasedness: E[CR] = AB and E[C C^T] = A A^T (references.md 1.1)
    assert np.allclose(mean_cr, A @ B, rtol=0, atol=1e-12)
    assert np.allclose(mean_cct, A @ A.T, rtol=0, atol=1e-12)
    # closed form (references.md 1.2): (1/s)[sum_k |A(:,k)|^2 |B(k,:)|^2 / p_k - ||AB||_F^2]
    p = probabilities(kind)
    closed = (np.sum(np.sum(A**2, 0) * np.sum(B**2, 1) / p) - 202) / s
    assert mse == pytest.approx(closed, rel=1e-12)


@pytest.mark.parametrize("s", [1, 2])
def test_length_squared_bound_and_optimality(s):
    # DKM 2006 / Frieze-Kannan-Vempala (references.md 1.4): with length-squared probabilities
    # E||AB - CR||_F^2 <= ||A||_F^2 ||B||_F^2 / s = 330/s. The bound holds but is not
    # uselessly loose here (128/330 = 0.39), and the optimal probabilities do no worse than
    # length-squared or uniform (references.md 1.3).
    ls = exact_expectations("length_squared", s)[0]
    opt = exact_expectations("optimal", s)[0]
    uni = exact_expectations("uniform", s)[0]
    bound = 15 * 22 / s
    assert ls <= bound
    assert ls >= 0.35 * bound
    assert opt <= ls <= uni
    # exact rational values, to rule out a float coincidence: 128/s, 122/s, 308/s
    assert Fraction(ls).limit_denominator(100) == Fraction(128, s)
    assert Fraction(opt).limit_denominator(100) == Fraction(122, s)
    assert Fraction(uni).limit_denominator(100) == Fraction(308, s)


def test_draw_with_replacement_reproduces_the_exact_variance():
    # The i.i.d. draws of sampling.draw(replace=True) must follow p: a seeded Monte Carlo mean of
    # ||AB - CR||_F^2 over 20,000 estimates with s = 2 matches the exact 64 within 4 standard errors.
    p = probabilities("length_squared")
    rng = np.random.default_rng(2024)
    values = np.empty(20_000)
    for t in range(values.size):
        idx = sampling.draw(p, 2, rng, replace=True)
        c, r = sampled_product(idx, p)
        values[t] = np.sum((A @ B - c @ r) ** 2)
    stderr = values.std(ddof=1) / np.sqrt(values.size)
    assert abs(values.mean() - 64) <= 4 * stderr
    assert stderr < 2  # the check has teeth: 4 standard errors is under 8, against 64


def test_rescaling_is_one_over_sqrt_s_p():
    p = np.array([0.1, 0.2, 0.7])
    idx = np.array([2, 0, 2, 1])
    assert np.allclose(sampling.rescaling(p, idx), 1 / np.sqrt(4 * p[idx]), rtol=1e-15, atol=0)  # measured: equal


# -- leverage scores ----------------------------------------------------------------------------

def seeded_matrix(seed=4, shape=(50, 12)) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal(shape)


@pytest.mark.parametrize("k", [1, 3, 7])
def test_leverage_scores_are_hat_matrix_diagonal_over_k(k):
    # references.md 3.1 (Drineas-Mahoney-Muthukrishnan 2008): pi_j = ||V_k(j,:)||^2 / k, sum 1;
    # V_k V_k^T = A_k^+ A_k is the rank-k hat (projection) matrix, so pi = diag(A_k^+ A_k) / k.
    a = seeded_matrix()
    u, sv, vt = np.linalg.svd(a, full_matrices=False)
    pi = sampling.leverage_scores(vt[:k].T)
    a_k = (u[:, :k] * sv[:k]) @ vt[:k]
    hat = np.linalg.pinv(a_k) @ a_k
    assert pi.sum() == pytest.approx(1.0, abs=1e-14)
    assert np.allclose(pi, np.diag(hat) / k, rtol=0, atol=1e-13)
    assert np.all(pi >= 0) and np.all(pi <= 1 / k + 1e-14)  # a projector's diagonal lies in [0, 1]


def test_row_leverage_is_regression_hat_matrix_diagonal():
    # Hoaglin-Welsch 1978 (from memory): for X with full column rank p, the hat matrix
    # H = X (X^T X)^{-1} X^T has diagonal h_ii in [0, 1] summing to p; with U from the thin QR or
    # SVD of X, h_ii = ||U(i,:)||^2, so the leverage probabilities are h / p.
    x = seeded_matrix(seed=9, shape=(40, 5))
    hat = x @ np.linalg.solve(x.T @ x, x.T)
    q, _ = np.linalg.qr(x)
    pi = sampling.leverage_scores(q)
    assert np.trace(hat) == pytest.approx(5, rel=1e-12)
    assert np.allclose(pi * 5, np.diag(hat), rtol=0, atol=1e-13)
    # full-rank version (references.md 3.1): the diagonal of A^+ A sums to rank(A)
    a = seeded_matrix()
    projector = np.linalg.pinv(a) @ a
    assert np.trace(projector) == pytest.approx(np.linalg.matrix_rank(a), rel=1e-12)


def test_length_squared_probabilities_of_zero_matrix_are_uniform():
    # common practice: an all-zero input gives no information, so every index is equally likely
    assert np.array_equal(sampling.length_squared_probabilities(np.zeros(4)), np.full(4, 0.25))
