"""The joint ("generalized") minimum-variance estimator GMV: joint filter, normalization, N0, position space.

Sources: the estimator ḡ = ½ Σ_pq Σ (3j) [f^pq]* (C⁻¹X)^p (C⁻¹X)^q over the nine ordered field pairs with the
3×3 total covariance C per ℓ, its response R = 1/(2(2L+1)) Σ f* C⁻¹ f C⁻¹ and N0 = 1/R, and the result that
its N0 is at most that of the five-estimator MV combination (Maniyar, Ali-Haïmoud, Carron, Lewis &
Madhavacheril 2021, PRD 103, 083524); response functions f with the ₛF functions of Okamoto & Hu 2003, PRD 67,
083002 (OH03, Table I), the curl kernel in its spin-±1 form (Namikawa, Yamauchi & Taruya 2012, JCAP 01, 007);
Gaussian noise by Wick's theorem (OH03 §III); Wigner 3j symbols from ``wigners`` (reference library).
"""

import functools

import healpy as hp
import numpy as np
import pytest
import wigners

import lensrec
from lensrec import harmonics
from lensrec.estimator_noise import reconstruction_noise
from lensrec.filtering import FilteredFields, IsotropicFilter, joint_inverse_spectra
from lensrec.reconstruction import quadratic_estimates, reconstruct_filtered

LMAX = 100
L_CHECK = (2, 3, 16, 57, 100)
PAIRS = [p + q for p in "TEB" for q in "TEB"]


# ------------------------------------------------------------------------------------ 3j tables (wigners)
@functools.cache
def three_j(l1, l2, l3, m1, m2, m3):
    """(l1 l2 l3; m1 m2 m3) from wigners, zero outside the selection rules (wigners aborts on |m| > j)."""
    if abs(m1) > l1 or abs(m2) > l2 or abs(m3) > l3 or m1 + m2 + m3 != 0 or not abs(l1 - l2) <= l3 <= l1 + l2:
        return 0.0
    return wigners.wigner_3j(l1, l2, l3, m1, m2, m3)


def table(L, spins, lmax):
    """T[l1, l2] = (l1 L l2; s1 sL s2)."""
    s1, s_l, s2 = spins
    out = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        for l2 in range(max(0, abs(l1 - L)), min(lmax, l1 + L) + 1):
            out[l1, l2] = three_j(l1, L, l2, s1, s_l, s2)
    return out


def response_functions(L, cl, lmax, component):
    """f^pq_{l1 L l2} for the nine ordered pairs p, q of T, E, B.

    Gradient: OH03 Table I (₂F^± = (₂F ± ₋₂F)/2), and f^BB = C^BB_l1 ₂F⁺_{l2Ll1} + C^BB_l2 ₂F⁺_{l1Ll2} (the EE form
    with C^BB: lensing maps B into B through S⁺ exactly as E into E). The reversed pairs follow from
    f^qp_{l1Ll2} = (−1)^(l1+L+l2) f^pq_{l2Ll1} (OH03 §II). Curl: f = Σ_Z K^pZ C^Zq + (−1)^Σ K^qZ C^Zp (transposed)
    with K^TT = ₀S, K^EE = K^BB = S⁺, K^EB = iS⁻, K^BE = −iS⁻ and the NYT12 kernel ₛS.
    """
    ell = np.arange(lmax + 1)
    parity = (-1.0) ** (ell[:, None] + L + ell[None, :])
    norm = np.sqrt((2 * ell[:, None] + 1) * (2 * L + 1) * (2 * ell[None, :] + 1) / (4 * np.pi))
    c1 = {k: v[:, None] for k, v in cl.items()}
    c2 = {k: v[None, :] for k, v in cl.items()}
    if component == "gradient":
        bracket = L * (L + 1) + ell[None, :] * (ell[None, :] + 1) - ell[:, None] * (ell[:, None] + 1)
        f0 = bracket * norm / 2 * table(L, (0, 0, 0), lmax)
        f2 = bracket * norm / 2 * table(L, (2, 0, -2), lmax)
        fm2 = parity * f2  # (l1 L l2; −2 0 2) = (−1)^(l1+L+l2) (l1 L l2; 2 0 −2)
        plus, minus = (f2 + fm2) / 2, (f2 - fm2) / 2
        f = {
            "TT": c1["TT"] * f0.T + c2["TT"] * f0,
            "TE": c1["TE"] * plus.T + c2["TE"] * f0,
            "EE": c1["EE"] * plus.T + c2["EE"] * plus,
            "TB": 1j * c1["TE"] * minus.T,
            "EB": 1j * (c1["EE"] * minus.T + c2["BB"] * minus),
            "BB": c1["BB"] * plus.T + c2["BB"] * plus,
        }
        for p, q in ("TE", "TB", "EB"):
            f[q + p] = parity * f[p + q].T
        return f

    def kernel(s):
        total = np.zeros_like(norm, dtype=complex)
        for sigma in (1, -1):
            ladder = np.sqrt(np.clip((ell - sigma * s) * (ell + sigma * s + 1.0), 0, None))[None, :]
            spins = (s, sigma, -s - sigma)
            three = table(L, spins, lmax) if s >= 0 else parity * table(L, tuple(-x for x in spins), lmax)
            total += -1j * sigma * ladder * three
        return -((-1) ** s) / 2 * np.sqrt(L * (L + 1.0)) * norm * total

    s0, s2, sm2 = kernel(0), kernel(2), kernel(-2)
    K = {"TT": s0, "EE": (s2 + sm2) / 2, "BB": (s2 + sm2) / 2, "EB": 1j * (s2 - sm2) / 2, "BE": -1j * (s2 - sm2) / 2}

    def spec(a, b):
        return cl.get("".join(sorted(a + b, key="TEB".index)), np.zeros(lmax + 1))

    f = {}
    for p, q in PAIRS:
        total = np.zeros_like(norm, dtype=complex)
        for z in "TEB":
            if p + z in K:
                total += K[p + z] * spec(z, q)[None, :]
            if q + z in K:
                total += parity * K[q + z].T * spec(z, p)[:, None]
        f[p + q] = total
    return f


# ------------------------------------------------------------------------------------------ joint filter
def test_joint_inverse_is_the_matrix_inverse_and_drops_cut_fields():
    rng = np.random.default_rng(3)
    tt, ee, bb = rng.uniform(1, 3, (3, 6))
    te = rng.uniform(-0.9, 0.9, 6) * np.sqrt(tt * ee)
    inv = joint_inverse_spectra({"TT": tt, "EE": ee, "BB": bb, "TE": te})
    for k in range(6):
        matrix = np.array([[tt[k], te[k], 0], [te[k], ee[k], 0], [0, 0, bb[k]]])
        want = np.linalg.inv(matrix)  # numpy reference inverse
        got = np.array([[inv["TT"][k], inv["TE"][k], 0], [inv["TE"][k], inv["EE"][k], 0], [0, 0, inv["BB"][k]]])
        assert np.allclose(got, want, rtol=1e-13, atol=0)
    # E cut at l = 0, T cut at l = 1: the other field's filter is its own 1/C
    cut = joint_inverse_spectra(
        {"TT": np.array([2.0, np.inf]), "EE": np.array([np.inf, 4.0]), "BB": np.ones(2), "TE": np.zeros(2)}
    )
    assert np.allclose(cut["TT"], [0.5, 0]) and np.allclose(cut["EE"], [0, 0.25]) and np.allclose(cut["TE"], 0)
    with pytest.raises(ValueError, match="positive definite"):
        joint_inverse_spectra({"TT": np.ones(2), "EE": np.ones(2), "BB": np.ones(2), "TE": np.array([0.5, 1.5])})


def test_joint_filter_applies_the_inverse_covariance_and_its_wiener_filter(fiducial):
    experiment = lensrec.Experiment(
        name="joint", noise_temperature=6.0, beam_fwhm=8.0, ell_min=2, ell_max_temperature=60, ell_max_polarization=50
    )
    rng = np.random.default_rng(4)
    alm = rng.normal(size=(3, harmonics.nalm(60))) + 1j * rng.normal(size=(3, harmonics.nalm(60)))
    alm[:, :61] = alm[:, :61].real
    joint = IsotropicFilter(experiment, fiducial, joint=True, nthreads=1).filter_alm(alm)
    diagonal = IsotropicFilter(experiment, fiducial, nthreads=1).filter_alm(alm)
    assert joint.joint and not diagonal.joint
    total = experiment.total_spectra(fiducial, 60)
    beam = experiment.beam(60)
    signal = fiducial.cmb(lensed=True)
    for ell, m in ((10, 3), (45, 0), (55, 7)):
        i = hp.Alm.getidx(60, ell, m)
        x = alm[:, i] / beam[ell]
        use = [k for k, key in enumerate(("TT", "EE", "BB")) if np.isfinite(total[key][ell])]
        cov = np.array([[total["TT"][ell], total["TE"][ell], 0], [total["TE"][ell], total["EE"][ell], 0], [0, 0, 0]])
        cov[2, 2] = total["BB"][ell]
        want = np.zeros(3, complex)
        want[use] = np.linalg.solve(cov[np.ix_(use, use)], x[use])
        assert np.allclose(joint.alm[:, i], want, rtol=1e-12)
        # Wiener filter S C⁻¹ X (S = lensed CMB covariance): E borrows from T through C^TE
        s = np.array([[signal["TT"][ell], signal["TE"][ell], 0], [signal["TE"][ell], signal["EE"][ell], 0], [0, 0, 0]])
        s[2, 2] = signal["BB"][ell]
        wiener = s @ want
        for k, name in enumerate("TEB"):
            assert np.isclose(joint.wiener(name)[i], wiener[k], rtol=1e-12)
    assert not np.allclose(joint.E, diagonal.E)  # the TE correlation changes the filtered E


# ---------------------------------------------------------------------------------- normalization and N0
@pytest.fixture(scope="module")
def brute(fiducial):
    """Module result and brute-force 3j sums of R^GMV and N^GMV for an experiment with distinct T and P cuts."""
    experiment = lensrec.Experiment(
        name="brute", noise_temperature=4.0, beam_fwhm=20.0, ell_min=4, ell_max_temperature=90,
        ell_max_polarization=LMAX,
    )  # fmt: skip
    spectra = fiducial.truncated(LMAX)
    result = reconstruction_noise(experiment, spectra, estimators=("MV", "GMV"), lmax_L=LMAX, nthreads=2)
    cl = {k: v[: LMAX + 1] for k, v in spectra.cmb(lensed=True).items()}
    total = experiment.total_spectra(spectra, LMAX)
    # C⁻¹ per l by numpy, over the fields used at that l
    inverse = np.zeros((LMAX + 1, 3, 3))
    for ell in range(LMAX + 1):
        cov = np.array([[total["TT"][ell], total["TE"][ell], 0], [total["TE"][ell], total["EE"][ell], 0], [0, 0, 0]])
        cov[2, 2] = total["BB"][ell]
        use = [k for k in range(3) if np.isfinite(cov[k, k])]
        if use:
            inverse[ell][np.ix_(use, use)] = np.linalg.inv(cov[np.ix_(use, use)])
    index = {"T": 0, "E": 1, "B": 2}
    out = {}
    for component in ("gradient", "curl"):
        for L in L_CHECK:
            f = response_functions(L, cl, LMAX, component)
            # weights in terms of the observed fields: W^ij = Σ_pq C⁻¹^pi f^pq* C⁻¹^qj
            W = {}
            for i in "TEB":
                for j in "TEB":
                    W[i + j] = sum(
                        inverse[:, index[p], index[i]][:, None]
                        * np.conj(f[p + q])
                        * inverse[:, index[q], index[j]][None, :]
                        for p, q in PAIRS
                    )
            R = sum(np.sum(W[ij] * f[ij]) for ij in PAIRS) / (2 * (2 * L + 1))
            ell = np.arange(LMAX + 1)
            parity = (-1.0) ** (ell[:, None] + L + ell[None, :])

            def tot(a, b):
                key = "".join(sorted(a + b, key="TEB".index))
                return np.nan_to_num(total.get(key, np.zeros(LMAX + 1)), posinf=0.0)

            N = 0.0
            for a in PAIRS:
                for b in PAIRS:
                    (x, y), (z, v) = a, b
                    N += np.sum(W[a] * np.conj(W[b]) * tot(x, z)[:, None] * tot(y, v)[None, :])
                    N += np.sum(W[a] * np.conj(parity * W[b].T) * tot(x, v)[:, None] * tot(y, z)[None, :])
            out[component, L] = (R, N / (4 * (2 * L + 1)))
    return result, out


@pytest.mark.parametrize("component", ["gradient", "curl"])
def test_normalization_and_n0_match_brute_force_3j_sums(brute, component):
    result, reference = brute
    for L in L_CHECK:
        R, N = reference[component, L]
        assert abs(R.imag) <= 1e-12 * abs(R.real) and abs(N.imag) <= 1e-12 * abs(N.real)
        # both sides are exact sums in double precision over ~1e4 terms: 1e-8 is rounding
        assert result.response["GMV"][component][L] == pytest.approx(R.real, rel=1e-8), (component, L)
        assert result.n0["GMV"][component][L] == pytest.approx(N.real / R.real**2, rel=1e-8), (component, L)


def test_gmv_noise_is_at_most_the_mv_noise_and_equals_its_normalization(fiducial):
    # Maniyar et al. 2021: N0_GMV <= N0_MV at every L; an optimal quadratic estimator has N0 = 1/R (OH03 §III)
    for noise, lmax in ((1.0, 600), (8.0, 400)):
        experiment = lensrec.Experiment(
            name="deep", noise_temperature=noise, beam_fwhm=3.0, ell_min=10, ell_max_temperature=lmax,
            ell_max_polarization=lmax,
        )  # fmt: skip
        result = reconstruction_noise(experiment, fiducial, estimators=("MV", "GMV"), nthreads=2)
        for component in ("gradient", "curl"):
            gmv, mv = result.n0["GMV"][component][2:], result.n0["MV"][component][2:]
            # 1e-9 relative: the two are computed by different sums and agree to rounding where they are equal
            assert np.all(gmv <= mv * (1 + 1e-9)), (noise, component, np.max(gmv / mv))
            assert np.min(gmv / mv) < 0.999  # the joint filter gains where TE matters (not an identity)
            response = result.response["GMV"][component][2:]
            assert np.allclose(gmv * response, 1.0, rtol=1e-9, atol=0)


# ---------------------------------------------------------------------------------------- position space
def all_m(alm, lmax):
    """X[l, m + lmax] for m = −l … l from the m ≥ 0 coefficients of a real field."""
    out = np.zeros((lmax + 1, 2 * lmax + 1), dtype=complex)
    for ell in range(lmax + 1):
        for m in range(ell + 1):
            value = alm[hp.Alm.getidx(lmax, ell, m)]
            out[ell, lmax + m] = value
            out[ell, lmax - m] = (-1) ** m * np.conj(value)
    return out


@pytest.fixture(scope="module")
def tiny():
    lmax = 8
    rng = np.random.default_rng(11)

    def fields():
        alm = rng.normal(size=(3, harmonics.nalm(lmax))) + 1j * rng.normal(size=(3, harmonics.nalm(lmax)))
        alm[:, : lmax + 1] = alm[:, : lmax + 1].real
        alm[1:, harmonics.ell_of_alm(lmax) < 2] = 0.0
        return alm

    cl = {key: np.r_[0.0, 0.0, rng.uniform(0.5, 2.0, lmax - 1)] for key in ("TT", "EE", "BB")}
    cl["TE"] = np.r_[0.0, 0.0, rng.uniform(-0.5, 0.5, lmax - 1)]
    spectra = lensrec.Spectra(
        unlensed=cl, lensed=cl, phi=np.ones(lmax + 1), tensor={k: np.zeros(lmax + 1) for k in ("TT", "EE", "BB")}
    )
    return lmax, cl, spectra, fields(), fields()


@pytest.mark.parametrize("mixed", [False, True], ids=["one input", "mixed pair"])
def test_position_space_gmv_equals_brute_force_3j_sums(tiny, mixed):
    lmax, cl, spectra, a, b = tiny
    second = b if mixed else a
    lmax_L = 12
    first_fields = FilteredFields(a, lmax, cl, joint=True)
    second_fields = FilteredFields(b, lmax, cl, joint=True) if mixed else None
    got = quadratic_estimates(first_fields, second_fields, estimators="GMV", lmax_L=lmax_L, spectra=spectra, nthreads=1)
    X = [all_m(x, lmax) for x in a]
    Y = [all_m(y, lmax) for y in second]
    index = {"T": 0, "E": 1, "B": 2}
    for component in ("gradient", "curl"):
        mine = (got.gradient if component == "gradient" else got.curl)["GMV"]
        want = np.zeros_like(mine)
        for L in range(1, lmax_L + 1):
            f = response_functions(L, cl, lmax, component)
            for M in range(L + 1):
                total = 0.0
                for l1 in range(lmax + 1):
                    for m1 in range(-l1, l1 + 1):
                        for l2 in range(max(abs(l1 - L), abs(M - m1)), min(l1 + L, lmax) + 1):
                            w = (-1) ** M * three_j(l1, l2, L, m1, M - m1, -M)
                            if w == 0:
                                continue
                            for p, q in PAIRS:
                                value = np.conj(f[p + q][l1, l2]) * X[index[p]][l1, lmax + m1]
                                total += w * value * Y[index[q]][l2, lmax + M - m1]
                want[hp.Alm.getidx(lmax_L, L, M)] = total / 2
        assert np.abs(want).max() > 0
        # exact sums of ~1e3 terms against ducc0 transforms in double precision
        assert np.allclose(mine, want, rtol=0, atol=1e-9 * np.abs(want).max()), component
    # one spin-1 analysis; one input: T̄ (spin 0), P̄ (2), Wiener-filtered T (1) and P (1, 3)
    transforms = got.settings["transforms"]
    assert transforms["analysis_spin1"] == 1
    assert transforms["synthesis"] == (10 if mixed else 5)


# ------------------------------------------------------------------------------------------- simulations
def _cross_ratio_checks(sky, experiment, lmax, lmax_L, edges, nthreads):
    """GMV and MV of one lensed full sky; returns (result, ratio, sigma, bins) per estimator."""
    from lensrec.power import bin_spectrum, cross_spectrum
    from lensrec.sky import gaussian_cmb_alm

    noise_spectra = {k: np.nan_to_num(experiment.noise_spectrum(k[0], lmax), posinf=0.0) for k in ("TT", "EE", "BB")}
    noise_spectra["TE"] = np.zeros(lmax + 1)
    noise = gaussian_cmb_alm(noise_spectra, lmax, np.random.default_rng(77))
    ell = harmonics.ell_of_alm(lmax)
    observed = (harmonics.truncate_alm(sky.lensed_alm, lmax, sky.lmax) + noise) * experiment.beam(lmax)[ell]
    phi = harmonics.truncate_alm(sky.phi_alm, lmax_L, sky.lmax_unlensed)
    input_power = cross_spectrum(phi)
    weights = 2 * np.arange(lmax_L + 1) + 1.0
    out = {}
    for label, joint in (("GMV", True), ("MV", False)):
        filt = IsotropicFilter(experiment, joint=joint, nthreads=nthreads)
        result = reconstruct_filtered(filt.filter_alm(observed), filt.experiment, estimator=label, lmax_L=lmax_L)
        cross = cross_spectrum(result.phi_alm, phi)
        ratio = bin_spectrum(cross, edges, weights)[1] / bin_spectrum(input_power, edges, weights)[1]
        n0 = result.n0["gradient"]
        # σ of cross/input per bin: √(Σ w (C + N0) C) / Σ w C (as in tests/test_reconstruction.py)
        sums = [
            (
                np.sum(weights[a:b] * (input_power[a:b] + n0[a:b]) * input_power[a:b]),
                np.sum(weights[a:b] * input_power[a:b]),
            )
            for a, b in zip(edges[:-1], edges[1:], strict=True)
        ]
        sigma = np.array([np.sqrt(x) / y for x, y in sums])
        bins = [
            k
            for k, (a, b) in enumerate(zip(edges[:-1], edges[1:], strict=True))
            if np.mean(n0[a:b]) <= 2 * np.mean(input_power[a:b])
        ]
        out[label] = (result, ratio, sigma, bins)
    return out


def _assert_unbiased(out, edges):
    for label, (_result, ratio, sigma, bins) in out.items():
        assert len(bins) >= 2, label
        for k in bins:
            # 3σ plus 1% systematic (lensed instead of lensed-gradient spectra in the response and higher-order
            # response terms, percent level: Lewis, Challinor & Hanson 2011, JCAP 03, 018), as for the other
            # estimators in tests/test_reconstruction.py
            assert abs(ratio[k] - 1.0) <= 3 * sigma[k] + 0.01, (label, edges[k], ratio[k], sigma[k])
    # on the same sky the two estimates share most of their noise: GMV tracks MV closely bin by bin
    gmv, mv = out["GMV"][1], out["MV"][1]
    common = [k for k in out["GMV"][3] if k in out["MV"][3]]
    assert np.all(np.abs(gmv[common] - mv[common]) <= 2 * out["MV"][2][common])


def test_gmv_cross_with_input_over_input_power_is_one():
    """A small lensed full sky (nside 256, l <= 500, exact remapping), 1 µK-arcmin noise, 4' beam."""
    experiment = lensrec.Experiment(
        name="Joint Test Survey", noise_temperature=1.0, beam_fwhm=4.0, ell_min=2,
        ell_max_temperature=500, ell_max_polarization=500,
    )  # fmt: skip
    sky = lensrec.simulate_sky(experiment, nside=256, lmax=500, lmax_margin=300, seed=31, noise=False, nthreads=2)
    edges = np.array([10, 40, 80, 130, 200, 300])
    _assert_unbiased(_cross_ratio_checks(sky, experiment, 500, 300, edges, 2), edges)


@pytest.mark.validate
def test_gmv_cross_with_input_over_input_power_is_one_at_l_2048():
    """The check above on a bigger sky (nside 1024, l <= 2048, lmax_L 1000), as the MV one in test_reconstruction."""
    experiment = lensrec.Experiment(
        name="Low Noise Test Survey", noise_temperature=1.0, noise_polarization=1.4, beam_fwhm=2.0, ell_min=2,
        ell_max_temperature=2048, ell_max_polarization=2048,
    )  # fmt: skip
    sky = lensrec.simulate_sky(experiment, nside=1024, lmax=2048, lmax_margin=500, seed=2026, noise=False, nthreads=2)
    edges = np.array([20, 50, 100, 150, 200, 300, 400, 550, 700, 850, 1000])
    _assert_unbiased(_cross_ratio_checks(sky, experiment, 2048, 1000, edges, 2), edges)


def test_estimators_refuse_fields_filtered_the_other_way(tiny):
    lmax, cl, spectra, a, _b = tiny
    experiment = lensrec.Experiment(
        name="tiny", noise_temperature=1.0, beam_fwhm=1.0, ell_min=2, ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )  # fmt: skip
    joint, diagonal = FilteredFields(a, lmax, cl, joint=True), FilteredFields(a, lmax, cl)
    with pytest.raises(ValueError, match="jointly filtered"):
        reconstruct_filtered(diagonal, experiment, spectra=spectra, estimator="GMV")
    with pytest.raises(ValueError, match="field by field"):
        reconstruct_filtered(joint, experiment, spectra=spectra, estimator="MV")
    # the default follows the filter: GMV for joint fields, MV otherwise
    assert reconstruct_filtered(joint, experiment, spectra=spectra, lmax_L=6).estimator == "GMV"
    assert reconstruct_filtered(diagonal, experiment, spectra=spectra, lmax_L=6).estimator == "MV"


def test_forecast_document_reuses_a_given_noise_object(fiducial):
    from lensrec.commands.forecast import forecast_document

    experiment = lensrec.Experiment(
        name="reuse", noise_temperature=5.0, beam_fwhm=5.0, ell_max_temperature=200, ell_max_polarization=200
    )
    noise = reconstruction_noise(experiment, fiducial, estimators=("EB", "GMV"), lmax_L=150, nthreads=1)
    document, result = forecast_document(experiment, noise=noise)
    assert result is noise and list(document["n0"]) == ["EB", "GMV"]
    fresh, _ = forecast_document(experiment, estimators="EB,GMV", lmax_L=150, spectra=fiducial)
    assert np.allclose(document["n0"]["GMV"]["gradient"][2:], fresh["n0"]["GMV"]["gradient"][2:], rtol=1e-12)
    with pytest.raises(TypeError, match="ReconstructionNoise"):
        forecast_document(experiment, noise={"n0": {}})
    with pytest.raises(ValueError, match="lmax_L"):
        forecast_document(experiment, noise=noise, lmax_L=100)


@pytest.mark.parametrize("label", ["TE", "EB", "MV", "GMV"])
def test_symmetrized_pair_in_one_pass_equals_the_average_of_both_orders(tiny, label):
    # φ̂{a, b} = ½ (φ̂[a, b] + φ̂[b, a]) (Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609): the one-pass
    # form must equal the two calls to rounding, at fewer transforms
    lmax, cl, spectra, a, b = tiny
    joint = label == "GMV"
    experiment = lensrec.Experiment(
        name="tiny", noise_temperature=1.0, beam_fwhm=1.0, ell_min=2, ell_max_temperature=lmax,
        ell_max_polarization=lmax,
    )  # fmt: skip
    fa, fb = FilteredFields(a, lmax, cl, joint=joint), FilteredFields(b, lmax, cl, joint=joint)
    common = dict(spectra=spectra, estimator=label, lmax_L=6, nthreads=1)
    forward = reconstruct_filtered(fa, experiment, second=fb, **common)
    backward = reconstruct_filtered(fb, experiment, second=fa, **common)
    both = reconstruct_filtered(fa, experiment, second=fb, symmetrize=True, **common)
    for component in ("gradient", "curl"):
        want = 0.5 * (forward.alm(component) + backward.alm(component))
        assert np.allclose(both.alm(component), want, rtol=0, atol=1e-12 * np.abs(want).max())
    one_pass = both.settings["transforms"]["total"]
    two_calls = forward.settings["transforms"]["total"] + backward.settings["transforms"]["total"]
    assert one_pass < two_calls if label != "GMV" else one_pass == forward.settings["transforms"]["total"]


def test_joint_fields_from_per_field_ones_equal_the_joint_filter(fiducial):
    experiment = lensrec.Experiment(
        name="convert", noise_temperature=3.0, beam_fwhm=6.0, ell_min=5, ell_max_temperature=70, ell_max_polarization=60
    )
    rng = np.random.default_rng(9)
    alm = rng.normal(size=(3, harmonics.nalm(70))) + 1j * rng.normal(size=(3, harmonics.nalm(70)))
    alm[:, :71] = alm[:, :71].real
    diagonal = IsotropicFilter(experiment, fiducial, nthreads=1)
    joint = IsotropicFilter(experiment, fiducial, joint=True, nthreads=1).filter_alm(alm)
    converted = diagonal.joint_fields(diagonal.filter_alm(alm))
    assert converted.joint
    # undoing 1/(b C^XX) and applying C⁻¹/b is exact algebra: rounding only
    assert np.allclose(converted.alm, joint.alm, rtol=1e-12, atol=1e-14 * np.abs(joint.alm).max())
    with pytest.raises(ValueError, match="jointly already"):
        diagonal.joint_fields(joint)


def test_fewer_jacobi_iterations_keep_the_reconstruction_within_1e3():
    # the faster filter ("auto": 1 Jacobi step at lmax = 2 nside = 256) against the 3-step analysis on the
    # same maps: the binned cross-spectrum ratio of the two estimates (their relative response) stays within
    # 1e-3, the accuracy the iteration count is chosen for (benchmarks/filter_accuracy.py, docs/filtering.md)
    from lensrec.power import bin_spectrum, cross_spectrum

    experiment = lensrec.Experiment(
        name="Iteration Test Survey", noise_temperature=2.0, beam_fwhm=8.0, ell_min=2, ell_max_temperature=256,
        ell_max_polarization=256,
    )  # fmt: skip
    sky = lensrec.simulate_sky(experiment, nside=128, lmax=256, lmax_margin=128, seed=5, nthreads=2)
    fast = lensrec.reconstruct(sky.maps, experiment, lmax_L=200, nthreads=2)
    slow = lensrec.reconstruct(sky.maps, experiment, lmax_L=200, nthreads=2, jacobi_iterations=3)
    assert fast.settings["filter"]["jacobi_iterations"] == 1 and slow.settings["filter"]["jacobi_iterations"] == 3
    edges = np.array([2, 20, 50, 100, 150, 201])
    weights = 2 * np.arange(201) + 1.0
    ratio = (
        bin_spectrum(cross_spectrum(fast.phi_alm, slow.phi_alm), edges, weights)[1]
        / bin_spectrum(cross_spectrum(slow.phi_alm), edges, weights)[1]
    )
    assert np.all(np.abs(ratio - 1) < 1e-3), ratio
