"""Initializers against exact random-matrix facts and scipy."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats

from isoscope.errors import InputError
from isoscope.initializers import gaussian, gaussian_bias, get_initializer, orthogonal, uniform


def _haar(n, count, seed=0):
    keys = jax.random.PRNGKey(seed)
    return np.asarray(orthogonal(1.0)(keys, (count, n, n)))


def test_orthogonal_is_orthogonal_and_scaled():
    q = np.asarray(orthogonal(1.7)(jax.random.PRNGKey(1), (3, 50, 50)))
    for m in q:
        np.testing.assert_allclose(m @ m.T, 1.7**2 * np.eye(50), atol=1e-12)
    tall = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(2), (40, 20)))
    np.testing.assert_allclose(tall.T @ tall, np.eye(20), atol=1e-12)
    wide = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(3), (20, 40)))
    np.testing.assert_allclose(wide @ wide.T, np.eye(20), atol=1e-12)


def test_haar_trace_moments_and_det_signs():
    # Haar measure on O(N), N >= 2: E tr Q = 0 and E (tr Q)^2 = 1 (Diaconis & Shahshahani 1994,
    # Theorem 2; without the sign fix of Mezzadri 2007 the law is not Haar).
    q = _haar(10, 20000)
    tr = np.trace(q, axis1=1, axis2=2)
    se = tr.std() / np.sqrt(tr.size)
    assert abs(tr.mean()) < 4 * se
    assert abs((tr**2).mean() - 1.0) < 4 * (tr**2).std() / np.sqrt(tr.size)
    det = np.linalg.det(q)
    frac_pos = np.mean(det > 0)
    assert abs(frac_pos - 0.5) < 4 * 0.5 / np.sqrt(
        det.size
    )  # both signs, each with probability 1/2


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
    assert abs(w.var() * n / 1.3**2 - 1) < 5 * np.sqrt(2.0) / n
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


@pytest.mark.parametrize("rows,cols", [(12, 12), (30, 7), (7, 30), (2, 2)])
def test_haar_entry_follows_the_exact_beta_law(rows, cols):
    # A column of a Haar matrix is uniform on the sphere S^(m-1), m its length, so
    # Q_11^2 ~ Beta(1/2, (m - 1)/2) exactly (Mezzadri 2007, sec. 2; the uniform law on the sphere).
    # Wide shapes have orthonormal rows, so the first row is uniform on S^(cols-1).
    q = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(11), (6000, rows, cols)))
    m = max(rows, cols)
    for entry in (q[:, 0, 0], q[:, -1, -1]):
        assert stats.kstest(entry**2, stats.beta(0.5, (m - 1) / 2).cdf).pvalue > 1e-3
        # symmetric about 0: both signs with probability 1/2
        assert abs(np.mean(entry > 0) - 0.5) < 4 * 0.5 / np.sqrt(entry.size)


def test_haar_entry_moments():
    # E Q_ij^2 = 1/N and E Q_ij^4 = 3/(N(N+2)) for Haar on O(N) (moments of a coordinate of the
    # uniform law on S^(N-1): Beta(1/2, (N-1)/2) moments, a(a+1)/((a+b)(a+b+1)) with a = 1/2)
    n, count = 20, 3000
    q = np.asarray(orthogonal(1.0)(jax.random.PRNGKey(12), (count, n, n)))
    e2, e4 = (q**2).reshape(count, -1).mean(axis=1), (q**4).reshape(count, -1).mean(axis=1)
    for sample, want in ((e2, 1.0 / n), (e4, 3.0 / (n * (n + 2)))):
        assert abs(sample.mean() - want) < 5 * sample.std() / np.sqrt(count) + 1e-15, (
            sample.mean(),
            want,
        )


def test_haar_is_orthogonal_to_dtype_precision_in_both_dtypes():
    for dtype, tol in ((jnp.float64, 1e-13), (jnp.float32, 5e-6)):
        q = np.asarray(
            orthogonal(1.0)(jax.random.PRNGKey(13), (4, 256, 256), dtype), dtype=np.float64
        )
        for m in q:  # Householder products are orthogonal to O(N eps) (Higham 2002, sec. 19.3)
            assert np.max(np.abs(m @ m.T - np.eye(256))) < tol


def test_reused_draws_give_bit_identical_parameters_and_sample_once():
    """Inside ``reused_draws`` a second design of the same shape and seed takes its unit draws
    from memory; its parameters equal a fresh sample bit for bit (the scale multiplies outside
    the sampler), and a different key still draws anew."""
    import jax
    import numpy as np

    from isoscope.initializers import reused_draws
    from isoscope.network import plain_stack

    key = jax.random.PRNGKey(3)
    fresh = [
        plain_stack(16, 3, "tanh", weights=w, sigma_w=s, sigma_b=0.2).init(key)
        for w in ("orthogonal", "gaussian")
        for s in (0.9, 1.3)
    ]
    with reused_draws() as cache:
        kept = [
            plain_stack(16, 3, "tanh", weights=w, sigma_w=s, sigma_b=0.2).init(key)
            for w in ("orthogonal", "gaussian")
            for s in (0.9, 1.3)
        ]
        other = plain_stack(16, 3, "tanh", sigma_w=0.9).init(jax.random.PRNGKey(4))
    for a, b in zip(fresh, kept):
        assert all(np.array_equal(np.asarray(a[k]), np.asarray(b[k])) for k in ("W", "b"))
    assert not np.array_equal(np.asarray(other["W"]), np.asarray(kept[0]["W"]))
    # misses: Haar, bias, Gaussian weights, and the two draws of the other key; hits: both draws
    # at each second scale, and the Gaussian design's bias (the same key and shape as before)
    assert (cache.hits, cache.misses) == (4 + 1, 3 + 2)
