"""Full-sky responses and N0: brute-force 3j sums, published properties, MV, general weights, bad input.

The brute-force sums below are written from the published formulas, independently of lensrec's weight code:
Okamoto & Hu 2003, PRD 67, 083002 (OH03): Table I response functions with their F functions, the estimator
normalization and the Gaussian noise covariance of §III; the curl (rotation) kernel in its spin-±1 form
(Namikawa, Yamauchi & Taruya 2012, JCAP 01, 007), checked here to reproduce OH03's F for the gradient.
Wigner 3j symbols come from ``wigners`` (reference library).
"""

import numpy as np
import pytest
import wigners

import lensrec
from lensrec.estimator_noise import (
    estimator_responses,
    minimum_variance,
    noise_covariance,
    reconstruction_noise,
    standard_factors,
)
from lensrec.estimator_weights import quadratic_estimator, response_kernel

LMAX = 100
L_CHECK = (2, 3, 16, 57, 100)
LABELS = ("TT", "TE", "EE", "TB", "EB")
PAIRS = {"TT": "TT", "TE": "TE", "EE": "EE", "TB": "TB", "EB": "EB"}


# ------------------------------------------------------------------------------ 3j tables (wigners)
def three_j_table(L, spins, lmax):
    """T[l1, l2] = (l1 L l2; s1 sL s2) from wigners; zero where the symbol vanishes by selection rules."""
    s1, s_l, s2 = spins
    table = np.zeros((lmax + 1, lmax + 1))
    if abs(s_l) > L:
        return table
    for l1 in range(abs(s1), lmax + 1):
        for l2 in range(max(abs(s2), abs(l1 - L)), min(lmax, l1 + L) + 1):
            table[l1, l2] = wigners.wigner_3j(l1, L, l2, s1, s_l, s2)
    return table


class Tables:
    """All 3j tables needed at one L; spin-flipped symbols from (l1 L l2; −m) = (−1)^(l1+L+l2) (l1 L l2; m)."""

    def __init__(self, L, lmax):
        self.L = L
        ell = np.arange(lmax + 1)
        self.parity = (-1.0) ** (ell[:, None] + L + ell[None, :])
        self.norm = np.sqrt((2 * ell[:, None] + 1) * (2 * L + 1) * (2 * ell[None, :] + 1) / (4 * np.pi))
        self._t = {}
        for spins in ((0, 0, 0), (2, 0, -2), (0, 1, -1), (2, 1, -3), (2, -1, -1)):
            self._t[spins] = three_j_table(L, spins, lmax)
        self.ell = ell

    def three_j(self, spins):
        if spins in self._t:
            return self._t[spins]
        flipped = tuple(-s for s in spins)
        return self.parity * self._t[flipped]


def oh03_F(tab, s):
    """OH03: ₛF_{l1 L l2} = [L(L+1) + l2(l2+1) − l1(l1+1)] √((2l1+1)(2L+1)(2l2+1)/16π) (l1 L l2; s 0 −s)."""
    ell, L = tab.ell, tab.L
    bracket = L * (L + 1) + ell[None, :] * (ell[None, :] + 1) - ell[:, None] * (ell[:, None] + 1)
    return bracket * tab.norm / 2.0 * tab.three_j((s, 0, -s))


def spin1_kernel(tab, s, component):
    """ₛS_{l1 L l2} = −(−1)^s/2 √(L(L+1)) N Σ_σ κ_σ √((l2−σs)(l2+σs+1)) (l1 L l2; s σ −s−σ), κ = 1 or −iσ.

    The deflection's spin ±1 parts acting on a spin-s field (NYT12); gradient κ_σ = 1, curl κ_σ = −iσ.
    """
    ell, L = tab.ell, tab.L
    total = np.zeros_like(tab.norm, dtype=complex)
    for sigma in (1, -1):
        kappa = 1.0 if component == "gradient" else -1j * sigma
        ladder = np.sqrt(np.clip((ell - sigma * s) * (ell + sigma * s + 1.0), 0, None))[None, :]
        total += kappa * ladder * tab.three_j((s, sigma, -s - sigma))
    return -((-1) ** s) / 2.0 * np.sqrt(L * (L + 1.0)) * tab.norm * total


def table_one(tab, label, C):
    """OH03 Table I (gradient), f^XY_{l1 L l2} on the (l1, l2) grid; ₂F^± = (₂F ± ₋₂F)/2.

    EB's C^BB term enters with a plus sign: see test_eb_sign_from_the_polarization_symmetry.
    """
    f0, f2 = oh03_F(tab, 0), oh03_F(tab, 2)
    f2m2 = oh03_F(tab, -2)
    plus, minus = (f2 + f2m2) / 2, (f2 - f2m2) / 2
    c1 = {k: v[:, None] for k, v in C.items()}  # C at l1
    c2 = {k: v[None, :] for k, v in C.items()}  # C at l2
    if label == "TT":
        return c1["TT"] * f0.T + c2["TT"] * f0
    if label == "TE":
        return c1["TE"] * plus.T + c2["TE"] * f0
    if label == "EE":
        return c1["EE"] * plus.T + c2["EE"] * plus
    if label == "TB":
        return 1j * c1["TE"] * minus.T
    if label == "EB":
        return 1j * (c1["EE"] * minus.T + c2["BB"] * minus)
    raise ValueError(label)


def general_response(tab, X, Y, C, component):
    """⟨X Y⟩ response from δX and δY (OH03 §II): f^XY = Σ_Z K^XZ_{l1Ll2} C^ZY_l2 + (−1)^Σ K^YZ_{l2Ll1} C^ZX_l1.

    K^TT = ₀S, K^EE = K^BB = S⁺, K^EB = iS⁻, K^BE = −iS⁻, S^± = (₂S ± ₋₂S)/2, from E ± iB = −₊₂a / −₋₂a.
    """
    s0 = spin1_kernel(tab, 0, component)
    s2, sm2 = spin1_kernel(tab, 2, component), spin1_kernel(tab, -2, component)
    K = {"TT": s0, "EE": (s2 + sm2) / 2, "BB": (s2 + sm2) / 2, "EB": 1j * (s2 - sm2) / 2, "BE": -1j * (s2 - sm2) / 2}

    def spec(a, b):
        key = "".join(sorted(a + b, key="TEB".index))
        return C.get(key, np.zeros_like(C["TT"]))

    out = np.zeros_like(tab.norm, dtype=complex)
    for Z in "TEB":
        if X + Z in K:
            out += K[X + Z] * spec(Z, Y)[None, :]
        if Y + Z in K:
            out += tab.parity * K[Y + Z].T * spec(Z, X)[:, None]
    return out


# -------------------------------------------------------------------------------------- brute force
@pytest.fixture(scope="module")
def brute(fiducial):
    """Module result and OH03 brute-force sums for a small experiment with distinct T and P cuts."""
    experiment = lensrec.Experiment(
        name="brute",
        noise_temperature=4.0,
        beam_fwhm=20.0,
        ell_min=4,
        ell_max_temperature=90,
        ell_max_polarization=LMAX,
    )
    spectra = fiducial.truncated(LMAX)
    result = reconstruction_noise(experiment, spectra, lmax_L=LMAX, nthreads=2)
    C = {k: v[: LMAX + 1] for k, v in spectra.cmb(lensed=True).items()}
    total = experiment.total_spectra(spectra, LMAX)
    total = {k: np.where(np.isfinite(v), v, 0.0) for k, v in total.items()}
    inverse = {X: np.where(total[X + X] > 0, 1.0 / np.where(total[X + X] > 0, total[X + X], 1.0), 0.0) for X in "TEB"}

    def tot(a, b):
        key = "".join(sorted(a + b, key="TEB".index))
        return total.get(key, np.zeros(LMAX + 1))

    out = {}
    for L in L_CHECK:
        tab = Tables(L, LMAX)
        for component in ("gradient", "curl"):
            f, W, R = {}, {}, {}
            for label in LABELS:
                X, Y = label
                f[label] = (
                    table_one(tab, label, C) if component == "gradient" else general_response(tab, X, Y, C, "curl")
                )
                eta = 2 if X == Y else 1
                W[label] = np.conj(f[label]) * inverse[X][:, None] * inverse[Y][None, :]
                R[label] = np.sum(W[label] * f[label]) / (eta * (2 * L + 1))
            N = {}
            for a in LABELS:
                for b in LABELS:
                    X, Y = a
                    Z, V = b
                    eta = (2 if X == Y else 1) * (2 if Z == V else 1)
                    term1 = W[a] * np.conj(W[b]) * tot(X, Z)[:, None] * tot(Y, V)[None, :]
                    term2 = W[a] * np.conj(tab.parity * W[b].T) * tot(X, V)[:, None] * tot(Y, Z)[None, :]
                    N[a, b] = np.sum(term1 + term2) / (eta * (2 * L + 1))
            out[L, component] = (R, N)
    return result, out


@pytest.mark.parametrize("component", ["gradient", "curl"])
def test_responses_and_n0_match_brute_force_3j_sums(brute, component):
    result, reference = brute
    for L in L_CHECK:
        R, N = reference[L, component]
        for i, label in enumerate(LABELS):
            # double-precision sums of ~1e4 positive terms on both sides: 1e-8 relative is generous rounding
            assert abs(R[label].imag) <= 1e-12 * abs(R[label].real)
            assert np.isclose(result.response[label][component][L], R[label].real, rtol=1e-8, atol=0), (label, L)
            n0 = N[label, label].real / R[label].real ** 2
            assert np.isclose(result.n0[label][component][L], n0, rtol=1e-8, atol=0), (label, L)
            assert np.isclose(result.covariance[component][i, i, L], n0, rtol=1e-8, atol=0)


@pytest.mark.parametrize("component", ["gradient", "curl"])
def test_cross_covariances_match_brute_force(brute, component):
    result, reference = brute
    index = {label: i for i, label in enumerate(result.covariance_labels)}
    for L in L_CHECK:
        R, N = reference[L, component]
        for a, b in (("TT", "TE"), ("TT", "EE"), ("TE", "EE"), ("TB", "EB")):
            want = N[a, b].real / (R[a].real * R[b].real)
            assert want != 0.0
            got = result.covariance[component][index[a], index[b], L]
            # scale of rounding: the geometric mean of the two auto terms
            scale = np.sqrt(result.n0[a][component][L] * result.n0[b][component][L])
            assert abs(got - want) <= 1e-8 * scale, (a, b, L, got, want)
        for a, b in (("EE", "EB"), ("TT", "TB"), ("TE", "TB")):
            # parity: blocks between {TT, TE, EE} and {TB, EB} vanish for C^TB = C^EB = 0 (OH03 §III)
            assert abs(N[a, b]) <= 1e-14 * np.sqrt(abs(N[a, a] * N[b, b]))
            assert result.covariance[component][index[a], index[b], L] == 0.0


def test_te_noise_is_bounded_by_the_optimal_te_weight(fiducial):
    # OH03 §III: the optimal TE weight g = [C^EE_1 C^TT_2 f*_12 − (−1)^Σ C^TE_1 C^TE_2 f*_21] /
    # [C^TT_1 C^EE_2 C^EE_1 C^TT_2 − (C^TE_1 C^TE_2)²] has N0 = (2L+1)/Σ f g, a lower bound for any TE-pair
    # estimator, in particular for lensrec's diagonally filtered one.
    experiment = lensrec.Experiment(
        name="te", noise_temperature=1.0, beam_fwhm=10.0, ell_min=2, ell_max_temperature=80, ell_max_polarization=80
    )
    spectra = fiducial.truncated(80)
    result = reconstruction_noise(
        experiment, spectra, estimators=("TE",), lmax_L=80, components=("gradient",), nthreads=2
    )
    C = {k: v[:81] for k, v in spectra.cmb(lensed=True).items()}
    total = {k: np.where(np.isfinite(v), v, 0.0) for k, v in experiment.total_spectra(spectra, 80).items()}
    ell = np.arange(81)
    used = ell >= 2
    tt, ee, te = (np.where(used, total[k], 0.0) for k in ("TT", "EE", "TE"))
    gaps = []
    for L in (4, 40):
        tab = Tables(L, 80)
        f = table_one(tab, "TE", C)
        f21 = tab.parity * f.T  # f_{l2 L l1} (−1)^Σ on the (l1, l2) grid
        with np.errstate(divide="ignore", invalid="ignore"):
            denominator = tt[:, None] * ee[None, :] * ee[:, None] * tt[None, :] - (te[:, None] * te[None, :]) ** 2
            g = (ee[:, None] * tt[None, :] * np.conj(f) - te[:, None] * te[None, :] * np.conj(f21)) / denominator
        g[~(used[:, None] & used[None, :])] = 0.0
        n0_optimal = (2 * L + 1) / np.sum(f * g).real
        ours = result.n0["TE"]["gradient"][L]
        assert ours >= n0_optimal * (1 - 1e-10)
        gaps.append(ours / n0_optimal - 1)
    assert max(gaps) > 1e-3  # and the two differ: the bound is not trivially attained


def test_unlensed_weights_match_brute_force(fiducial):
    experiment = lensrec.Experiment(
        name="brute", noise_temperature=2.0, beam_fwhm=15.0, ell_min=2, ell_max_temperature=60, ell_max_polarization=60
    )
    spectra = fiducial.truncated(60)
    result = reconstruction_noise(
        experiment,
        spectra,
        estimators=("TT", "EB"),
        lmax_L=60,
        weights="unlensed",
        components=("gradient",),
        nthreads=2,
    )
    C = {k: v[:61] for k, v in spectra.cmb(lensed=False).items()}
    total = experiment.total_spectra(spectra, 60)
    inverse = {X: np.where(np.isfinite(total[X + X]), 1.0 / total[X + X], 0.0) for X in "TEB"}
    for L in (5, 33):
        tab = Tables(L, 60)
        for label in ("TT", "EB"):
            X, Y = label
            f = table_one(tab, label, C)
            R = np.sum(np.abs(f) ** 2 * inverse[X][:, None] * inverse[Y][None, :]) / (
                (2 if X == Y else 1) * (2 * L + 1)
            )
            # optimal weights: N0 = A_L = 1/R_L (OH03 §III); rounding as above
            assert np.isclose(result.n0[label]["gradient"][L], 1 / R, rtol=1e-8, atol=0)


def test_low_L_accuracy_at_l_max_1000(fiducial):
    # At L ≪ l only |l1 − l2| ≤ L contributes, so a direct OH03 sum to l = 1000 is cheap. The fast path loses
    # precision there: the O(Ll) halves of f cancel to O(L²), amplifying the ~1e-11 polar rounding of the
    # Wigner-d recursions by ~(l/L)² (module docstring, "Accuracy"): 3e-7 measured at L = 2, falling as 1/L².
    # Allowed: 5e-6/L², i.e. that measurement with a factor 4 allowance for other spectra and estimators.
    lmax = 1000
    experiment = lensrec.Experiment(
        name="low", noise_temperature=6.0, beam_fwhm=1.4, ell_min=2, ell_max_temperature=lmax, ell_max_polarization=lmax
    )
    result = reconstruction_noise(
        experiment, fiducial, estimators=("TT", "EB"), lmax_L=40, components=("gradient",), nthreads=2
    )
    C = fiducial.cmb(lensed=True)
    total = experiment.total_spectra(fiducial, lmax)
    inverse = {X: np.where(np.isfinite(total[X + X]), 1.0 / total[X + X], 0.0) for X in "TEB"}
    for L in (2, 6):
        sums = {"TT": 0.0, "EB": 0.0}
        for l1 in range(2, lmax + 1):
            for l2 in range(max(2, l1 - L), min(lmax, l1 + L) + 1):
                norm = np.sqrt((2 * l1 + 1) * (2 * L + 1) * (2 * l2 + 1) / (16 * np.pi))
                b12 = L * (L + 1) + l2 * (l2 + 1) - l1 * (l1 + 1)  # OH03 F bracket for (l1 L l2)
                b21 = L * (L + 1) + l1 * (l1 + 1) - l2 * (l2 + 1)
                if (l1 + L + l2) % 2 == 0:
                    w0 = wigners.wigner_3j(l1, L, l2, 0, 0, 0)
                    f = (C["TT"][l1] * b21 + C["TT"][l2] * b12) * norm * w0
                    sums["TT"] += f * f * inverse["T"][l1] * inverse["T"][l2] / 2
                else:  # EB: odd l1 + L + l2, ₂F⁻ = ₂F there
                    f = (
                        C["EE"][l1] * b21 * wigners.wigner_3j(l2, L, l1, 2, 0, -2)
                        + C["BB"][l2] * b12 * wigners.wigner_3j(l1, L, l2, 2, 0, -2)
                    ) * norm
                    sums["EB"] += f * f * inverse["E"][l1] * inverse["B"][l2]
        for label, value in sums.items():
            got = result.response[label]["gradient"][L]
            assert abs(got / (value / (2 * L + 1)) - 1) < 5e-6 / L**2, (label, L, got / (value / (2 * L + 1)) - 1)


# ----------------------------------------------------------------------------- the formulas themselves
def test_spin1_kernel_reproduces_oh03_F():
    # The spin-±1 form of the first-order lensing kernel equals OH03's F (a 3j recursion identity), so the
    # curl kernel of the same form is validated in its construction.
    for L in (3, 20):
        tab = Tables(L, 40)
        for s in (0, 2, -2):
            reference = oh03_F(tab, s)
            # double-precision 3j values summed over σ = ±1 (partial cancellation): 1e-11 of the table scale
            assert np.allclose(
                spin1_kernel(tab, s, "gradient"), reference, rtol=0, atol=1e-11 * np.abs(reference).max()
            )


def test_general_construction_reproduces_table_one(fiducial):
    C = {k: v[:41] for k, v in fiducial.cmb(lensed=True).items()}
    tab = Tables(17, 40)
    for label in LABELS:
        assert np.allclose(
            general_response(tab, label[0], label[1], C, "gradient"),
            table_one(tab, label, C),
            rtol=1e-12,
            atol=1e-12 * np.abs(table_one(tab, label, C)).max(),
        )


def test_eb_sign_from_the_polarization_symmetry(fiducial):
    # Exact symmetry (common practice, from the remapping P̃(n) = P(n + d)): for C^EE = C^BB and C^EB = 0,
    # ⟨₂a ₂a⟩ = ⟨(E + iB)(E + iB)⟩ = 0 with or without lensing, so f^EE − f^BB + i(f^EB + f^BE) = 0.
    # With the (l1 ↔ l2) symmetry f^BE_{l1Ll2} = (−1)^Σ f^EB_{l2Ll1} this fixes the sign of EB's C^BB term.
    ee = fiducial.cmb(lensed=True)["EE"][:41]
    C = {"TT": ee, "EE": ee, "BB": ee, "TE": 0 * ee}
    tab = Tables(12, 40)
    f_ee = table_one(tab, "EE", C)
    f_bb = general_response(tab, "B", "B", C, "gradient")
    f_eb = table_one(tab, "EB", C)
    f_be = tab.parity * f_eb.T
    scale = np.abs(f_ee).max()
    assert np.abs(f_ee - f_bb + 1j * (f_eb + f_be)).max() < 1e-12 * scale
    f_eb_flipped = 1j * (
        C["EE"][:, None] * ((oh03_F(tab, 2) - oh03_F(tab, -2)) / 2).T
        - C["BB"][None, :] * (oh03_F(tab, 2) - oh03_F(tab, -2)) / 2
    )
    f_be_flipped = tab.parity * f_eb_flipped.T
    assert np.abs(f_ee - f_bb + 1j * (f_eb_flipped + f_be_flipped)).max() > 1e-3 * scale


# ------------------------------------------------------------------------------ published properties
@pytest.fixture(scope="module")
def survey_results(fiducial):
    def run(noise, beam, **kw):
        e = lensrec.Experiment(
            name="survey",
            noise_temperature=noise,
            beam_fwhm=beam,
            ell_min=2,
            ell_max_temperature=3000,
            ell_max_polarization=3000,
            **kw,
        )
        return reconstruction_noise(e, fiducial, lmax_L=3000, nthreads=2)

    return {"deep": run(0.5, 1.0), "shallow": run(20.0, 4.0), "mid": run(6.0, 1.4)}


def test_eb_best_at_low_noise_and_tt_best_at_high_noise(survey_results):
    # Hu & Okamoto 2002 (ApJ 574, 566), Fig. 3: EB gives the lowest noise for polarization noise ≲ 1 µK-arcmin,
    # TT for noise above ~10 µK-arcmin. Checked over the S/N-carrying range 20 ≤ L ≤ 1000.
    L = np.arange(20, 1001)
    deep, shallow = survey_results["deep"], survey_results["shallow"]
    for label in ("TT", "TE", "EE", "TB"):
        assert np.all(deep.n0["EB"]["gradient"][L] < deep.n0[label]["gradient"][L]), label
    for label in ("TE", "EE", "TB", "EB"):
        assert np.all(shallow.n0["TT"]["gradient"][L] < shallow.n0[label]["gradient"][L]), label


@pytest.mark.parametrize("name", ["deep", "shallow", "mid"])
def test_mv_beats_each_estimator(survey_results, name):
    result = survey_results[name]
    L = np.arange(2, 3001)
    for component in ("gradient", "curl"):
        mv = result.n0["MV"][component][L]
        for label in LABELS:
            # MV minimizes variance over unit-response combinations (OH03 §III); allow rounding 1e-12
            assert np.all(mv <= result.n0[label][component][L] * (1 + 1e-12)), (label, component)
        weights = result.mv_weights[component][:, L]
        assert np.allclose(weights.sum(axis=0), 1.0, rtol=0, atol=1e-12)
    assert np.all(np.isnan(result.n0["MV"]["gradient"][:2]))


def test_mv_full_covariance_versus_naive_inverse_sum(survey_results, rng):
    result = survey_results["mid"]
    cov = result.covariance["gradient"]
    L = 400
    c = cov[:, :, L]
    mv = result.n0["MV"]["gradient"][L]
    ones = np.ones(5)
    # full-covariance MV (OH03 §III) against the naive combination that ignores cross terms: its weights
    # w_i ∝ 1/N0_i have true variance wᵀCw ≥ N0_MV, and no unit-sum weight vector beats the MV (Gauss–Markov)
    naive = (1 / np.diag(c)) / np.sum(1 / np.diag(c))
    assert naive @ c @ naive >= mv
    assert np.isclose(mv, 1 / (ones @ np.linalg.solve(c, ones)), rtol=1e-12)
    for _ in range(200):
        w = rng.normal(size=5)
        w /= w.sum()
        assert w @ c @ w >= mv * (1 - 1e-12)
    # TT, TE and EE noise is positively correlated, so the inverse sum 1/Σ(1/N0) that ignores it is too optimistic
    assert 1 / np.sum(1 / np.diag(c)) < mv
    # with a diagonal covariance the two coincide
    n0_diag, w_diag = minimum_variance(np.diag(np.diag(c))[:, :, None])
    assert np.isclose(n0_diag[0], 1 / np.sum(1 / np.diag(c)), rtol=1e-13)


def test_optimal_estimators_have_n0_equal_to_normalization(survey_results):
    # For TT, EE, TB and EB the filtered weights are the optimum, so N0 = A_L = 1/R_L (OH03 §III); TE with
    # diagonal filters is not the optimum (see test_te_noise_is_bounded_by_the_optimal_te_weight).
    result = survey_results["mid"]
    L = np.arange(2, 3001)
    for component in ("gradient", "curl"):
        for label in ("TT", "EE", "TB", "EB"):
            # rounding: at L ≪ l the ladder terms cancel to O(lL), amplifying ε by ~(l/L)²: ≤ 3e-10 measured
            # at L = 2 (1e-13 typical), so allow 1e-9
            assert np.allclose(
                result.n0[label][component][L] * result.response[label][component][L], 1.0, rtol=1e-9, atol=0
            ), label
        # TE's cross term Σ W₁₂ W*₂₁ (−1)^Σ C^TE C^TE (either sign) makes N0 differ from A_L
        te = result.n0["TE"][component][L] * result.response["TE"][component][L]
        assert np.max(np.abs(te - 1)) > 0.01


def test_n0_scales_as_noise_power_squared_when_noise_dominates(fiducial):
    # With N_l ≫ C_l the filters are 1/N_l and R ∝ 1/N², so N0 ∝ (noise power)² = Δ⁴ (common practice).
    # Per mode the ratio is 16 (1 + C/N₂)²/(1 + C/N₁)², so it departs from 16 by less than 2·max(C/N₁).
    experiments = [
        lensrec.Experiment(
            name="n",
            noise_temperature=d,
            beam_fwhm=0.0,
            ell_min=1000,
            ell_max_temperature=2000,
            ell_max_polarization=2000,
        )
        for d in (5e4, 1e5)
    ]
    results = [reconstruction_noise(e, fiducial, estimators=("TT", "EB"), nthreads=2) for e in experiments]
    signal = fiducial.cmb(lensed=True)
    used = slice(1000, 2001)
    worst = max(np.max(signal[k][used] / experiments[0].noise_spectrum(k[0], 2000)[used]) for k in ("TT", "EE", "BB"))
    assert worst < 1e-4  # the premise: noise dominates by 10^4 or more
    L = np.arange(2, 2001)
    for label in ("TT", "EB"):
        ratio = results[1].n0[label]["gradient"][L] / results[0].n0[label]["gradient"][L]
        assert np.allclose(ratio, 16.0, rtol=2 * worst + 1e-10, atol=0), label


# ------------------------------------------------------------------------------------ general weights
def test_general_machinery_other_sources_and_other_totals(fiducial):
    e1 = lensrec.Experiment(
        name="a", noise_temperature=3.0, beam_fwhm=3.0, ell_max_temperature=1500, ell_max_polarization=1500
    )
    e2 = e1.replace(noise_temperature=100.0, noise_polarization=None, beam_fwhm=10.0)  # noise-dominated above ~1000
    factors = standard_factors(e1, fiducial, 1500)
    other = standard_factors(e2, fiducial, 1500, total_prefix="total2", filter_prefix="inverse2")
    for name in other.names():
        if name.startswith(("total2:", "inverse2:")):
            factors.add(name, other.values(name, 1500))
    tt = quadratic_estimator("TT")
    eb = quadratic_estimator("EB")
    # gradient estimators do not respond to a curl source on the full sky (parity; OH03 §II, NYT12)
    grad_on_curl = estimator_responses(
        [tt, eb], [response_kernel("TT", "curl"), response_kernel("EB", "curl")], factors, 1500, 400
    )
    own = estimator_responses([tt, eb], [response_kernel("TT"), response_kernel("EB")], factors, 1500, 400)
    for cross, self_ in zip(grad_on_curl, own, strict=True):
        assert np.max(np.abs(cross[2:])) < 1e-12 * np.max(np.abs(self_[2:]))
    # weights tuned for e1, applied to data with e2's noise: N0 ≥ the optimum for e2 (Cauchy–Schwarz,
    # OH03 §III), equal to it when the weights match the data
    tt2 = quadratic_estimator("TT", filters="inverse2")
    R1, R2 = (r.real for r in estimator_responses([tt, tt2], [response_kernel("TT")] * 2, factors, 1500, 400))
    N_mismatch = noise_covariance([tt], factors, 1500, 400, total="total2")[0, 0].real
    N_matched = noise_covariance([tt2], factors, 1500, 400, total="total2")[0, 0].real
    L = np.arange(2, 401)
    n0_mismatch = N_mismatch[L] / R1[L] ** 2
    n0_optimal = N_matched[L] / R2[L] ** 2
    assert np.all(n0_mismatch >= n0_optimal * (1 - 1e-12))
    assert np.max(n0_mismatch / n0_optimal) > 1.01
    assert np.allclose(n0_optimal * R2[L], 1.0, rtol=1e-10)


# ------------------------------------------------------------------------------------------ the API
def test_result_shape_labels_and_snr(survey_results):
    result = survey_results["mid"]
    assert list(result.n0) == list(lensrec.labels.ESTIMATORS)
    for label in result.n0:
        assert set(result.n0[label]) == {"gradient", "curl"}
        assert result.n0[label]["gradient"].shape == (3001,)
        assert np.all(np.isnan(result.n0[label]["gradient"][:2]))
        assert np.all(np.isfinite(result.n0[label]["gradient"][2:]))
    assert result.covariance["gradient"].shape == (5, 5, 3001)
    with pytest.raises(ValueError):
        result.n0["TT"]["gradient"][5] = 0.0
    snr = result.lensing_snr()
    assert snr["MV"] >= max(snr[label] for label in LABELS)
    # (S/N)² is linear in f_sky
    assert np.isclose(
        result.lensing_snr(sky_fraction=0.25)["TT"] ** 2 * 4, result.lensing_snr(sky_fraction=1.0)["TT"] ** 2
    )
    # restricted ranges add up: (S/N)² over [2, 100] + [101, 3000] = total
    parts = result.lensing_snr(L_max=100)["EB"] ** 2 + result.lensing_snr(L_min=101)["EB"] ** 2
    assert np.isclose(parts, snr["EB"] ** 2, rtol=1e-12)
    document = result.to_dict()
    assert document["L"][:3] == [0, 1, 2] and len(document["n0"]["MV"]["curl"]) == 3001


def test_bad_input_is_refused(fiducial):
    e = lensrec.Experiment(name="x", ell_max_temperature=500, ell_max_polarization=600)
    with pytest.raises(ValueError, match="unknown estimator 'tb'; did you mean 'TB'"):
        reconstruction_noise(e, fiducial, estimators=("TT", "tb"))
    with pytest.raises(ValueError, match="unknown estimator 'EBB'; did you mean 'EB'"):
        reconstruction_noise(e, fiducial, estimators="TT,EBB")
    with pytest.raises(ValueError, match="lmax_L=700 exceeds the CMB l_max=600"):
        reconstruction_noise(e, fiducial, lmax_L=700)
    with pytest.raises(ValueError, match="spectra reach only l = 400"):
        reconstruction_noise(e, fiducial.truncated(400))
    with pytest.raises(ValueError, match="at least one"):
        reconstruction_noise(e, fiducial, estimators=())
    with pytest.raises(TypeError, match="experiment must be an Experiment"):
        reconstruction_noise(3.0, fiducial)
    broken = fiducial.truncated(600)
    nan_tt = np.array(broken.lensed["TT"])
    nan_tt[100] = np.nan
    object.__setattr__(broken, "lensed", {**broken.lensed, "TT": nan_tt})  # bypass Spectra's own validation
    with pytest.raises(ValueError, match="non-finite"):
        reconstruction_noise(e, broken)

    class NoTemperature(lensrec.Experiment):
        def total_spectra(self, spectra, lmax, lensed=True):
            total = super().total_spectra(spectra, lmax, lensed)
            total["TT"] = np.full(lmax + 1, np.inf)
            total["TE"] = np.zeros(lmax + 1)
            return total

    cut = NoTemperature(name="cut", ell_max_temperature=500, ell_max_polarization=600)
    with pytest.raises(ValueError, match="estimator TT has no usable multipole of T"):
        reconstruction_noise(cut, fiducial)
    # without temperature the MV combines the polarization estimators (TT, TE and TB are undefined)
    polarization_only = reconstruction_noise(cut, fiducial, estimators=("EE", "EB", "MV"), lmax_L=300)
    assert polarization_only.covariance_labels == ("EE", "EB")
    mv, eb = polarization_only.n0["MV"]["gradient"][2:], polarization_only.n0["EB"]["gradient"][2:]
    assert np.all(np.isfinite(mv)) and np.all(mv <= eb * (1 + 1e-12))


def test_b_free_combination_is_the_minimum_variance_of_tt_te_ee():
    # Okamoto & Hu 2003, PRD 67, 083002, §III: N0 of the MV combination of unit-response estimators is
    # 1 / (1^T C^-1 1) over their N0 covariance; here over TT, TE, EE only, written out with numpy's inverse.
    result = lensrec.reconstruction_noise("deep_highland", estimators=("TT", "TE", "EE", "TT+TE+EE", "MV"), lmax_L=300)
    order = list(result.covariance_labels)
    index = [order.index(label) for label in ("TT", "TE", "EE")]
    for L in (10, 100, 300):
        block = result.covariance["gradient"][np.ix_(index, index)][:, :, L]
        expected = 1.0 / np.sum(np.linalg.inv(block))
        assert result.n0["TT+TE+EE"]["gradient"][L] == pytest.approx(expected, rel=1e-10)  # rounding of the inverse
        weights = result.combined_weights["TT+TE+EE"]["gradient"][:, L]
        assert weights[order.index("EB")] == 0.0 and weights[order.index("TB")] == 0.0
        assert np.sum(weights) == pytest.approx(1.0, rel=1e-12)  # unit response
        # a subset of MV's inputs: never below MV, never above its best member (common practice)
        assert result.n0["MV"]["gradient"][L] <= result.n0["TT+TE+EE"]["gradient"][L]
        assert result.n0["TT+TE+EE"]["gradient"][L] <= min(result.n0[x]["gradient"][L] for x in ("TT", "TE", "EE"))
