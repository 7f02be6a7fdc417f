"""The spectral density of ``J J^T`` for a plain stack with every layer at one variance q.

With the auxiliary variable w, ``M = M_{D^2}(w) = E[d/(w - d)]``, the master equation
``z M S_{JJ^T}(M) = 1 + M`` becomes (*derived*, docs/derivations.md sec. 2)::

    orthogonal:  z M (1 + M)^{L-1} = (sigma_w^2 M w)^L
    Gaussian:    z M = (1 + M) (sigma_w^2 M w)^L

:class:`_PlainProblem` is its logarithmic form for the continuation solver (:mod:`.solver`).
Atoms (docs/derivations.md sec. 4): ``P(d = 0)`` at zero; with orthogonal weights an atom of d
at a with weight ``p_a > 1 - 1/L`` gives an atom at ``(sigma_w^2 a)^L`` of weight
``1 - L(1 - p_a)``.  The upper edge is the first critical point of the real inverse map
``ln z(w)`` met from infinity.  Two limits bypass the solver: one orthogonal layer of a smooth
phi (:mod:`.pushforward`), and a near-isometric orthogonal stack, relative spread below
``NARROW_SPREAD``, where the law is the semicircle of the predicted m1 and m2 (free central
limit theorem: Voiculescu 1985; Nica and Speicher 2006).  References: Pennington, Schoenholz,
Ganguli 2017 (NeurIPS), sec. 2.3, and 2018 (AISTATS); docs/theory-free-probability.md.
"""

from __future__ import annotations

import math

import numpy as np

from isoscope.activations import get_activation
from isoscope.theory.free_probability._checks import _check_points
from isoscope.theory.free_probability._float64 import _EPS
from isoscope.theory.free_probability.density import ATOM_FLOOR, Density, _make_density
from isoscope.theory.free_probability.derivative import DerivativeLaw, _check_stack
from isoscope.theory.free_probability.grid import _tabulate_checked
from isoscope.theory.free_probability.pushforward import _Pushforward, _pushforward_atoms
from isoscope.theory.free_probability.solver import START, _log_lower, _log_upper, _solved

__all__ = ["NARROW_SPREAD", "plain_density"]


# Near-isometric limit: when the predicted relative spread of lambda, r = sqrt(m2/m1^2 - 1), is
# below NARROW_SPREAD, plain_density returns the semicircle of the predicted m1, m2 (see
# _narrow_density).  Why 1e-3: the continuation stops at y = ETA lambda, which leaves a smeared
# density ~ ETA/(pi delta^2) at a distance delta below the law; for r below about 1e-2 that
# exceeds the support threshold and the solved lower edge comes out several times too low
# (measured: tanh orthogonal, L = 1000, r = 1.7e-3: ln lambda_- = -0.0134 against -0.0035), and
# below r ~ 1e-6 the mass check fails.  The semicircle's error is of relative order r: at r =
# 1.7e-3 its edges are within 5e-6 of those of the large-depth law S = exp(-c z) (0.07 % of the
# width), the check value of tests/test_free_probability.py.
NARROW_SPREAD = 1e-3


class _PlainProblem:
    """Master equation of a plain stack in the auxiliary variable w, ``M = M_{D^2}(w)``.

    Orthogonal: ``log z + (1-L)(log M - log(1+M)) - L log sigma_w^2 - L log w = 0``;
    Gaussian:   ``log z + (1-L) log M - log(1+M) - L log sigma_w^2 - L log w = 0``
    (logarithms of ``z M (1+M)^{L-1} = (sigma_w^2 M w)^L`` and ``z M = (1+M)(sigma_w^2 M w)^L``,
    docs/theory-free-probability.md).  Each logarithm is taken of a number in a known half-plane (z, w up;
    M, 1+M down), so the branch is the one continuous from z = infinity.
    """

    def __init__(self, law: DerivativeLaw, kind: str, sigma: float, depth: int):
        self.law, self.kind, self.depth = law, kind, depth
        self.log_s2 = 2.0 * math.log(sigma)
        mu1, mu2 = law.moment(1), law.moment(2)
        self.mu1, self.mu2 = mu1, mu2
        self.log_m1 = depth * (self.log_s2 + math.log(mu1))

    def evaluate(self, w, log_z):
        m, one_m, dm = self.law._eval(w)
        L = self.depth
        lm, l1m, lw = _log_lower(m), _log_lower(one_m), _log_upper(w)
        if self.kind == "orthogonal":
            f = log_z + (1 - L) * (lm - l1m) - L * (self.log_s2 + lw)
            df = (1 - L) * (dm / m - dm / one_m) - L / w
        else:
            f = log_z + (1 - L) * lm - l1m - L * (self.log_s2 + lw)
            df = (1 - L) * dm / m - dm / one_m - L / w
        # rounding floor of f: a sum of terms as large as L |log|
        floor = _EPS * (
            np.abs(log_z) + L * (np.abs(lm) + np.abs(l1m) + np.abs(lw) + abs(self.log_s2) + 1.0)
        )
        return f, df, (m, one_m, dm, floor)

    @staticmethod
    def valid(w):
        return w.imag > 0

    @staticmethod
    def relative_change(w, dw, aux):
        """Changes of ``ln w``, ``ln M`` and ``ln(1 + M)`` for a step dw (shape ``(3, n)``)."""
        m, one_m, dm, _ = aux
        d_m = dm * dw
        return np.stack([dw / w, d_m / m, d_m / one_m])

    def initial(self, log_z):
        # far from the spectrum M ~ m1/z, and M_{D^2}(w) = mu1/w + mu2/w^2 + ... inverts to
        # w ~ mu1/M + mu2/mu1
        m0 = np.exp(self.log_m1 - log_z)
        w = self.mu1 / m0 + self.mu2 / self.mu1
        return np.where(w.imag > 0, w, w.real + 1e-300j)

    def lambda_g(self, w, eta):
        """``lambda G(lambda(1 + i eta))`` without the zero atom: ``w G_+(w)/(1 + i eta)``."""
        y = w.imag[:, None]
        x = w.real[:, None] - self.law.values
        den = 1.0 / (x * x + y * y)
        g = (x * den) @ self.law.weights - 1j * w.imag * (den @ self.law.weights)
        return w * g / (1.0 + 1j * eta)


def _plain_atoms(law: DerivativeLaw, kind: str, sigma: float, depth: int):
    """Atoms of ``J J^T``: ``(log location or -inf, weight)`` (docs/theory-free-probability.md, *derived*).

    Zero: weight ``P(d = 0)`` in both ensembles.  Orthogonal weights: an atom of d at a with
    weight p_a > 1 - 1/L gives an atom at ``(sigma_w^2 a)^L`` of weight ``1 - L(1 - p_a)``
    (the L-fold free multiplicative convolution of the law of ``sigma_w^2 d``).
    """
    atoms = []
    if law.zero_weight > ATOM_FLOOR:
        atoms.append((-math.inf, law.zero_weight))
    if kind == "orthogonal":
        for a, p in zip(law.values, law.weights):
            w = 1.0 - depth * (1.0 - p)
            if w > ATOM_FLOOR:
                atoms.append((depth * (2.0 * math.log(sigma) + math.log(a)), w))
    return atoms


def _plain_log_z_real(law, kind, sigma, depth, w):
    """``ln z(w)`` and ``d ln z / dw`` on the real axis, w > max(d) (the inverse map)."""
    m, one_m, dm = (a.real for a in law._eval(np.asarray(w, dtype=complex)))
    L = depth
    base = L * (2.0 * math.log(sigma) + np.log(w))
    if kind == "orthogonal":
        return base + (L - 1) * (np.log(m) - np.log(one_m)), L / w + (L - 1) * dm / (m * one_m)
    return base + (L - 1) * np.log(m) + np.log(one_m), L / w + (L - 1) * dm / m + dm / one_m


def _plain_upper_edge(law, kind, sigma, depth) -> tuple[float, bool]:
    """``(ln lambda_+, exact)``: the first critical point of the inverse map met from infinity.

    Along the real axis above the spectrum, ``z(w)`` decreases with w from infinity; the edge is
    the largest w > max(d) with ``dz/dw = 0``.  Without one the spectrum ends where w reaches
    max d: ``(sigma_w^2 max d)^L`` for orthogonal weights (a heavy top atom of d), ``z(max d+)``
    for Gaussian weights (a law of d that thins out at its top); ``exact = False`` then.
    """
    from scipy import optimize

    top = float(law.values[-1])
    t = np.linspace(30.0, -36.0, 331)  # w = top (1 + e^t)
    lz_scan, g = _plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp(t)))
    neg = np.flatnonzero(g < 0)
    if neg.size == 0 or neg[0] == 0:
        if kind == "gaussian":
            # z(w) is monotone down to w = top: M_{D^2} stays bounded there (the law of d thins
            # out at its top, as the quadrature nodes of a smooth phi' do when the maximum of
            # phi'^2 lies beyond the nodes that carry weight: GELU at small q*), so the
            # spectrum ends at z(top+), the last point of the scan
            return float(lz_scan[-1]), False
        return depth * (2.0 * math.log(sigma) + math.log(top)), False
    a, b = t[neg[0]], t[neg[0] - 1]

    def dlog(tt):
        return float(_plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp([tt])))[1][0])

    tc = optimize.brentq(dlog, a, b, xtol=1e-13, rtol=1e-14)
    lz, _ = _plain_log_z_real(law, kind, sigma, depth, top * (1.0 + np.exp([tc])))
    return float(lz[0]), True


def plain_density(
    law: DerivativeLaw, weights: str, sigma_w: float, depth: int, points: int = 400
) -> Density:
    """Spectral density of ``J J^T`` for a plain stack with every layer at variance q.

    Solves the master equation ``z M S_{JJ^T}(M) = 1 + M`` (``G = (1 + M)/z``,
    ``rho = -Im G/pi``) with the auxiliary variable w, ``M = M_{D^2}(w)``:
    orthogonal ``z M (1+M)^{L-1} = (sigma_w^2 M w)^L``, Gaussian
    ``z M = (1+M)(sigma_w^2 M w)^L`` (docs/theory-free-probability.md, *derived*).  For each lambda the solution
    is followed along ``z = lambda + i y`` from ``y = 1e3 max(lambda_+, lambda)`` down to
    ``y = 1e-9 lambda`` (damped Newton on the logarithmic form, all points advancing together);
    the atoms are subtracted from G before taking the imaginary part.  The upper edge is the
    critical point of the real inverse map; other edges are found on the solved density.
    One orthogonal layer of a smooth phi is the law of ``sigma_w^2 phi'(h)^2`` itself and is
    computed by change of variables.  See ``docs/theory-free-probability.md``.

    Args:
      law: :func:`derivative_law` at the variance q (q* for a stack at its fixed point).
      weights: ``"gaussian"`` or ``"orthogonal"``.
      sigma_w: weight scale (not squared).
      depth: number of layers L >= 1.
      points: size of the grid of the continuous part (>= 32).

    Returns:
      :class:`Density`.

    Raises:
      TheoryError: for invalid arguments or when the solve does not converge.

    References:
      Pennington, Schoenholz, Ganguli 2017 (NeurIPS), sec. 2.3 and 2018 (AISTATS); the solver
      is described in docs/theory-free-probability.md.
    """
    kind, sigma, depth = _check_stack(law, weights, sigma_w, depth)
    points = _check_points(points)
    atoms = _plain_atoms(law, kind, sigma, depth)
    if kind == "orthogonal" and depth == 1 and not law.exact:
        atoms = [a for a in atoms if not math.isfinite(a[0])]  # nodes are not atoms
    mass = 1.0 - sum(w for _, w in atoms)
    regime = (
        f"N -> infinity, q^l = q = {law.q:.6g} for every layer (the fixed point q*), "
        f"{kind} weights, sigma_w = {sigma:.6g}, L = {depth}"
    )
    if mass <= 1e-10 or law.positive_weight <= 0:
        return _make_density([], [], atoms, [], regime)
    spread = law.relative_variance()
    if kind == "orthogonal" and not atoms and depth * spread < NARROW_SPREAD**2:
        return _narrow_density(
            depth * 2.0 * math.log(sigma) + depth * law.log_mu1, depth * spread, points, regime
        )
    if kind == "gaussian" or law.zero_weight > 0:
        # the density reaches down to lambda = 0 like a power: ln lambda spreads ~ 16 L
        span = 40.0 + 20.0 * depth * (spread + (1.0 if kind == "gaussian" else 0.0))
    else:
        # orthogonal, no zero atom: a lower edge near -(c + ln c + 1), c = L * spread
        c = depth * spread
        span = 40.0 + 3.0 * (c + math.log1p(c))
    if kind == "orthogonal" and depth == 1:
        push = _Pushforward(get_activation(law.activation), law.q, sigma)
        atoms = _pushforward_atoms(law, push, sigma)
        mass = 1.0 - sum(w for _, w in atoms)
        if mass <= 1e-10:
            return _make_density([], [], atoms, [], regime)
        ell_top = push.log_top

        def evaluate(ell, strict):
            return push(np.asarray(ell, dtype=float))
    else:
        problem = _PlainProblem(law, kind, sigma, depth)
        ell_top, _ = _plain_upper_edge(law, kind, sigma, depth)

        def evaluate(ell, strict):
            ell = np.asarray(ell, dtype=float)
            s_top = math.log(START) + np.maximum(ell, ell_top)
            return _solved(problem, ell, s_top, atoms, "plain-stack", strict)

    ell, rl, intervals = _tabulate_checked(evaluate, ell_top, mass, span, points, "plain-stack")
    return _make_density(ell, rl, atoms, intervals, regime)


def _narrow_density(log_m1: float, rel_var: float, points: int, regime: str) -> Density:
    """The near-isometric limit: a semicircle in lambda of mean m1 and variance ``m1^2 rel_var``.

    Used when the predicted relative spread ``sqrt(m2/m1^2 - 1) = sqrt(L Var(d)/E[d]^2)``
    (orthogonal weights, docs/theory-free-probability.md: ``m2 = m1^2 (1 + L t1)``) is below
    ``NARROW_SPREAD`` = 1e-3: the law is then narrower than the continuation solver resolves.
    ``J J^T`` is a free product of L factors ``sigma_w^2 D_l^2`` each within a relative
    ``sqrt(Var(d))/E[d]`` of a multiple of the identity, so to leading order ``lambda/m1 - 1`` is
    a free sum of L small free variables and, by the free central limit theorem (Voiculescu 1985;
    Nica and Speicher 2006, the free central limit theorem), semicircular: density
    ``2 sqrt(R^2 - (u - 1)^2)/(pi R^2)`` in ``u = lambda/m1`` with ``R = 2 sqrt(rel_var)``.  Its
    first two moments are exact (m1 and m2 of the Lagrange series); the skewness it drops is of
    relative order ``sqrt(rel_var)`` < 1e-3.  Built in logs: ``ln lambda = ln m1 + log1p(R cos t)``.
    """
    r = 2.0 * math.sqrt(max(rel_var, 0.0))
    regime = (
        f"{regime}; near-isometric limit: predicted relative spread "
        f"sqrt(m2/m1^2 - 1) = {math.sqrt(max(rel_var, 0.0)):.3g} < {NARROW_SPREAD:g}, below "
        "what the density solver resolves: semicircle with the predicted m1 and m2 "
        "(free central limit)"
    )
    if r == 0.0:
        return _make_density([], [], [(log_m1, 1.0)], [], regime)
    t = np.pi * (points - 0.5 - np.arange(points)) / points  # from pi to 0: lambda increasing
    u = np.cos(t)
    ell = log_m1 + np.log1p(r * u)
    # rho_log d ell = rho_u du, du = lambda/m1 d ell: rho_log = (1 + r u) rho_u
    rho_u = 2.0 * np.sqrt(np.maximum(1.0 - u * u, 0.0)) / (math.pi * r)
    rl = (1.0 + r * u) * rho_u
    lo, hi = log_m1 + math.log1p(-r), log_m1 + math.log1p(r)
    ell = np.concatenate([[lo], ell, [hi]])
    rl = np.concatenate([[0.0], rl, [0.0]])
    return _make_density(ell, rl, [], [(lo, hi)], regime)
