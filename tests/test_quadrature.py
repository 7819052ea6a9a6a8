"""Gauss–Legendre quadrature and Wigner-d series against outside references.

References: numpy.polynomial.legendre.leggauss (reference library) for the rule; ``wigners`` (reference
library) for 3j symbols and for small-d values via its Wigner D-matrices, D^j_{m'm}(0, β, 0) = d^j_{m'm}(β);
scipy.special.eval_legendre (reference library) for d^l_{00} = P_l; the product identity and orthogonality
are Varshalovich, Moskalev & Khersonskii 1988, §4.10 and §4.11.1.
"""

import numpy as np
import pytest
import wigners
from scipy.special import eval_legendre

from lensrec.quadrature import gauss_legendre, npoints_for, wigner_d_project, wigner_d_series


def reference_d(lmax, beta):
    """d^l_{mn}(β_k) for l ≤ lmax from wigners' D-matrices (ZYZ Euler angles, α = γ = 0)."""
    matrices = [wigners.wigner_D_array(lmax, 0.0, float(b), 0.0) for b in beta]

    def d(ell, m, n):
        if ell < max(abs(m), abs(n)):
            return np.zeros(len(beta))
        return np.array([mat[ell][m + ell, n + ell].real for mat in matrices])

    return d


def three_j_product(ls, ms, ns):
    """2 (l1 l2 l3; m)(l1 l2 l3; n) from wigners, 0 where a projection exceeds its l (wigners aborts there)."""
    if any(abs(m) > ell for m, ell in zip(ms, ls, strict=True)) or any(
        abs(n) > ell for n, ell in zip(ns, ls, strict=True)
    ):
        return 0.0
    return 2 * wigners.wigner_3j(*ls, *ms) * wigners.wigner_3j(*ls, *ns)


def unit(ell):
    c = np.zeros(ell + 1)
    c[ell] = 1.0
    return c


# ------------------------------------------------------------------------------------------- the rule
def test_gauss_legendre_matches_numpy_and_integrates_polynomials():
    x, w = gauss_legendre(60)
    x_ref, w_ref = np.polynomial.legendre.leggauss(60)  # numpy (reference library)
    # numpy's nodes are exact to ~1e-16 but its weights carry ~2e-12 relative error at n = 60 (measured once
    # against a 40-digit evaluation of 2/((1−x²)P'_n(x)²)); the sharp check is the exactness loop below
    assert np.allclose(x, x_ref, rtol=0, atol=1e-14)
    assert np.allclose(w, w_ref, rtol=5e-12, atol=0)
    assert np.isclose(w.sum(), 2.0, rtol=1e-15, atol=0)
    for k in range(0, 2 * 60, 7):  # exact up to degree 2n − 1 (Abramowitz & Stegun 25.4.29)
        exact = 2.0 / (k + 1) if k % 2 == 0 else 0.0
        assert np.isclose(np.sum(w * x**k), exact, rtol=1e-13, atol=1e-15)


def test_npoints_for_is_the_exactness_threshold():
    assert npoints_for(3000, 3000, 3000) == 4501
    assert npoints_for(10, 11) == 11
    # With npoints_for(l1, l2, l3) nodes the product identity holds to rounding; one node fewer it does not:
    # the threshold is sharp (Varshalovich et al. 1988 §4.11.1 holds for the exact integral only).
    l1, l2, l3 = 20, 17, 29
    exact = 2 * wigners.wigner_3j(l1, l2, l3, 0, 0, 0) ** 2
    for npoints, should_hold in ((npoints_for(l1, l2, l3), True), (npoints_for(l1, l2, l3) - 1, False)):
        x, w = gauss_legendre(npoints)
        product = wigner_d_series(unit(l1), 0, 0, x) * wigner_d_series(unit(l2), 0, 0, x)
        value = wigner_d_project(product, 0, 0, l3, x, w)[l3]
        assert np.isclose(value, exact, rtol=1e-12, atol=0) == should_hold


# -------------------------------------------------------------------------------------- series values
@pytest.mark.parametrize("m", range(-4, 5))
def test_series_against_direct_sums_of_reference_d(m, rng):
    lmax = 16
    beta = rng.uniform(0.0, np.pi, 7)
    d = reference_d(lmax, beta)
    for n in range(-4, 5):
        c = rng.normal(size=(3, lmax + 1))
        got = wigner_d_series(c, m, n, np.cos(beta))
        want = np.array([sum(row[ell] * d(ell, m, n) for ell in range(lmax + 1)) for row in c])
        # O(1) coefficients times |d| ≤ 1 summed over 17 terms: rounding ≲ 1e-14
        assert np.allclose(got, want, rtol=0, atol=1e-13), (m, n)
        assert np.allclose(wigner_d_series(c[0], m, n, np.cos(beta)), want[0], rtol=0, atol=1e-13)


def test_special_values_of_the_convention(rng):
    beta = rng.uniform(0.0, np.pi, 5)
    x = np.cos(beta)
    # Varshalovich et al. §4.16: d^1_{10} = −sin β/√2, d^1_{11} = (1 + cos β)/2, d^2_{2,−2} = sin⁴(β/2)
    assert np.allclose(wigner_d_series(unit(1), 1, 0, x), -np.sin(beta) / np.sqrt(2), atol=1e-15)
    assert np.allclose(wigner_d_series(unit(1), 1, 1, x), (1 + x) / 2, atol=1e-15)
    assert np.allclose(wigner_d_series(unit(2), 2, -2, x), np.sin(beta / 2) ** 4, atol=1e-15)
    # d^l_{mn}(0) = δ_mn
    assert np.isclose(wigner_d_series(unit(9), 3, 3, [1.0])[0], 1.0, atol=1e-14)
    assert np.isclose(wigner_d_series(unit(9), 3, 2, [1.0])[0], 0.0, atol=1e-14)


def test_entries_below_the_lowest_multipole_are_ignored(rng):
    x = np.cos(rng.uniform(0, np.pi, 4))
    c = rng.normal(size=12)
    trimmed = c.copy()
    trimmed[:3] = 0.0
    assert np.array_equal(wigner_d_series(c, 3, -2, x), wigner_d_series(trimmed, 3, -2, x))
    x_gl, w_gl = gauss_legendre(20)
    p = wigner_d_project(rng.normal(size=20), -3, 1, 10, x_gl, w_gl)
    assert np.all(p[:3] == 0.0)


# ----------------------------------------------------------------------------------- product identity
def test_quadrature_identity_for_random_triples(rng):
    checked = 0
    while checked < 40:
        l1, l2, l3 = (int(v) for v in rng.integers(0, 60, 3))
        m1, m2, n1, n2 = (int(v) for v in rng.integers(-4, 5, 4))
        m3, n3 = -m1 - m2, -n1 - n2
        if abs(m3) > 4 or abs(n3) > 4:
            continue
        x, w = gauss_legendre(npoints_for(l1, l2, l3))
        product = wigner_d_series(unit(l1), m1, n1, x) * wigner_d_series(unit(l2), m2, n2, x)
        got = wigner_d_project(product, m3, n3, l3, x, w)[l3]
        want = three_j_product((l1, l2, l3), (m1, m2, m3), (n1, n2, n3))
        # both sides are O(1/l) numbers computed in double precision
        assert np.isclose(got, want, rtol=1e-10, atol=1e-14), (l1, l2, l3, m1, m2, m3, n1, n2, n3)
        checked += 1


@pytest.mark.parametrize(
    "triple,spins",
    [
        ((6000, 5000, 2500), ((2, -1, -1), (0, 1, -1))),
        ((4000, 3999, 1), ((-2, 1, 1), (2, -1, -1))),
        ((3000, 3100, 2900), ((4, -2, -2), (-3, 0, 3))),
    ],
)
def test_quadrature_identity_at_high_multipoles(triple, spins):
    (l1, l2, l3), (ms, ns) = triple, spins
    x, w = gauss_legendre(npoints_for(l1, l2, l3))
    product = wigner_d_series(unit(l1), ms[0], ns[0], x) * wigner_d_series(unit(l2), ms[1], ns[1], x)
    third = wigner_d_series(unit(l3), ms[2], ns[2], x)
    got = wigner_d_project(product, ms[2], ns[2], l3, x, w)[l3]
    want = three_j_product((l1, l2, l3), ms, ns)
    # Errors are relative to the integrand's scale Σ w|f|, not to the result (which cancels down to ~1e-3 of
    # it): the recursions keep d values to ~l·ε ≈ 1e-12 at l = 6000, so allow 3e-12 of that scale. (wigners'
    # 3j agree with a 4000-digit Racah sum to 2e-13 relative for the first triple, checked once.)
    scale = np.sum(w * np.abs(product * third))
    assert abs(got - want) <= 3e-12 * scale, (got, want, abs(got - want) / scale)


# ------------------------------------------------------------------------------------ accuracy at 6000
@pytest.mark.parametrize("m,n", [(0, 0), (2, -2), (4, 1), (-3, 4), (1, 1)])
def test_orthogonality_at_l_6000(m, n):
    lmax = 6000
    x, w = gauss_legendre(npoints_for(lmax, lmax))
    for ell in (6000, 5999, 4321):
        projected = wigner_d_project(wigner_d_series(unit(ell), m, n, x), m, n, lmax, x, w)
        ell_all = np.arange(lmax + 1)
        # Σ_k w_k d^l d^l' = 2/(2l+1) δ_ll' (Varshalovich et al. 1988 §4.10): the scaled result is δ_ll'
        scaled = projected * (2 * ell_all + 1) / 2.0
        expected = np.zeros(lmax + 1)
        expected[ell] = 1.0
        # ~6000-step recursions and 6001-node sums: rounding stays below 1e-10 (a property to verify)
        assert np.max(np.abs(scaled - expected)) < 1e-10, (m, n, ell, np.max(np.abs(scaled - expected)))


def test_legendre_values_at_l_6000(rng):
    x = np.cos(rng.uniform(0.01, np.pi - 0.01, 9))
    got = wigner_d_series(unit(6000), 0, 0, x)
    want = eval_legendre(6000, x)  # scipy (reference library); |P_6000| ~ 0.01 away from the poles
    assert np.allclose(got, want, rtol=0, atol=1e-12)


# -------------------------------------------------------------------------------------------- bad input
def test_bad_input_is_refused():
    x, w = gauss_legendre(5)
    with pytest.raises(TypeError, match="m must be an integer"):
        wigner_d_series([1.0, 2.0], 1.5, 0, x)
    with pytest.raises(ValueError, match="n must be <= 16"):
        wigner_d_series([1.0, 2.0], 0, 17, x)
    with pytest.raises(ValueError, match=r"must lie in \[-1, 1\]"):
        wigner_d_series([1.0, 2.0], 0, 0, [1.5])
    with pytest.raises(ValueError, match="non-finite"):
        wigner_d_series([1.0, np.nan], 0, 0, x)
    with pytest.raises(ValueError, match="w must have the shape of x"):
        wigner_d_project(np.ones(5), 0, 0, 3, x, w[:4])
    with pytest.raises(ValueError, match="last axis of length"):
        wigner_d_project(np.ones(4), 0, 0, 3, x, w)
    with pytest.raises(ValueError, match="npoints must be >= 1"):
        gauss_legendre(0)
    with pytest.raises(ValueError, match="at least one band limit"):
        npoints_for()
