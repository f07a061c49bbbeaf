"""The motion fit's banded normal equations against SciPy (a reference library)."""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse

from skewfix.banded import BandedSystem, grouped_gram, scatter_vector
from skewfix.motion import _apply_second_difference_penalty, second_difference_penalty


def random_observations(rng, n_obs, m, width, size):
    local = rng.normal(size=(n_obs, m, width))
    starts = rng.integers(0, size - width // 2, n_obs)  # some run past the end (zeros there)
    idx = starts[:, None] + np.arange(width)
    local[:, :, :][np.broadcast_to((idx >= size)[:, None, :], local.shape)] = 0.0
    return local, starts


def dense_normal(local, starts, weights, resid, size):
    """J^T W J and J^T W r from the full Jacobian, the plain way."""
    n, m, width = local.shape
    jac = np.zeros((n * m, size + width))
    for i in range(n):
        jac[i * m:(i + 1) * m, starts[i]:starts[i] + width] = local[i]
    jac = jac[:, :size]
    w = np.repeat(weights, m)
    return jac.T @ (jac * w[:, None]), jac.T @ (w * resid.ravel())


@pytest.mark.parametrize("size,width,m", [(50, 8, 2), (203, 24, 2), (97, 12, 3), (7, 4, 1)])
def test_banded_assembly_and_solve_agree_with_dense_and_scipy(size, width, m):
    rng = np.random.default_rng(size)
    local, starts = random_observations(rng, 5 * size, m, width, size)
    weights = rng.uniform(0.0, 1.0, len(local))
    resid = rng.normal(size=(len(local), m))
    lhs_ref, rhs_ref = dense_normal(local, starts, weights, resid, size)
    lhs_ref += 1e-3 * np.eye(size)

    s, blocks, vectors = grouped_gram(local, starts, weights, resid)
    system = BandedSystem(size, width - 1)
    system.add_blocks(s, blocks)
    system.add_diagonal(1e-3)
    dense = np.zeros((size, size))
    for i in range(size):
        for k in range(2 * system.half_width + 1):
            j = i + k - system.half_width
            if 0 <= j < size:
                dense[i, j] = system.band[i, k]
    np.testing.assert_allclose(dense, lhs_ref, atol=1e-9)
    np.testing.assert_allclose(scatter_vector(size, s, vectors), rhs_ref, atol=1e-9)

    # SciPy's banded Cholesky solver (upper form) as the reference solution
    h = system.half_width
    upper = np.zeros((h + 1, size))
    for d in range(h + 1):
        upper[h - d, d:] = np.diagonal(lhs_ref, d)
    expected = scipy.linalg.solveh_banded(upper, rhs_ref)
    np.testing.assert_allclose(system.solve(rhs_ref), expected, rtol=1e-8, atol=1e-10)
    several = np.stack([rhs_ref, -2 * rhs_ref], axis=1)
    np.testing.assert_allclose(system.solve(several)[:, 1], -2 * expected, rtol=1e-8, atol=1e-10)


def test_entries_outside_the_band_are_refused():
    system = BandedSystem(10, 2)
    with pytest.raises(ValueError):
        system.add_entries([0], [3], [1.0])


def test_second_difference_penalty_is_dt_d():
    # D from scipy.sparse.diags (rows 1, -2, 1), the textbook second-difference operator
    n = 11
    d = scipy.sparse.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(n - 2, n)).toarray()
    rows, cols, values = second_difference_penalty(n, 0.5)
    got = np.zeros((n, n))
    np.add.at(got, (rows, cols), values)
    np.testing.assert_allclose(got, 0.5 * d.T @ d)
    x = np.random.default_rng(0).normal(size=n)
    np.testing.assert_allclose(_apply_second_difference_penalty(x), d.T @ d @ x)
