"""The bias estimators' algebra on synthetic Gaussian fields whose answers are known in closed form.

The quadratic "estimator" used here is the product of two maps, q{a, b}(n) = a(n) b(n) (symmetric in its
legs). For independent isotropic Gaussian fields its spectrum is the Gaunt sum

    C^{(1)}_L[C^a, C^b] = Σ_{l1 l2} (2l1+1)(2l2+1)/(4π) (l1 l2 L; 0 0 0)² C^a_l1 C^b_l2

(3j orthogonality; Varshalovich, Moskalev & Khersonskii 1988, §8.5), evaluated with wigners' 3j symbols,
and the Gaussian noise of q{d, d} = d² is 2 C^{(1)}[C^d, C^d] (Wick's theorem, two pairings).
"""

import numpy as np
import pytest

from lensrec.biases import (
    half_split_mean_fields,
    mean_field_power,
    mean_field_split_spectrum,
    monte_carlo_n0,
    monte_carlo_n1,
    normalization_correction,
    realization_dependent_n0,
)
from lensrec.power import cross_spectrum

LMAX_FIELD = 24
LMAX_Q = 32


def _nalm(lmax):
    return (lmax + 1) * (lmax + 2) // 2


def _ell(lmax):
    return np.concatenate([np.arange(m, lmax + 1) for m in range(lmax + 1)])


def _gaussian(rng, cl, lmax, count=None):
    """⟨|a_lm|²⟩ = C_l, m = 0 real (healpy layout; the first lmax + 1 entries are m = 0)."""
    shape = (_nalm(lmax),) if count is None else (count, _nalm(lmax))
    alm = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / np.sqrt(2.0)
    alm[..., : lmax + 1] = alm[..., : lmax + 1].real * np.sqrt(2.0)
    return alm * np.sqrt(cl[_ell(lmax)])


def _grid():
    import ducc0

    ntheta = (2 * LMAX_FIELD + LMAX_Q) // 2 + 2
    nphi = 2 * LMAX_FIELD + LMAX_Q + 2

    def synth(alm):
        return ducc0.sht.synthesis_2d(
            alm=alm[None], lmax=LMAX_FIELD, spin=0, geometry="GL", ntheta=ntheta, nphi=nphi, nthreads=1
        )[0]

    def analyze(values):
        return ducc0.sht.analysis_2d(map=values[None], lmax=LMAX_Q, spin=0, geometry="GL", nthreads=1)[0]

    return synth, analyze


def _product(synth, analyze, a, b):
    """Exact harmonic coefficients of a(n) b(n) to LMAX_Q (Gauss–Legendre quadrature of a band-limited product)."""
    return analyze(synth(a) * synth(b))


def _gaunt_spectrum(cl_a, cl_b):
    import wigners

    out = np.zeros(LMAX_Q + 1)
    for L in range(LMAX_Q + 1):
        for l1 in range(LMAX_FIELD + 1):
            for l2 in range(abs(L - l1), min(LMAX_FIELD, L + l1) + 1):
                if (l1 + l2 + L) % 2:
                    continue
                w = wigners.wigner_3j(l1, l2, L, 0, 0, 0)
                out[L] += (2 * l1 + 1) * (2 * l2 + 1) / (4 * np.pi) * w * w * cl_a[l1] * cl_b[l2]
    return out


@pytest.fixture(scope="module")
def cmb_like():
    ell = np.arange(LMAX_FIELD + 1)
    cl = 1.0 / (ell + 5.0) ** 2
    cl[0] = 0.0  # no monopole: q then has no mean at L >= 1
    return cl


def _pooled_ratio(samples, expected, ells):
    """Mean over repetitions and multipoles of samples/expected, and its standard error across repetitions."""
    ratios = (samples[:, ells] / expected[ells]).mean(axis=1)
    return ratios.mean(), ratios.std(ddof=1) / np.sqrt(ratios.size)


def test_half_split_mean_field_spectrum_is_unbiased_and_a_single_mean_is_not(rng):
    # Fields g + MF with a fixed mean-field MF. The split spectrum has expectation C^g exactly; subtracting one
    # mean of n simulations from both sides adds C^g/n (module docstring of lensrec.biases; common practice).
    lmax, n, repeats = 48, 6, 300
    ell = np.arange(lmax + 1)
    cl_g = 1.0 / (ell + 3.0) ** 2
    mf = _gaussian(np.random.default_rng(5), 30.0 * cl_g, lmax)
    split, naive, mf_cross, mf_naive = [], [], [], []
    for _ in range(repeats):
        sims = _gaussian(rng, cl_g, lmax, count=n) + mf
        data = _gaussian(rng, cl_g, lmax) + mf
        one, two = half_split_mean_fields(sims)
        split.append(mean_field_split_spectrum(data, one, two))
        naive.append(cross_spectrum(data - sims.mean(axis=0)))
        mf_cross.append(mean_field_power(one, two))
        mf_naive.append(cross_spectrum(sims.mean(axis=0)))
    ells = np.arange(2, lmax + 1)
    ratio, sigma = _pooled_ratio(np.array(split), cl_g, ells)
    assert abs(ratio - 1.0) < 4 * sigma  # 4 sigma of the pooled Monte-Carlo mean, no systematic allowance
    naive_ratio, naive_sigma = _pooled_ratio(np.array(naive), cl_g, ells)
    assert abs(naive_ratio - (1.0 + 1.0 / n)) < 4 * naive_sigma  # the expected 1/n excess of a single mean
    assert naive_ratio - 1.0 > 10 * sigma  # so the test above would see the bias if the split were wrong
    cl_mf = cross_spectrum(mf)
    mf_ratio, mf_sigma = _pooled_ratio(np.array(mf_cross), cl_mf, ells)
    assert abs(mf_ratio - 1.0) < 4 * mf_sigma  # cross of the halves: the mean-field power without its noise
    naive_mf_ratio, _ = _pooled_ratio(np.array(mf_naive), cl_mf, ells)
    expected_excess = np.mean(cl_g[ells] / cl_mf[ells]) / n
    assert naive_mf_ratio - 1.0 > 0.5 * expected_excess  # a single mean's power carries C^g/n on top


def test_half_split_leaves_out_the_excluded_simulation():
    stack = np.arange(10.0)[:, None] * np.ones((10, 3)) + 0j
    one, two = half_split_mean_fields(stack, exclude=4)
    # rows left: 0 1 2 3 5 6 7 8 9 -> even positions 0 2 5 7 9, odd positions 1 3 6 8
    np.testing.assert_allclose(one.real, np.mean([0, 2, 5, 7, 9]))
    np.testing.assert_allclose(two.real, np.mean([1, 3, 6, 8]))


def test_rdn0_of_independent_gaussian_legs_is_the_gaussian_noise(rng, cmb_like):
    # Data with power (1 + eps) C, simulations with C. Exact expectations (Wick, module docstring):
    #   4 C^{ds} - 2 C^{ss'} -> 2 (1 + 2 eps) C1,   2 C^{ss'} -> 2 C1,   true N0 of the data 2 (1 + eps)^2 C1,
    # so RDN0 follows the data's power to first order (Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609, §3).
    synth, analyze = _grid()
    n, repeats = 6, 40
    c1 = _gaunt_spectrum(cmb_like, cmb_like)
    ells = np.arange(2, LMAX_Q + 1)
    for eps in (0.0, 0.2):
        rdn0, mcn0 = [], []
        for _ in range(repeats):
            data = _gaussian(rng, (1.0 + eps) * cmb_like, LMAX_FIELD)
            sims = _gaussian(rng, cmb_like, LMAX_FIELD, count=n)
            ds = [cross_spectrum(_product(synth, analyze, data, s)) for s in sims]
            ss = [cross_spectrum(_product(synth, analyze, sims[i - 1], sims[i])) for i in range(1, n)]
            rdn0.append(realization_dependent_n0(ds, ss).value)
            mcn0.append(monte_carlo_n0(ss).value)
        ratio, sigma = _pooled_ratio(np.array(rdn0), 2 * (1 + 2 * eps) * c1, ells)
        assert abs(ratio - 1.0) < 4 * sigma  # 4 sigma of the pooled Monte-Carlo mean
        mc_ratio, mc_sigma = _pooled_ratio(np.array(mcn0), 2 * c1, ells)
        assert abs(mc_ratio - 1.0) < 4 * mc_sigma
        if eps:
            true_n0 = 2 * (1 + eps) ** 2 * c1
            rd_off, _ = _pooled_ratio(np.array(rdn0), true_n0, ells)
            mc_off, _ = _pooled_ratio(np.array(mcn0), true_n0, ells)
            # second order in eps for RDN0 (1.4/1.44 = 0.972), first order for MC-N0 (1/1.44 = 0.694)
            assert abs(rd_off - 1.4 / 1.44) < 4 * sigma
            assert abs(mc_off - 1.0 / 1.44) < 4 * mc_sigma


def test_rdn0_error_matches_its_scatter(rng, cmb_like):
    # The quoted Monte-Carlo error must describe the scatter of the estimate (its chi2 per degree of freedom ~ 1).
    synth, analyze = _grid()
    c1 = _gaunt_spectrum(cmb_like, cmb_like)
    n, repeats, ells = 5, 30, np.arange(4, LMAX_Q + 1)
    pulls = []
    for _ in range(repeats):
        data = _gaussian(rng, cmb_like, LMAX_FIELD)
        sims = _gaussian(rng, cmb_like, LMAX_FIELD, count=n)
        ds = [cross_spectrum(_product(synth, analyze, data, s)) for s in sims]
        ss = [cross_spectrum(_product(synth, analyze, sims[i - 1], sims[i])) for i in range(1, n)]
        estimate = realization_dependent_n0(ds, ss)
        pulls.append((estimate.value[ells] - 2 * c1[ells]) / estimate.error[ells])
    rms = np.sqrt(np.mean(np.square(pulls)))
    # the rms pull of ~ 900 values is 1 within a few percent if the error is right; the error of a 5-sample
    # standard deviation is itself noisy (Student t with 4 dof inflates the rms pull to sqrt(2) at most)
    assert 0.8 < rms < 1.6


def test_mc_n1_recovers_the_cross_contraction_of_a_shared_component(rng, cmb_like):
    # a = x + u, b = y + u (shared u, the analogue of a shared phi), b' = y + u' (independent). For Gaussian
    # fields (Wick) C^{ab} - C^{ab'} = C1[C^u, C^u] exactly, so 2 <C^{ab} - C^{ab'}> = 2 C1[C^u, C^u].
    synth, analyze = _grid()
    cl_u = 0.3 * cmb_like
    expected = 2 * _gaunt_spectrum(cl_u, cl_u)
    n, repeats = 8, 25
    ells = np.arange(2, LMAX_Q + 1)
    values = []
    for _ in range(repeats):
        x, y = _gaussian(rng, cmb_like, LMAX_FIELD, 2 * n).reshape(2, n, -1)
        u, u_other = _gaussian(rng, cl_u, LMAX_FIELD, 2 * n).reshape(2, n, -1)
        shared = [cross_spectrum(_product(synth, analyze, x[i] + u[i], y[i] + u[i])) for i in range(n)]
        independent = [cross_spectrum(_product(synth, analyze, x[i] + u[i], y[i] + u_other[i])) for i in range(n)]
        values.append(monte_carlo_n1(shared, independent).value)
    ratio, sigma = _pooled_ratio(np.array(values), expected, ells)
    assert abs(ratio - 1.0) < 4 * sigma  # 4 sigma of the pooled Monte-Carlo mean


def test_normalization_correction_recovers_a_known_response(rng):
    # phi_hat = rho phi + noise: <C^{phi_hat phi}> / <C^{phi phi}> = rho exactly, so the power correction is 1/rho^2.
    lmax, n, repeats, rho = 64, 10, 200, 0.9
    ell = np.arange(lmax + 1)
    cl_phi = 1.0 / (ell + 10.0) ** 3
    bins = np.zeros((4, lmax + 1))
    for k, (lo, hi) in enumerate([(2, 10), (10, 20), (20, 40), (40, 65)]):
        bins[k, lo:hi] = 2 * ell[lo:hi] + 1
    factors, errors = [], []
    for _ in range(repeats):
        phi = _gaussian(rng, cl_phi, lmax, count=n)
        noise = _gaussian(rng, 2.0 * cl_phi, lmax, count=n)
        cross = [cross_spectrum(rho * p + e, p) for p, e in zip(phi, noise, strict=True)]
        auto = [cross_spectrum(p) for p in phi]
        estimate = normalization_correction(cross, auto, binning=bins)
        factors.append(estimate.value)
        errors.append(estimate.error)
    factors, errors = np.array(factors), np.array(errors)
    truth = 1.0 / rho**2
    spread = factors.std(axis=0, ddof=1)
    assert np.all(np.abs(factors.mean(axis=0) - truth) < 4 * spread / np.sqrt(repeats) + 0.002)  # + delta-method bias
    # the delta-method error describes the scatter to within 25% (200 repetitions; 1/sqrt(2*200) = 5% per sigma)
    np.testing.assert_allclose(np.sqrt(np.mean(errors**2, axis=0)) / spread, 1.0, atol=0.25)


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError, match="at least 2"):
        realization_dependent_n0(np.ones((1, 5)), np.ones((3, 5)))
    with pytest.raises(ValueError, match="same L range"):
        realization_dependent_n0(np.ones((3, 5)), np.ones((3, 6)))
    with pytest.raises(ValueError, match="same shape"):
        monte_carlo_n1(np.ones((3, 5)), np.ones((4, 5)))
    with pytest.raises(ValueError, match="non-finite"):
        monte_carlo_n0(np.full((3, 5), np.nan))
    with pytest.raises(ValueError, match="besides the excluded"):
        half_split_mean_fields(np.ones((2, 3), complex), exclude=0)
    with pytest.raises(ValueError, match="columns"):
        normalization_correction(np.ones((3, 5)), np.ones((3, 5)), binning=np.ones((2, 4)))
