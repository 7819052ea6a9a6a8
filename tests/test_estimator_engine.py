"""The position-space estimator engine: unnormalized ḡ_LM against brute-force 3j sums, leg symmetry,
transform counts and its docstring examples.

Sources: the estimator ḡ^XY_LM = (1/η) Σ (−1)^M (l1 l2 L; m1 m2 −M) [f^XY_{l1 L l2}]* X̄ Ȳ and the response
functions f of Okamoto & Hu 2003, PRD 67, 083002 (OH03: §III and Table I, with ₛF_{l1 L l2}); the curl kernel in
its spin-±1 form (Namikawa, Yamauchi & Taruya 2012, JCAP 01, 007); Wigner 3j symbols from ``wigners`` (reference
library).
"""

import doctest
import functools

import healpy as hp
import numpy as np
import pytest
import wigners

import lensrec
from lensrec import estimator_engine, harmonics
from lensrec.estimator_engine import quadratic_estimates
from lensrec.filtering import FilteredFields

LABELS = ("TT", "TE", "EE", "TB", "EB")
PAIRS = {"TT": (0, 0), "TE": (0, 1), "EE": (1, 1), "TB": (0, 2), "EB": (1, 2)}


# ----------------------------------------------------------------------------------- brute force (wigners)
@functools.cache
def three_j(l1, l2, l3, m1, m2, m3):
    """(l1 l2 l3; m1 m2 m3) from wigners, zero outside the selection rules (wigners aborts on |m| > j)."""
    if abs(m1) > l1 or abs(m2) > l2 or abs(m3) > l3 or m1 + m2 + m3 != 0 or not abs(l1 - l2) <= l3 <= l1 + l2:
        return 0.0
    return wigners.wigner_3j(l1, l2, l3, m1, m2, m3)


def oh03_F(L, s, lmax):
    """OH03: ₛF_{l1 L l2} = [L(L+1) + l2(l2+1) − l1(l1+1)] √((2l1+1)(2L+1)(2l2+1)/16π) (l1 L l2; s 0 −s)."""
    out = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        for l2 in range(lmax + 1):
            bracket = L * (L + 1) + l2 * (l2 + 1) - l1 * (l1 + 1)
            norm = np.sqrt((2 * l1 + 1) * (2 * L + 1) * (2 * l2 + 1) / (16 * np.pi))
            out[l1, l2] = bracket * norm * three_j(l1, L, l2, s, 0, -s)
    return out


def curl_S(L, s, lmax):
    """NYT12 curl kernel: ₛS = −(−1)^s/2 √(L(L+1)) N Σ_σ (−iσ) √((l2−σs)(l2+σs+1)) (l1 L l2; s σ −s−σ)."""
    out = np.zeros((lmax + 1, lmax + 1), dtype=complex)
    for l1 in range(lmax + 1):
        for l2 in range(lmax + 1):
            norm = np.sqrt((2 * l1 + 1) * (2 * L + 1) * (2 * l2 + 1) / (4 * np.pi))
            total = 0.0
            for sigma in (1, -1):
                ladder = np.sqrt(max((l2 - sigma * s) * (l2 + sigma * s + 1), 0))
                total += -1j * sigma * ladder * three_j(l1, L, l2, s, sigma, -s - sigma)
            out[l1, l2] = -((-1) ** s) / 2 * np.sqrt(L * (L + 1.0)) * norm * total
    return out


def response_tables(L, cl, lmax):
    """f^XY_{l1 L l2} on the (l1, l2) grid for both components.

    Gradient: OH03 Table I with ₂F^± = (₂F ± ₋₂F)/2, EB's C^BB term with a plus sign (the sign fixed by the
    E ↔ B symmetry noted in lensrec.estimator_weights). Curl: the same construction with the NYT12 kernel,
    f = Σ_Z K^XZ_{l1Ll2} C^ZY_l2 + (−1)^(l1+L+l2) K^YZ_{l2Ll1} C^ZX_l1, K^TT = ₀S, K^EE = S⁺, K^BE = −iS⁻, K^EB = iS⁻.
    """
    ell = np.arange(lmax + 1)
    c1 = {k: v[:, None] for k, v in cl.items()}
    c2 = {k: v[None, :] for k, v in cl.items()}
    f0, f2, fm2 = oh03_F(L, 0, lmax), oh03_F(L, 2, lmax), oh03_F(L, -2, lmax)
    plus, minus = (f2 + fm2) / 2, (f2 - fm2) / 2
    gradient = {
        "TT": c1["TT"] * f0.T + c2["TT"] * f0,
        "TE": c1["TE"] * plus.T + c2["TE"] * f0,
        "EE": c1["EE"] * plus.T + c2["EE"] * plus,
        "TB": 1j * c1["TE"] * minus.T,
        "EB": 1j * (c1["EE"] * minus.T + c2["BB"] * minus),
    }
    s0, s2, sm2 = curl_S(L, 0, lmax), curl_S(L, 2, lmax), curl_S(L, -2, lmax)
    parity = (-1.0) ** (ell[:, None] + L + ell[None, :])
    K = {"TT": s0, "EE": (s2 + sm2) / 2, "BB": (s2 + sm2) / 2, "EB": 1j * (s2 - sm2) / 2, "BE": -1j * (s2 - sm2) / 2}

    def spec(a, b):
        return cl.get("".join(sorted(a + b, key="TEB".index)), np.zeros(lmax + 1))

    curl = {}
    for label in LABELS:
        x, y = label
        total = np.zeros((lmax + 1, lmax + 1), dtype=complex)
        for z in "TEB":
            if x + z in K:
                total += K[x + z] * spec(z, y)[None, :]
            if y + z in K:
                total += parity * K[y + z].T * spec(z, x)[:, None]
        curl[label] = total
    return {"gradient": gradient, "curl": curl}


def all_m(alm, lmax):
    """X[l, m + lmax] for m = −l … l from the m ≥ 0 coefficients of a real field (X_{l,−m} = (−1)^m X*_lm)."""
    out = np.zeros((lmax + 1, 2 * lmax + 1), dtype=complex)
    for ell in range(lmax + 1):
        for m in range(ell + 1):
            value = alm[hp.Alm.getidx(lmax, ell, m)]
            out[ell, lmax + m] = value
            out[ell, lmax - m] = (-1) ** m * np.conj(value)
    return out


def brute_force_estimates(first, second, cl, lmax, lmax_L):
    """ḡ_LM for every label and component, M = −L … L, by the direct sum over (l1, m1, l2, m2)."""
    fields = [[all_m(alm, lmax) for alm in inputs] for inputs in (first, second)]
    out = {}
    for L in range(1, lmax_L + 1):
        tables = response_tables(L, cl, lmax)
        for M in range(-L, L + 1):
            terms = [
                (l1, m1, l2, M - m1, (-1) ** M * three_j(l1, l2, L, m1, M - m1, -M))
                for l1 in range(lmax + 1)
                for m1 in range(-l1, l1 + 1)
                for l2 in range(max(abs(l1 - L), abs(M - m1)), min(l1 + L, lmax) + 1)
            ]
            l1, m1, l2, m2, w = (np.array(v) for v in zip(*terms, strict=True))
            for label in LABELS:
                x, y = PAIRS[label]
                product = w * fields[0][x][l1, lmax + m1] * fields[1][y][l2, lmax + m2]
                eta = 2 if x == y else 1
                for component in ("gradient", "curl"):
                    value = np.sum(np.conj(tables[component][label][l1, l2]) * product) / eta
                    out[label, component, L, M] = value
    return out


@pytest.fixture(scope="module")
def tiny_inputs():
    """Random filtered fields at l <= 10 and random positive 'spectra' (generic weights, C^BB != 0)."""
    lmax = 10
    rng = np.random.default_rng(8)

    def fields():
        alm = rng.normal(size=(3, harmonics.nalm(lmax))) + 1j * rng.normal(size=(3, harmonics.nalm(lmax)))
        alm[:, : lmax + 1] = alm[:, : lmax + 1].real
        ell = harmonics.ell_of_alm(lmax)
        alm[1:, ell < 2] = 0.0  # E and B have no l < 2
        return alm

    cl = {key: np.r_[0.0, 0.0, rng.uniform(0.5, 2.0, lmax - 1)] for key in ("TT", "EE", "BB")}
    cl["TE"] = np.r_[0.0, 0.0, rng.uniform(-0.5, 0.5, lmax - 1)]
    spectra = lensrec.Spectra(
        unlensed=cl, lensed=cl, phi=np.ones(lmax + 1), tensor={k: np.zeros(lmax + 1) for k in ("TT", "EE", "BB")}
    )
    a, b = fields(), fields()
    return lmax, cl, spectra, a, b


@pytest.mark.parametrize("mixed", [False, True], ids=["one input", "mixed pair"])
def test_position_space_estimates_equal_brute_force_3j_sums(tiny_inputs, mixed):
    lmax, cl, spectra, a, b = tiny_inputs
    lmax_L = 14  # above lmax: the products reach 2 lmax
    second = b if mixed else a
    first_fields = FilteredFields(a, lmax, cl)
    second_fields = FilteredFields(second, lmax, cl) if mixed else None
    got = quadratic_estimates(first_fields, second_fields, lmax_L=lmax_L, spectra=spectra, nthreads=1)
    reference = brute_force_estimates(a, second, cl, lmax, lmax_L)
    for label in LABELS:
        for component in ("gradient", "curl"):
            mine = (got.gradient if component == "gradient" else got.curl)[label]
            want = np.zeros_like(mine)
            for L in range(1, lmax_L + 1):
                for M in range(L + 1):
                    want[hp.Alm.getidx(lmax_L, L, M)] = reference[label, component, L, M]
                    # the real-field symmetry the position-space form relies on (module docstring, item 2)
                    mirrored = (-1) ** M * np.conj(reference[label, component, L, -M])
                    assert abs(mirrored - reference[label, component, L, M]) <= 1e-10 * np.abs(want).max() + 1e-300
            # sums of ~1e3 terms and ducc0 transforms in double precision: 1e-8 of the largest value is rounding
            assert np.abs(want).max() > 0
            assert np.allclose(mine, want, rtol=0, atol=1e-8 * np.abs(want).max()), (label, component)
    # processing the grid in many small blocks of ring pairs (here 2 rings each) changes only rounding
    blocked = quadratic_estimates(
        first_fields, second_fields, lmax_L=lmax_L, spectra=spectra, nthreads=2, workspace_mb=0.001
    )
    assert blocked.settings["ring_blocks"] > 5
    for label in LABELS:
        assert np.allclose(
            blocked.gradient[label], got.gradient[label], rtol=0, atol=1e-12 * np.abs(got.gradient[label]).max()
        )
        assert np.allclose(blocked.curl[label], got.curl[label], rtol=0, atol=1e-12 * np.abs(got.curl[label]).max())


def test_symmetric_estimators_do_not_depend_on_the_leg_order(tiny_inputs):
    lmax, cl, spectra, a, b = tiny_inputs
    fa, fb = FilteredFields(a, lmax, cl), FilteredFields(b, lmax, cl)
    ab = quadratic_estimates(fa, fb, lmax_L=8, spectra=spectra, nthreads=1)
    ba = quadratic_estimates(fb, fa, lmax_L=8, spectra=spectra, nthreads=1)
    for label in ("TT", "EE"):  # f^XX_{l1Ll2} = (−1)^(l1+L+l2) f^XX_{l2Ll1} (OH03 Table I), so ḡ[a,b] = ḡ[b,a]
        assert np.allclose(ab.gradient[label], ba.gradient[label], rtol=1e-12, atol=1e-14)
    assert not np.allclose(ab.gradient["TE"], ba.gradient["TE"])  # T of a with E of b is another pairing


def test_transform_counts(tiny_inputs):
    lmax, cl, spectra, a, b = tiny_inputs
    fields = FilteredFields(a, lmax, cl)
    # distinct (field, l-weight, |spin|) legs + one spin-1 analysis per estimator (module docstring):
    # TT: T, sqrt(l(l+1)) C^TT T; EE: E(2), C^EE E (1, 3); TB: C^TE T (1, 3), B(2); TE: T, C^TE T (1, 3),
    # C^TE E (1), E(2); EB: C^EE E (1, 3), E(2), B(2), C^BB B (1, 3)
    expected = {"TT": 3, "EE": 4, "TB": 4, "TE": 6, "EB": 7}
    for label, total in expected.items():
        got = quadratic_estimates(fields, estimators=label, lmax_L=4, spectra=spectra, nthreads=1)
        assert got.settings["transforms"]["total"] == total, label
    both = quadratic_estimates(fields, estimators=LABELS, lmax_L=4, spectra=spectra, nthreads=1)
    assert both.settings["transforms"] == {
        "synthesis_by_spin": {"0": 1, "1": 5, "2": 2, "3": 3},
        "synthesis": 11,
        "analysis_spin1": 5,
        "total": 16,
    }
    mixed = quadratic_estimates(
        fields, FilteredFields(b, lmax, cl), estimators=LABELS, lmax_L=4, spectra=spectra, nthreads=1
    )
    assert mixed.settings["transforms"]["synthesis"] == 16  # 7 legs of the first input, 9 of the second
    # unlensed weights have no B-mode power (r = 0), so EB drops the C^BB B legs: 3 syntheses + 1 analysis
    fiducial = lensrec.fiducial_spectra()
    unlensed = quadratic_estimates(fields, estimators="EB", lmax_L=4, spectra=fiducial, weights="unlensed", nthreads=1)
    assert unlensed.settings["transforms"]["total"] == 4


def test_docstring_examples_run():
    assert doctest.testmod(estimator_engine).failed == 0
