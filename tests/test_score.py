"""Spectrum statistics and the isometry score."""

import math

import numpy as np

from isoscope.score import score_spectrum
from isoscope.spectrum import from_singular_values


def test_perfect_isometry_scores_one():
    sc = score_spectrum(from_singular_values(np.ones((3, 50)), np.float64), depth=10)
    assert sc.isometry == 1.0 and sc.verdict == "isometric" and sc.gain_per_layer == 1.0


def test_score_formula_and_zeros():
    s = np.array([[0.0, 0.5, 1.0, 2.0]])
    sp = from_singular_values(s, np.float64)
    assert sp.zero_fraction == 0.25
    lam = s.ravel() ** 2
    sc = score_spectrum(sp, depth=2)
    # I = E[min(lambda, 1/lambda)] = (0 + 0.25 + 1 + 0.25)/4 (score.py definition)
    assert math.isclose(sc.isometry, (0 + 0.25 + 1 + 0.25) / 4)
    assert math.isclose(sc.gain, lam.mean())
    assert math.isclose(sc.normalised_variance, (lam**2).mean() / lam.mean() ** 2 - 1)
    assert math.isclose(sp.log_s_mean, np.mean(np.log([0.5, 1.0, 2.0])))


def test_gain_and_shape_are_separated():
    base = np.random.default_rng(0).uniform(0.9, 1.1, size=(2, 100))
    a = score_spectrum(from_singular_values(base, np.float64), 4)
    b = score_spectrum(from_singular_values(base * 0.1, np.float64), 4)
    assert math.isclose(a.shape_score, b.shape_score, rel_tol=1e-12)
    assert math.isclose(a.normalised_variance, b.normalised_variance, rel_tol=1e-9)
    assert b.verdict == "vanishing" and a.verdict == "isometric"
    assert math.isclose(b.gain_per_layer, a.gain_per_layer * 0.01**0.25, rel_tol=1e-12)


def test_zero_threshold_is_matrix_rank_tolerance():
    # numpy.linalg.matrix_rank: tol = S.max() * max(M, N) * eps
    s = np.array([[1.0, 1e-3, 50 * np.finfo(float).eps, 0.0]])
    sp = from_singular_values(s, np.float64)
    m = np.diag(s.ravel())
    assert (sp.size - sp.zero_mask.sum()) == np.linalg.matrix_rank(m)
