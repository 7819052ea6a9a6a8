"""Full-sky N0 against an independent flat-sky 2-D integral (Hu & Okamoto 2002, ApJ 574, 566).

The flat-sky weights are HO02's Table 1 (gradient) and the same with L·l → (ẑ×L)·l for the curl (Cooray,
Kamionkowski & Caldwell 2005, PRD 71, 123527); the integrals over l1 are written here from scratch: polar
coordinates around L, every integer multipole ℓ represented by the annulus |l| ∈ [ℓ, ℓ+1] (|l| ↔ ℓ + ½), the
ℓ cuts of l2 = L − l1 imposed exactly through the allowed angle range, Gauss–Legendre in angle.
"""

import numpy as np
import pytest

import lensrec
from lensrec.estimator_noise import reconstruction_noise

LMAX = 3000
L_CHECK = (30, 100, 300, 1000, 2000)
LABELS = ("TT", "TE", "EE", "TB", "EB")


def gauss_legendre_interval(n, a, b):
    x, w = np.polynomial.legendre.leggauss(n)  # numpy (reference library)
    return 0.5 * (b - a)[..., None] * x + 0.5 * (b + a)[..., None], 0.5 * (b - a)[..., None] * w


def flat_sky_n0(L, label, component, C, total, ell_min, ell_max, n_angle=128):
    """N0(L) from the flat-sky weights, diagonal filters 1/C_tot (TE with its cross term, as on the full sky)."""
    Lf = L + 0.5
    l1 = np.arange(ell_min, ell_max + 1) + 0.5  # annulus midpoints; each annulus has unit width
    # |l2|² = Lf² + l1² − 2 Lf l1 cos φ must lie in [ell_min, ell_max + 1]
    cos_hi = np.clip((Lf**2 + l1**2 - ell_min**2) / (2 * Lf * l1), -1, 1)
    cos_lo = np.clip((Lf**2 + l1**2 - (ell_max + 1) ** 2) / (2 * Lf * l1), -1, 1)
    phi, w_phi = gauss_legendre_interval(n_angle, np.arccos(cos_hi), np.arccos(cos_lo))
    l1x, l1y = l1[:, None] * np.cos(phi), l1[:, None] * np.sin(phi)
    l2x, l2y = Lf - l1x, -l1y
    l2 = np.hypot(l2x, l2y)
    ell = np.arange(C["TT"].size, dtype=float)

    def at(spectrum, modulus):  # C at |l| ↔ ℓ = |l| − ½
        return np.interp(modulus - 0.5, ell, spectrum)

    if component == "gradient":
        d1, d2 = Lf * l1x, Lf * l2x  # L·l with L along x
    else:
        d1, d2 = Lf * l1y, Lf * l2y  # (ẑ×L)·l
    angle = np.arctan2(l1y, l1x) - np.arctan2(l2y, l2x)  # φ_{l1} − φ_{l2}
    c2, s2 = np.cos(2 * angle), np.sin(2 * angle)
    l1g = np.broadcast_to(l1[:, None], l2.shape)

    def weight_fn(label, ma, mb, da, db, cos2, sin2):  # HO02 Table 1, field X at a, Y at b
        if label == "TT":
            return at(C["TT"], ma) * da + at(C["TT"], mb) * db
        if label == "TE":
            return at(C["TE"], ma) * cos2 * da + at(C["TE"], mb) * db
        if label == "EE":
            return (at(C["EE"], ma) * da + at(C["EE"], mb) * db) * cos2
        if label == "TB":
            return at(C["TE"], ma) * sin2 * da
        if label == "EB":  # C^BB sign: see test_estimator_noise.test_eb_sign_from_the_polarization_symmetry
            return (at(C["EE"], ma) * da + at(C["BB"], mb) * db) * sin2
        raise ValueError(label)

    X, Y = label
    f = weight_fn(label, l1g, l2, d1, d2, c2, s2)
    inv_x, inv_y = 1 / at(total[X + X], l1g), 1 / at(total[Y + Y], l2)
    measure = l1[:, None] * w_phi * 2 / (2 * np.pi) ** 2  # d²l1/(2π)², both half-planes
    eta = 2 if X == Y else 1
    R = np.sum(measure * f**2 * inv_x * inv_y) / eta
    if label != "TE":
        return 1 / R
    # TE: N = ∫ [f² C^TT C^EE + f(l1,l2) f(l2,l1) C^TE_1 C^TE_2] / (C^TT_1 C^EE_2)² … with swapped roles
    f_swapped = weight_fn(label, l2, l1g, d2, d1, c2, -s2)
    cross = (
        f
        * f_swapped
        * at(total["TE"], l1g)
        * at(total["TE"], l2)
        * inv_x
        * inv_y
        / (at(total["TT"], l2) * at(total["EE"], l1g))
    )
    N = R + np.sum(measure * cross)
    return N / R**2


@pytest.fixture(scope="module")
def both(fiducial):
    experiment = lensrec.Experiment(
        name="flat",
        noise_temperature=3.0,
        beam_fwhm=3.0,
        ell_min=30,
        ell_max_temperature=LMAX,
        ell_max_polarization=LMAX,
    )
    full = reconstruction_noise(experiment, fiducial, estimators=LABELS, nthreads=2)
    C = {k: v[: LMAX + 1] for k, v in fiducial.cmb(lensed=True).items()}
    total = {k: v.copy() for k, v in experiment.total_spectra(fiducial, LMAX).items()}
    flat = {
        (L, label, component): flat_sky_n0(L, label, component, C, total, 30, LMAX)
        for L in L_CHECK
        for label in LABELS
        for component in ("gradient", "curl")
    }
    return full, flat


def test_flat_sky_matches_full_sky(both):
    # Allowed difference 3/L² + 2e-4. The flat-sky kernels are the leading term of the full-sky ones for
    # L, ℓ ≫ 1; with |l| = ℓ + ½ the sphere's curvature on the scale of the lens mode enters at O(1/L²)
    # (from memory; measured here as ≈ 2.7/L² for 30 ≤ L ≤ 100, all estimators, both components).
    # The 2e-4 floor covers this flat integral's own discretisation: unit-width annuli in |l| and linear
    # interpolation of C_ℓ between integers (Δℓ² C''/8C ≈ 1e-4 at the acoustic scale); the angular rule is
    # converged to 3e-8 (128 vs 256 nodes).
    full, flat = both
    for (L, label, component), value in flat.items():
        difference = abs(full.n0[label][component][L] / value - 1)
        assert difference < 3.0 / L**2 + 2e-4, (L, label, component, difference)


def test_flat_sky_curl_to_gradient_ratio_is_reproduced(both):
    # The curl/gradient N0 ratio varies strongly with L (≈ 2 at low L for TT, ≈ 1/3 for EB); the flat-sky
    # integral, which shares no code with the full-sky path, reproduces it (same tolerance as above, twice).
    full, flat = both
    for L in L_CHECK:
        for label in LABELS:
            ratio_full = full.n0[label]["curl"][L] / full.n0[label]["gradient"][L]
            ratio_flat = flat[L, label, "curl"] / flat[L, label, "gradient"]
            assert abs(ratio_full / ratio_flat - 1) < 2 * (3.0 / L**2 + 2e-4), (L, label)
    assert flat[30, "TT", "curl"] / flat[30, "TT", "gradient"] > 1.5
    assert flat[30, "EB", "curl"] / flat[30, "EB", "gradient"] < 0.5
