"""Initializers against exact random-matrix facts and scipy."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

from isoscope.errors import InputError
from isoscope.initializers import gaussian, get_initializer, gaussian_bias, orthogonal, uniform


def _haar(n, count, seed=0):
    keys = jax.random.PRNGKey(seed)
    return np.asarray(orthogonal(1.0)(keys, (count, n, n)))


def test_orthogonal_is_orthogonal_and_scaled():
    q = np.asarray(orthogonal(1.7)(jax.random.PRNGKey(1), (3, 50, 50)))
    for m in q:
        np.testing.assert_allclose(m @ m.T, 1.7 ** 2 * np.eye(50), atol=1e-12)
    tall = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(2), (40, 20)))
    np.testing.assert_allclose(tall.T @ tall, np.eye(20), atol=1e-12)
    wide = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(3), (20, 40)))
    np.testing.assert_allclose(wide @ wide.T, np.eye(20), atol=1e-12)


def test_haar_trace_moments_and_det_signs():
    # Haar measure on O(N), N >= 2: E tr Q = 0 and E (tr Q)^2 = 1 (Diaconis & Shahshahani 1994,
    # Theorem 2; THEORY.md sec. 6 notes 3.9 at N = 10 without the sign fix).
    q = _haar(10, 20000)
    tr = np.trace(q, axis1=1, axis2=2)
    se = tr.std() / np.sqrt(tr.size)
    assert abs(tr.mean()) < 4 * se
    assert abs((tr ** 2).mean() - 1.0) < 4 * (tr ** 2).std() / np.sqrt(tr.size)
    det = np.linalg.det(q)
    frac_pos = np.mean(det > 0)
    assert abs(frac_pos - 0.5) < 4 * 0.5 / np.sqrt(det.size)  # both signs, each with probability 1/2


def test_haar_matches_scipy_ortho_group():
    # two-sample KS on tr Q and on Q_11 against scipy.stats.ortho_group (Haar on O(N))
    n, count = 6, 4000
    ours = _haar(n, count, seed=5)
    ref = stats.ortho_group.rvs(n, size=count, random_state=np.random.default_rng(5))
    for f in (lambda m: np.trace(m, axis1=1, axis2=2), lambda m: m[:, 0, 0]):
        assert stats.ks_2samp(f(ours), f(ref)).pvalue > 1e-3


def test_gaussian_and_uniform_variance():
    n = 400
    w = np.asarray(gaussian(1.3)(jax.random.PRNGKey(0), (n, n)))
    # Var W_ij = sigma_w^2 / fan_in; relative standard error of a sample variance ~ sqrt(2/n^2)
    assert abs(w.var() * n / 1.3 ** 2 - 1) < 5 * np.sqrt(2.0) / n
    u = np.asarray(uniform(1.3)(jax.random.PRNGKey(0), (n, n)))
    bound = 1.3 * np.sqrt(6.0 / (2 * n))  # Glorot & Bengio 2010, eq. 16, times the gain
    assert np.abs(u).max() <= bound
    assert stats.kstest(u.ravel() / bound, stats.uniform(-1, 2).cdf).pvalue > 1e-3
    b = np.asarray(gaussian_bias(0.2)(jax.random.PRNGKey(4), (20000,)))
    assert stats.kstest(b / 0.2, stats.norm.cdf).pvalue > 1e-3


@pytest.mark.parametrize("name", ["gaussian", "orthogonal", "uniform"])
@pytest.mark.parametrize("dtype", [jnp.float32, jnp.float64])
def test_dtype_and_shape_preserved(name, dtype):
    w = get_initializer(name, 1.0)(jax.random.PRNGKey(0), (3, 8, 8), dtype)
    assert w.shape == (3, 8, 8) and w.dtype == dtype


def test_bad_initializer_input():
    with pytest.raises(InputError, match="unknown weight initializer 'ortho'.*orthogonal"):
        get_initializer("ortho", 1.0)
    with pytest.raises(InputError, match="negative"):
        get_initializer("gaussian", -1.0)
