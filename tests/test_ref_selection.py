"""Outside references for deterministic column selection and the streaming QR sketch.

* ``scipy.linalg.interpolative.interp_decomp(A, k, rand=False)`` (SciPy's interpolative
  decomposition, column-pivoted QR path; references.md 4.7) and ``scipy.linalg.qr(A,
  pivoting=True)`` (LAPACK geqp3, Businger-Golub pivoting) as references for
  ``selection.pivoted_qr_order`` and the CX fit ``link.cx_mixing``.
* Gu, Eisenstat, SIAM J. Sci. Comput. 17(4), 1996, as restated by Halko, Martinsson, Tropp,
  SIAM Review 53(2), 2011, section 3.3.2 (references.md 4.3): residual <= sqrt(1 + 4k(n-k)) s_{k+1}.
* ``numpy.linalg.qr`` as the reference for the streaming tall-skinny QR; merging R factors is
  associative (Demmel, Grigori, Hoemmen, Langou, SIAM J. Sci. Comput. 34(1), 2012, TSQR).
"""

from __future__ import annotations

import numpy as np
import pytest
from threadpoolctl import threadpool_limits
import scipy.linalg
from scipy.linalg import interpolative

from rankfold.udfs.factor import link, selection
from rankfold.udfs.factor.sketch import StreamingQR


@pytest.fixture(autouse=True, scope="module")
def _one_blas_thread():
    # Small matrices: BLAS threads only add spin-waiting on a busy 2-core machine.
    with threadpool_limits(limits=1):
        yield


M_ROWS, N_COLS, K = 120, 80, 10


def decaying_matrix(seed: int, m=M_ROWS, n=N_COLS):
    """references.md 9.5: A = U diag(s) V^T from QR of Gaussians, s_j = 2^{-j/2} (invented, seeded)."""
    rng = np.random.default_rng(seed)
    u, _ = np.linalg.qr(rng.standard_normal((m, n)))
    v, _ = np.linalg.qr(rng.standard_normal((n, n)))
    s = 2.0 ** (-np.arange(1, n + 1) / 2)
    return (u * s) @ v.T, s


def streaming_r(a: np.ndarray, parts: int) -> np.ndarray:
    qr = StreamingQR(a.shape[1])
    for block in np.array_split(a, parts):
        qr.update(block)
    return qr.factor()


@pytest.mark.parametrize("seed", [3, 4, 5])
def test_pivoted_qr_on_streaming_r_matches_scipy_on_the_table(seed):
    # selection.pivoted_qr_order docstring: pivoted QR of R picks the columns pivoted QR of A picks.
    # Reference: scipy.linalg.qr(A, pivoting=True) on the full table.
    a, _ = decaying_matrix(seed)
    ours = selection.pivoted_qr_order(streaming_r(a, 5), K)
    _, _, piv = scipy.linalg.qr(a, pivoting=True, mode="economic")
    assert np.array_equal(ours, piv[:K])


@pytest.mark.parametrize("seed", [3, 4, 5])
def test_cx_fit_against_scipy_interpolative_decomposition(seed):
    # Reference: scipy.linalg.interpolative.interp_decomp(A, k, rand=False) (references.md 4.7).
    # CX fit with our pivoted-QR columns vs scipy's ID: ours <= 1.1 x scipy's spectral error (the
    # least-squares fit C^+ A is at least as good as any coefficient matrix for the same columns),
    # both inside the Gu-Eisenstat residual sqrt(1 + 4k(n-k)) s_{k+1} (references.md 4.3) and no
    # better than Eckart-Young s_{k+1} (references.md 7.2).
    a, s = decaying_matrix(seed)
    r_factor = streaming_r(a, 4)
    columns = selection.pivoted_qr_order(r_factor, K)
    mixing = link.cx_mixing(r_factor, columns)
    ours = np.linalg.norm(a - a[:, columns] @ mixing, 2)

    idx, proj = interpolative.interp_decomp(a, K, rand=False)
    skeleton = interpolative.reconstruct_skel_matrix(a, K, idx)
    theirs_matrix = interpolative.reconstruct_matrix_from_id(skeleton, idx, proj)
    theirs = np.linalg.norm(a - theirs_matrix, 2)

    gu_eisenstat = np.sqrt(1 + 4 * K * (N_COLS - K)) * s[K]
    assert ours <= 1.1 * theirs
    assert ours <= gu_eisenstat and theirs <= gu_eisenstat
    assert ours >= s[K] * (1 - 1e-10) and theirs >= s[K] * (1 - 1e-10)
    # not uselessly loose on this matrix: both stay within 3 s_{k+1}, far inside the 52.9 s_{k+1}
    # worst-case factor (references.md 4.7 observed 1.16 s_{k+1} for this construction)
    assert ours <= 3 * s[K] and theirs <= 3 * s[K]
    # scipy's deterministic ID is column-pivoted QR ([R], references.md 4.7): the same columns in
    # the same order, so the least-squares CX fit cannot be worse in either norm
    assert np.array_equal(columns, idx[:K])
    assert ours <= theirs * (1 + 1e-10)
    assert np.linalg.norm(a - a[:, columns] @ mixing) <= np.linalg.norm(a - theirs_matrix) * (1 + 1e-10)
    # scipy's coefficients are bounded like an ID (|X_ij| <= 2 in practice, references.md 4.4)
    assert np.abs(proj).max() <= 2


def test_cx_mixing_equals_least_squares_fit_on_the_table():
    # cx_mixing docstring: C^+ Z from the R factor equals the least-squares fit on the table itself
    # (numpy.linalg.lstsq as reference).
    a, _ = decaying_matrix(6)
    r_factor = streaming_r(a, 3)
    columns = selection.pivoted_qr_order(r_factor, K)
    reference = np.linalg.lstsq(a[:, columns], a, rcond=None)[0]
    # measured: at most 3.7e-15 apart (was atol=1e-8)
    assert np.allclose(link.cx_mixing(r_factor, columns), reference, rtol=0, atol=1e-13)


def test_qdeim_picks_the_first_pivots_of_vt():
    # Drmac-Gugercin Q-DEIM (references.md 4.2): indices = first k pivots of pivoted QR of V_k^T;
    # reference scipy.linalg.qr(V_k^T, pivoting=True). The DEIM-CUR error constant eta_p =
    # ||V(p,:)^{-1}|| respects sqrt(m-k+1) sqrt(4^k + 6k - 1)/3 ([R], references.md 4.2).
    a, _ = decaying_matrix(7)
    u, _, _ = np.linalg.svd(a, full_matrices=False)
    basis = u[:, :K]
    rows = selection.qdeim(basis)
    _, _, piv = scipy.linalg.qr(basis.T, pivoting=True, mode="economic")
    assert np.array_equal(rows, piv[:K])
    eta = np.linalg.norm(np.linalg.inv(basis[rows]), 2)
    assert 1 <= eta <= np.sqrt(M_ROWS - K + 1) * np.sqrt(4.0**K + 6 * K - 1) / 3


# -- streaming QR (TSQR) ----------------------------------------------------------------------------

def same_up_to_row_signs(r1: np.ndarray, r2: np.ndarray, atol: float) -> bool:
    """R factors of one matrix agree up to the sign of each row (references: uniqueness of QR
    with nonzero diagonal, e.g. Golub, Van Loan, Matrix Computations, from memory)."""
    signs = np.sign(np.diag(r1)) * np.sign(np.diag(r2))
    signs[signs == 0] = 1
    return np.allclose(r1, signs[:, None] * r2, rtol=0, atol=atol)


@pytest.mark.parametrize("parts", [1, 2, 7])
def test_streaming_qr_matches_numpy_qr(parts):
    rng = np.random.default_rng(parts)
    a = rng.standard_normal((300, 25)) * np.geomspace(1, 1e3, 25)
    ours = streaming_r(a, parts)
    reference = np.linalg.qr(a, mode="r")
    # measured: R within 3.3e-15 of the largest |entry| and R'R within 8e-16 of the largest
    # |entry| of A'A (numpy.linalg.qr); allowed 1e-13 and 1e-14 (were 1e-9)
    assert same_up_to_row_signs(ours, reference, atol=1e-13 * np.abs(reference).max())
    assert np.allclose(ours.T @ ours, a.T @ a, rtol=0, atol=1e-14 * np.abs(a.T @ a).max())


def test_streaming_qr_spectrum_matches_numpy_svd():
    a, s = decaying_matrix(8)
    qr = StreamingQR(N_COLS)
    for block in np.array_split(a, 6):
        qr.update(block)
    spectrum = qr.spectrum()
    assert np.allclose(spectrum.values, np.linalg.svd(a, compute_uv=False), rtol=0, atol=1e-13)
    assert np.allclose(spectrum.values, s, rtol=0, atol=1e-13)
    assert spectrum.optimal_error(K) == pytest.approx(np.sqrt(np.sum(s[K:] ** 2)), rel=1e-12)  # measured 8.9e-16


def test_streaming_qr_merge_is_associative():
    # TSQR reduction (Demmel et al. 2012): (R_a . R_b) . R_c == R_a . (R_b . R_c) == R(whole), up to signs
    rng = np.random.default_rng(12)
    blocks = [rng.standard_normal((rows, 15)) for rows in (40, 9, 70)]  # one block shorter than wide
    parts = []
    for block in blocks:
        q = StreamingQR(15)
        q.update(block)
        parts.append(q)
    left = parts[0].merge(parts[1]).merge(parts[2]).factor()
    right = parts[0].merge(parts[1].merge(parts[2])).factor()
    whole = np.linalg.qr(np.vstack(blocks), mode="r")
    atol = 1e-10 * np.abs(whole).max()
    assert same_up_to_row_signs(left, right, atol)
    assert same_up_to_row_signs(left, whole, atol)


def test_streaming_qr_with_fewer_rows_than_columns():
    # zero-padded R: R^T R is still the Gram matrix A^T A
    rng = np.random.default_rng(13)
    a = rng.standard_normal((6, 10))
    qr = StreamingQR(10)
    for block in np.array_split(a, 3):
        qr.update(block)
    r = qr.factor()
    assert r.shape == (10, 10)
    assert np.allclose(r.T @ r, a.T @ a, rtol=0, atol=1e-12)
    assert np.all(r[6:] == 0)
