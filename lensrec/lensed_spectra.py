# Over 600 lines: lensed, delensed and first-order BB spectra share one correlation-function machinery.
"""Full-sky lensed CMB spectra by the correlation-function method, and forecast delensed spectra.

The lensed correlation functions are built on Gauss–Legendre nodes x = cos β from the deflection
correlation functions of C_L^φφ (Challinor & Lewis 2005, PRD 71, 103010, §III; Lewis & Challinor 2006,
Phys. Rep. 429, 1, §4–5):

    C_gl(β)   = Σ_L (2L+1)/4π · L(L+1) C_L^φφ · d^L_{11}(β),
    C_gl,2(β) = Σ_L (2L+1)/4π · L(L+1) C_L^φφ · d^L_{1,-1}(β),
    σ²(β)     = C_gl(0) − C_gl(β).

The σ² dependence is kept to all orders through exponentials; the expansion in C_gl,2 is kept to second
order, which Challinor & Lewis (2005) show is accurate to better than 0.1% for ℓ ≲ 3000 (Challinor &
Lewis 2005, PRD 71, 103010, accuracy discussion). Each lensed correlation function is a sum of Wigner-d series whose
coefficients depend on the node through σ²(β); the changes ξ̃ − ξ are projected back to ΔC_ℓ with the
exact Gauss–Legendre projection, so the unlensed part is never re-synthesized and zero lensing returns
the unlensed spectra exactly.

With the convention ξ_{mn}(β) = Σ_ℓ (2ℓ+1)/4π C_ℓ d^ℓ_{mn}(β) and Gauss–Legendre weights w_k,
C_ℓ = 2π Σ_k w_k ξ(x_k) d^ℓ_{mn}(x_k), exactly for band-limited ξ.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from ._checks import as_finite_array, as_int, as_real_array, resolve_nthreads
from .quadrature import gauss_legendre, npoints_for, wigner_d_project, wigner_d_series

__all__ = [
    "lensed_cmb_spectra",
    "first_order_lensed_bb",
    "delensed_spectra",
    "residual_lensing_potential",
    "deflection_correlations",
]

CMB_KEYS = ("TT", "EE", "BB", "TE")
# Lensing B modes at ℓ ≪ 1000 come from E and φ at ℓ ~ 500–2500, and B near lmax from φ up to ~lmax + 2000;
# with 2000 extra multipoles the lensed BB agrees with camb to 0.3% up to ℓ = 2500 (tests/test_lensed_spectra.py).
DEFAULT_ELL_MARGIN = 2000


# ------------------------------------------------------------------------------------------ validation
def _check_margin(lmax, ell_margin):
    lmax = as_int(lmax, "lmax", minimum=2)
    ell_margin = as_int(ell_margin, "ell_margin", minimum=0)
    return lmax, ell_margin


def _need(array, name, lmax, ell_margin):
    needed = lmax + ell_margin
    if array.size - 1 < needed:
        raise ValueError(
            f"{name} reaches l = {array.size - 1}, but lmax={lmax} with ell_margin={ell_margin} needs input up to "
            f"l = {needed}; lower lmax to at most {array.size - 1 - ell_margin}, lower ell_margin, or extend the "
            "input spectra (lensing B modes draw on E and phi up to ~2000 multipoles away)"
        )
    out = np.array(array[: needed + 1], dtype=np.float64)
    out[:2] = 0.0  # monopole and dipole carry no CMB anisotropy power here (lensrec convention)
    return out


def _check_phi(phi, lmax, ell_margin, name="phi"):
    phi = as_finite_array(phi, name, ndim=1)
    if np.any(phi < 0):
        bad = int(np.argmin(phi))
        raise ValueError(f"{name} (C_L^phiphi) must be non-negative; got {phi[bad]:.4g} at L = {bad}")
    return _need(phi, name, lmax, ell_margin)


def _check_unlensed(unlensed, lmax, ell_margin):
    if not isinstance(unlensed, Mapping):
        raise TypeError(
            f"unlensed must be a mapping of 'TT', 'EE', 'BB', 'TE' to arrays (e.g. Spectra.unlensed), got "
            f"{type(unlensed).__name__}"
        )
    missing = [key for key in CMB_KEYS if key not in unlensed]
    if missing:
        raise ValueError(f"unlensed lacks the spectra {missing}; it needs all of {CMB_KEYS} (BB may be zeros)")
    arrays = {key: as_finite_array(unlensed[key], f"unlensed[{key!r}]", ndim=1) for key in CMB_KEYS}
    lengths = {key: array.size for key, array in arrays.items()}
    if len(set(lengths.values())) != 1:
        raise ValueError(f"unlensed spectra must share one length (lmax + 1); got lengths {lengths}")
    for key in ("TT", "EE", "BB"):
        if np.any(arrays[key] < 0):
            bad = int(np.argmin(arrays[key]))
            raise ValueError(f"unlensed[{key!r}] must be non-negative; got {arrays[key][bad]:.4g} at l = {bad}")
    out = {key: _need(array, f"unlensed[{key!r}]", lmax, ell_margin) for key, array in arrays.items()}
    # Cauchy–Schwarz: |C^TE| <= sqrt(C^TT C^EE) for any physical pair of fields (1e-10 for rounding).
    excess = np.abs(out["TE"]) - np.sqrt(out["TT"] * out["EE"]) * (1 + 1e-10)
    if np.any(excess > 1e-300):
        bad = int(np.argmax(excess))
        raise ValueError(
            f"unlensed['TE'] violates |C^TE| <= sqrt(C^TT C^EE) at l = {bad} (TE = {out['TE'][bad]:.4g}, "
            f"sqrt(TT EE) = {math.sqrt(out['TT'][bad] * out['EE'][bad]):.4g}); check the column order"
        )
    return out


# ------------------------------------------------------------------------------ deflection correlations
def _ell_arrays(lmax):
    ell = np.arange(lmax + 1, dtype=np.float64)
    return ell, ell * (ell + 1.0), (2.0 * ell + 1.0) / (4.0 * math.pi)


def deflection_correlations(phi, x, nthreads=None):
    """Deflection correlation functions C_gl(0), σ²(β) and C_gl,2(β) at the nodes ``x = cos β``.

    Parameters
    ----------
    phi : array_like
        C_L^φφ (dimensionless), L = 0 … L_max.
    x : array_like
        Cosines of the separation angles.
    nthreads : int, optional
        Threads for the Wigner-d series (default: ``LENSREC_NTHREADS`` or all cores).

    Returns
    -------
    cgl0 : float
        C_gl(0) = Σ_L (2L+1)/4π L(L+1) C_L^φφ, the mean squared deflection ⟨|∇φ|²⟩ in rad².
    sigma2 : ndarray
        σ²(β) = C_gl(0) − C_gl(β), rad².
    cgl2 : ndarray
        C_gl,2(β), rad².

    References
    ----------
    Challinor & Lewis 2005, PRD 71, 103010, eqs. for C_gl and C_gl,2 in §III.
    """
    phi = as_finite_array(phi, "phi", ndim=1)
    x = as_finite_array(x, "x", ndim=1)
    nthreads = resolve_nthreads(nthreads)
    _, llp1, norm = _ell_arrays(phi.size - 1)
    coefficients = norm * llp1 * phi
    cgl0 = float(np.sum(coefficients))  # d^L_11(0) = 1
    cgl = wigner_d_series(coefficients, 1, 1, x, nthreads=nthreads)
    cgl2 = wigner_d_series(coefficients, 1, -1, x, nthreads=nthreads)
    return cgl0, cgl0 - cgl, cgl2


def _sqrt_nonneg(values):
    return np.sqrt(np.clip(values, 0.0, None))


# The lensed correlation functions need Σ_ℓ c_ℓ exp(−ℓ(ℓ+1)σ²(β)/2) d^ℓ_{mn}(β): coefficients that change
# from node to node through σ²(β). The Wigner-d engine evaluates series with node-independent coefficients
# fast, so the heat-kernel factor is interpolated in σ²: the nodes are split into groups whose σ² spans at
# most _GROUP_SPAN / a_max (a = ℓ(ℓ+1)/2), and inside a group exp(−aσ²) is replaced by its Chebyshev
# interpolant in σ², exact to _KERNEL_TOLERANCE relative to exp(−aσ²) for every ℓ ≤ lmax + margin
# (interpolation error bound 2 (aΔ/4)^n / n! for n Chebyshev points on an interval of length Δ).
_GROUP_SPAN = 4.0
_KERNEL_TOLERANCE = 1e-12


def _chebyshev_count(span):
    """Fewest Chebyshev points n with 2 (span/4)^n / n! · e^span ≤ _KERNEL_TOLERANCE."""
    if span <= 0.0:
        return 1
    n = 1
    while 2.0 * math.exp(n * math.log(span / 4.0) - math.lgamma(n + 1) + span) > _KERNEL_TOLERANCE:
        n += 1
    return n


def _interpolation_groups(sigma2, a_max):
    """Yield (node indices, Chebyshev points in σ², interpolation matrix (points, nodes)) per node group."""
    low, high = float(sigma2.min()), float(sigma2.max())
    ngroups = max(1, math.ceil(a_max * (high - low) / _GROUP_SPAN))
    label = np.minimum(((sigma2 - low) / ((high - low) / ngroups if high > low else 1.0)).astype(int), ngroups - 1)
    for group in range(ngroups):
        index = np.flatnonzero(label == group)
        if index.size == 0:
            continue
        values = sigma2[index]
        lo, hi = float(values.min()), float(values.max())
        count = _chebyshev_count(a_max * (hi - lo))
        if count == 1 or hi == lo:
            yield index, np.array([0.5 * (lo + hi)]), np.ones((1, index.size))
            continue
        angles = (2.0 * np.arange(count) + 1.0) * math.pi / (2.0 * count)
        points = 0.5 * (lo + hi) + 0.5 * (hi - lo) * np.cos(angles)
        weights = (-1.0) ** np.arange(count) * np.sin(angles)  # barycentric weights, first-kind nodes
        difference = values[None, :] - points[:, None]
        exact = difference == 0.0
        difference[exact] = 1.0
        terms = weights[:, None] / difference
        matrix = terms / terms.sum(axis=0, keepdims=True)
        hit = np.flatnonzero(exact.any(axis=0))
        matrix[:, hit] = exact[:, hit].astype(float)
        yield index, points, matrix


def _lensing_terms(cl):
    """The terms of ξ̃ − ξ as (output, m, n, per-ℓ coefficients, kernel, node factor).

    kernel is "exp" for X²_000 = exp(−ℓ(ℓ+1)σ²/2), "expm1" for X²_000 − 1, or None for none; the node factor
    is a function of (σ², C_gl,2). The X functions are the small-angle forms of Challinor & Lewis (2005),
    their Appendix (also Lewis & Challinor 2006, §4.2), written relative to X_000 = exp(−ℓ(ℓ+1)σ²/4):
    X_022 = X_000 e^{σ²}, X_220 = ¼√((ℓ+2)(ℓ−1)ℓ(ℓ+1)) X_000 e^{σ²/2}, X_121 = −½√((ℓ+2)(ℓ−1)) X_000 e^{2σ²/3},
    X_132 = −½√((ℓ+3)(ℓ−2)) X_000 e^{5σ²/3}, X_242 = ¼√((ℓ+4)(ℓ+3)(ℓ−2)(ℓ−3)) X_000 e^{5σ²/2}, and the
    σ²-derivatives X'_000 = −ℓ(ℓ+1)/4 X_000, X'_022 = −(ℓ(ℓ+1)−4)/4 X_022.
    """
    lmax_in = cl["TT"].size - 1
    ell, llp1, norm = _ell_arrays(lmax_in)
    physical = ell >= 2
    q220 = np.where(physical, 0.25 * _sqrt_nonneg((ell + 2) * (ell - 1) * llp1), 0.0)
    q121 = np.where(physical, -0.5 * _sqrt_nonneg((ell + 2) * (ell - 1)), 0.0)
    q132 = np.where(physical, -0.5 * _sqrt_nonneg((ell + 3) * (ell - 2)), 0.0)
    q242 = np.where(physical, 0.25 * _sqrt_nonneg((ell + 4) * (ell + 3) * (ell - 2) * (ell - 3)), 0.0)
    gradient = -0.5 * np.sqrt(llp1)  # 2 X'_000 / (√(ℓ(ℓ+1)) X_000)
    tt = norm * cl["TT"]
    plus = norm * (cl["EE"] + cl["BB"])
    minus = norm * (cl["EE"] - cl["BB"])
    cross = norm * cl["TE"]

    def one(s, c2):
        return np.ones_like(s)

    def grow(power, order=0):
        if order == 0:
            return lambda s, c2: np.exp(power * s)
        return lambda s, c2: c2**order * np.exp(power * s)

    return [
        # ξ̃ = Σ (2ℓ+1)/4π C^TT [X²_000 d_00 + (8/ℓ(ℓ+1)) C_gl,2 X'²_000 d_{1,-1}
        #                         + C²_gl,2 (X'²_000 d_00 + X²_220 d_{2,-2})]
        ("T", 0, 0, tt, "expm1", one),
        ("T", 0, 0, tt * llp1**2 / 16.0, "exp", grow(0.0, 2)),
        ("T", 1, -1, tt * llp1 / 2.0, "exp", grow(0.0, 1)),
        ("T", 2, -2, tt * q220**2, "exp", grow(1.0, 2)),
        # ξ̃_+ = Σ (2ℓ+1)/4π (C^EE + C^BB) [X²_022 d_22 + 2 C_gl,2 X_132 X_121 d_31
        #                                  + C²_gl,2 (X'²_022 d_22 + X_242 X_220 d_40)]
        ("+", 2, 2, plus, "expm1", grow(2.0)),
        ("+", 2, 2, plus, None, lambda s, c2: np.expm1(2.0 * s)),
        ("+", 2, 2, plus * (llp1 - 4.0) ** 2 / 16.0, "exp", grow(2.0, 2)),
        ("+", 3, 1, plus * 2.0 * q132 * q121, "exp", grow(7.0 / 3.0, 1)),
        ("+", 4, 0, plus * q242 * q220, "exp", grow(3.0, 2)),
        # ξ̃_- = Σ (2ℓ+1)/4π (C^EE − C^BB) [X²_022 d_{2,-2} + C_gl,2 (X²_121 d_{1,-1} + X²_132 d_{3,-3})
        #                        + ½ C²_gl,2 (2 X'²_022 d_{2,-2} + X²_220 d_00 + X²_242 d_{4,-4})]
        ("-", 2, -2, minus, "expm1", grow(2.0)),
        ("-", 2, -2, minus, None, lambda s, c2: np.expm1(2.0 * s)),
        ("-", 2, -2, minus * (llp1 - 4.0) ** 2 / 16.0, "exp", grow(2.0, 2)),
        ("-", 1, -1, minus * q121**2, "exp", grow(4.0 / 3.0, 1)),
        ("-", 3, -3, minus * q132**2, "exp", grow(10.0 / 3.0, 1)),
        ("-", 0, 0, minus * 0.5 * q220**2, "exp", grow(1.0, 2)),
        ("-", 4, -4, minus * 0.5 * q242**2, "exp", grow(5.0, 2)),
        # ξ̃_X = Σ (2ℓ+1)/4π C^TE [X_022 X_000 d_20 + C_gl,2 (2X'_000/√(ℓ(ℓ+1))) (X_121 d_11 + X_132 d_{3,-1})
        #                          + ½ C²_gl,2 ((2 X'_022 X'_000 + X²_220) d_20 + X_220 X_242 d_{2,-4})]
        ("X", 2, 0, cross, "expm1", grow(1.0)),
        ("X", 2, 0, cross, None, lambda s, c2: np.expm1(s)),
        ("X", 2, 0, cross * 0.5 * ((llp1 - 4.0) * llp1 / 8.0 + q220**2), "exp", grow(1.0, 2)),
        ("X", 1, 1, cross * gradient * q121, "exp", grow(2.0 / 3.0, 1)),
        ("X", 3, -1, cross * gradient * q132, "exp", grow(5.0 / 3.0, 1)),
        ("X", 2, -4, cross * 0.5 * q220 * q242, "exp", grow(3.0, 2)),
    ]


def _correlation_changes(cl, sigma2, cgl2, x, nthreads, terms=None):
    """ξ̃ − ξ at the nodes ``x`` for T, the spin-2 pair (+, −) and the cross (X), or for the given terms."""
    lmax_in = cl["TT"].size - 1
    _, llp1, _ = _ell_arrays(lmax_in)
    half = 0.5 * llp1
    terms = _lensing_terms(cl) if terms is None else terms
    changes = {key: np.zeros(x.size) for key in dict.fromkeys(term[0] for term in terms)}
    for key, m, n, coefficients, kernel, factor in terms:
        if kernel is None and np.any(coefficients):
            changes[key] += factor(sigma2, cgl2) * wigner_d_series(coefficients, m, n, x, nthreads=nthreads)
    by_spins: dict = {}
    for term in terms:
        if term[4] is not None and np.any(term[3]):
            by_spins.setdefault((term[1], term[2]), []).append(term)
    for index, points, matrix in _interpolation_groups(sigma2, float(half[-1])):
        exponent = -half[None, :] * points[:, None]
        kernels = {"exp": np.exp(exponent), "expm1": np.expm1(exponent)}
        s, c2, nodes = sigma2[index], cgl2[index], x[index]
        for (m, n), group in by_spins.items():
            rows = np.concatenate(
                [coefficients[None, :] * kernels[kernel] for _, _, _, coefficients, kernel, _ in group]
            )
            values = wigner_d_series(rows, m, n, nodes, nthreads=nthreads).reshape(len(group), points.size, -1)
            interpolated = np.einsum("tpk,pk->tk", values, matrix)
            for (key, _, _, _, _, factor), row in zip(group, interpolated, strict=True):
                changes[key][index] += factor(s, c2) * row
    return changes


def _lensed_from_checked(cl, phi, lmax, nthreads):
    lmax_in = cl["TT"].size - 1
    npoints = npoints_for(lmax_in, phi.size - 1, lmax)
    x, w = gauss_legendre(npoints)
    _, sigma2, cgl2 = deflection_correlations(phi, x, nthreads=nthreads)
    changes = _correlation_changes(cl, sigma2, cgl2, x, nthreads)

    def project(values, m, n):
        return 2.0 * math.pi * wigner_d_project(values, m, n, lmax, x, w, nthreads=nthreads)

    plus = project(changes["+"], 2, 2)
    minus = project(changes["-"], 2, -2)
    delta = {
        "TT": project(changes["T"], 0, 0),
        "EE": 0.5 * (plus + minus),
        "BB": 0.5 * (plus - minus),
        "TE": project(changes["X"], 2, 0),
    }
    lensed = {}
    for key in CMB_KEYS:
        spectrum = cl[key][: lmax + 1] + delta[key]
        spectrum[:2] = 0.0
        lensed[key] = spectrum
    return lensed


# ---------------------------------------------------------------------------------------- public API
def lensed_cmb_spectra(unlensed, phi, lmax, ell_margin=DEFAULT_ELL_MARGIN, nthreads=None):
    """Lensed TT, EE, BB, TE on the full sky, non-perturbatively, by the correlation-function method.

    Parameters
    ----------
    unlensed : mapping of str to array_like
        Unlensed ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (raw C_ℓ in µK², indexed from ℓ = 0, one common
        length), e.g. :attr:`lensrec.Spectra.unlensed`. BB may be zeros (scalar modes) or tensor B modes.
        Entries at ℓ = 0, 1 are ignored.
    phi : array_like
        Lensing-potential power C_L^φφ (dimensionless), indexed from L = 0.
    lmax : int
        Highest multipole of the lensed output (≥ 2).
    ell_margin : int, default 2000
        Multipoles above ``lmax`` of the input that are used: the unlensed spectra and C_L^φφ are read to
        ℓ = lmax + ell_margin, and must reach it. Lensing moves power between multipoles far apart: BB at low
        ℓ is sourced by E and φ at ℓ ~ 500–2500 and BB near lmax by φ up to ~lmax + 2000. Measured against
        camb at lmax = 2500, a margin of 500 leaves BB 10% low at ℓ = 2500 and TT 0.5% low; 2000 gives
        0.3% and 0.03%. TT, EE and TE alone converge with ~1000.
    nthreads : int, optional
        Threads for the Wigner-d series (default: ``LENSREC_NTHREADS`` or all cores).

    Returns
    -------
    dict of str to ndarray
        Lensed ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` in µK², ℓ = 0 … lmax (ℓ = 0, 1 set to 0).

    Raises
    ------
    TypeError
        If ``unlensed`` is not a mapping or an array is not numeric.
    ValueError
        If a spectrum is missing, the CMB spectra differ in length, any entry is non-finite, an auto-spectrum
        or C^φφ is negative, |C^TE| > √(C^TT C^EE), or an input does not reach lmax + ell_margin.

    Notes
    -----
    The lensed correlation functions keep σ²(β) to all orders and C_gl,2 to second order, with the
    small-angle forms of the X_imn integrals of Challinor & Lewis (2005), and neglect the field rotation
    (curl lensing) and post-Born terms. The changes ξ̃ − ξ are evaluated at
    ``npoints_for(lmax + margin, lmax + margin, lmax)`` Gauss–Legendre nodes. Their coefficients depend on
    the node through exp(−ℓ(ℓ+1)σ²(β)/2); this factor is interpolated in σ² (Chebyshev, groups of nodes
    whose σ² spans ≤ 4/(ℓ_max(ℓ_max+1)/2), relative error ≤ 1e-12), so each of the 19 terms costs ~17
    node-independent Wigner-d series instead of one per node.

    References
    ----------
    Challinor & Lewis 2005, PRD 71, 103010, §III (lensed correlation functions, eqs. for ξ̃, ξ̃_±, ξ̃_X) and
    Appendix (the X_imn); Lewis & Challinor 2006, Phys. Rep. 429, 1, §4.2 and §5.2.

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> s = lensrec.fiducial_spectra()
    >>> lensed = lensrec.lensed_cmb_spectra(s.unlensed, s.phi, lmax=300)
    >>> sorted(lensed), lensed["BB"].shape
    (['BB', 'EE', 'TE', 'TT'], (301,))
    >>> bool(abs(lensed["BB"][100] / s.lensed["BB"][100] - 1) < 0.01)
    True
    """
    lmax, ell_margin = _check_margin(lmax, ell_margin)
    cl = _check_unlensed(unlensed, lmax, ell_margin)
    phi = _check_phi(phi, lmax, ell_margin)
    return _lensed_from_checked(cl, phi, lmax, resolve_nthreads(nthreads))


def first_order_lensed_bb(unlensed_ee, phi, lmax, ell_margin=DEFAULT_ELL_MARGIN, nthreads=None):
    """Leading-order lensing B modes: the exact full-sky convolution of C^EE with C^φφ.

    C̃_ℓ^BB = 1/(2ℓ+1) Σ_{L,ℓ'} |₂F_{ℓLℓ'}|² C_L^φφ C_ℓ'^EE for ℓ + L + ℓ' odd (Hu 2000), with
    ₂F_{ℓLℓ'} = ½[L(L+1) + ℓ'(ℓ'+1) − ℓ(ℓ+1)] √((2ℓ+1)(2L+1)(2ℓ'+1)/4π) (ℓ L ℓ'; 2 0 −2). Writing the
    bracket with the spin-raising identity as −√(L(L+1)) [√((ℓ'−2)(ℓ'+3)) (ℓ L ℓ'; 2 1 −3) +
    √((ℓ'+2)(ℓ'−1)) (ℓ L ℓ'; 2 −1 −1)] turns the double sum into one Gauss–Legendre integral of products of
    Wigner-d series (the identity ∫ d d d dx = 2 (3j)(3j) of Varshalovich et al. 1988, §4.11), exact with
    ``npoints_for(lmax_E, L_max, lmax)`` nodes.

    Parameters
    ----------
    unlensed_ee : array_like
        Unlensed C_ℓ^EE in µK², indexed from ℓ = 0 (entries ℓ = 0, 1 ignored).
    phi : array_like
        C_L^φφ (dimensionless), indexed from L = 0.
    lmax : int
        Highest output multipole (≥ 2).
    ell_margin : int, default 2000
        Both inputs are used up to ℓ = lmax + ell_margin (see :func:`lensed_cmb_spectra`).
    nthreads : int, optional
        Threads for the Wigner-d engine.

    Returns
    -------
    ndarray
        First-order lensing C_ℓ^BB in µK², ℓ = 0 … lmax (ℓ = 0, 1 are 0).

    Raises
    ------
    TypeError, ValueError
        For non-numeric, non-finite, negative or too short inputs (see :func:`lensed_cmb_spectra`).

    References
    ----------
    Hu 2000, PRD 62, 043007 (the first-order full-sky lensed spectra, BB from EE); Okamoto & Hu 2003,
    PRD 67, 083002 (the same kernel in the quadratic estimators).

    Examples
    --------
    >>> import lensrec
    >>> s = lensrec.fiducial_spectra()
    >>> bb = lensrec.first_order_lensed_bb(s.unlensed["EE"], s.phi, lmax=200)
    >>> bool(0.95 < bb[100] / s.lensed["BB"][100] < 1.05)
    True
    """
    lmax, ell_margin = _check_margin(lmax, ell_margin)
    ee = as_finite_array(unlensed_ee, "unlensed_ee", ndim=1)
    if np.any(ee < 0):
        bad = int(np.argmin(ee))
        raise ValueError(f"unlensed_ee must be non-negative; got {ee[bad]:.4g} at l = {bad}")
    ee = _need(ee, "unlensed_ee", lmax, ell_margin)
    phi = _check_phi(phi, lmax, ell_margin)
    return _first_order_bb_checked(ee, phi, lmax, resolve_nthreads(nthreads))


def _first_order_bb_checked(ee, phi, lmax, nthreads):
    npoints = npoints_for(ee.size - 1, phi.size - 1, lmax)
    x, w = gauss_legendre(npoints)
    big_l, big_llp1, _ = _ell_arrays(phi.size - 1)
    a = (2.0 * big_l + 1.0) * big_llp1 * phi
    ell, _, _ = _ell_arrays(ee.size - 1)
    up = _sqrt_nonneg((ell - 2.0) * (ell + 3.0))  # spin 2 -> 3
    down = _sqrt_nonneg((ell + 2.0) * (ell - 1.0))  # spin 2 -> 1
    e_base = (2.0 * ell + 1.0) * ee

    def series(coefficients, m, n):
        return wigner_d_series(coefficients, m, n, x, nthreads=nthreads)

    d11, d1m1 = series(a, 1, 1), series(a, 1, -1)
    e_up, e_down, e_mixed = e_base * up**2, e_base * down**2, e_base * up * down
    same = d11 * (series(e_up, 3, 3) + series(e_down, 1, 1)) + 2.0 * d1m1 * series(e_mixed, 3, 1)
    flipped = d1m1 * (series(e_up, 3, -3) + series(e_down, 1, -1)) + 2.0 * d11 * series(e_mixed, 3, -1)
    bb = (
        wigner_d_project(same, 2, 2, lmax, x, w, nthreads=nthreads)
        - wigner_d_project(flipped, 2, -2, lmax, x, w, nthreads=nthreads)
    ) / (64.0 * math.pi)
    bb[:2] = 0.0
    return bb


def residual_lensing_potential(phi, n0):
    """Residual lensing power after subtracting a Wiener-filtered reconstruction: C^φφ (1 − ρ²).

    ρ_L² = C_L^φφ / (C_L^φφ + N0_L), so the residual is C^φφ N0 / (C^φφ + N0).

    Parameters
    ----------
    phi : array_like
        C_L^φφ (dimensionless), indexed from L = 0.
    n0 : array_like
        Reconstruction noise N0_L in C_L^φφ units, indexed from L = 0. NaN is accepted at L < 2 (the lensrec
        convention for undefined entries) and ``inf`` anywhere (no reconstruction); multipoles beyond the end
        of ``n0`` are taken as not reconstructed.

    Returns
    -------
    ndarray
        The residual C_L^φφ, same length as ``phi``.

    Raises
    ------
    TypeError, ValueError
        For non-numeric input, NaN at L ≥ 2, −inf or negative N0, or negative or non-finite C^φφ.

    References
    ----------
    Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (delensing with a Wiener-filtered φ; the
    residual C^φφ(1 − ρ²)); Seljak & Hirata 2004, PRD 69, 043005.

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.lensed_spectra import residual_lensing_potential
    >>> residual_lensing_potential(np.array([0.0, 0.0, 2.0, 2.0]), np.array([np.nan, np.nan, 2.0, np.inf]))
    array([0., 0., 1., 2.])
    """
    phi = as_finite_array(phi, "phi", ndim=1)
    if np.any(phi < 0):
        raise ValueError(f"phi (C_L^phiphi) must be non-negative; got {phi.min():.4g}")
    n0 = as_real_array(n0, "n0", ndim=1)
    if np.any(np.isnan(n0[2:])):
        bad = int(np.argmax(np.isnan(n0[2:]))) + 2
        raise ValueError(f"n0 is NaN at L = {bad}; NaN is allowed only at L < 2 (use inf for no reconstruction)")
    if np.any(n0[np.isfinite(n0)] < 0) or np.any(n0 == -np.inf):
        raise ValueError(f"n0 must be non-negative (a noise power); got {np.nanmin(n0):.4g}")
    noise = np.full(phi.size, np.inf)
    used = min(phi.size, n0.size)
    noise[:used] = np.where(np.isnan(n0[:used]), np.inf, n0[:used])
    residual = np.array(phi)
    finite = np.isfinite(noise) & (phi + noise > 0)
    residual[finite] = phi[finite] * noise[finite] / (phi[finite] + noise[finite])
    return residual


def delensed_spectra(
    unlensed, phi, n0, lmax, ell_margin=DEFAULT_ELL_MARGIN, ee_noise=None, lensed_ee=None, nthreads=None
):
    """Forecast delensed spectra: the CMB lensed by the residual potential after a Wiener-filtered φ̂.

    Delensing with a reconstruction of noise N0_L leaves the residual lensing power
    C_L^φφ,res = C_L^φφ (1 − ρ_L²), ρ_L² = C_L^φφ / (C_L^φφ + N0_L). The delensed TT, EE, BB, TE returned
    are the non-perturbative lensed spectra of the unlensed CMB by C^φφ,res (:func:`lensed_cmb_spectra`).

    If ``ee_noise`` is given, the B-mode template is taken to be built from Wiener-filtered observed E modes,
    W_ℓ = C_ℓ^EE / (C_ℓ^EE + N_ℓ^EE). At first order the residual B-mode power is then
    K[C^EE, C^φφ] − K[W C^EE, ρ² C^φφ] = K[C^EE, C^φφ,res] + K[(1 − W) C^EE, ρ² C^φφ], with K the
    convolution of :func:`first_order_lensed_bb`; the second term (lensing of the E modes missing from the
    template by the reconstructed φ) is added to BB at first order. TT, EE and TE are not changed by
    ``ee_noise``. The B modes of E lensed by the reconstruction noise in the template are included: with the
    Wiener filter of the true N0 the template power K[W C^EE, ρ⁴(C^φφ + N0)] equals its cross with the
    lensing B modes, K[W C^EE, ρ² C^φφ], so the residual K[C^EE, C^φφ] − 2 K[W C^EE, ρ² C^φφ] +
    K[W C^EE, ρ² C^φφ] is the expression above (checked on simulations in tests/test_tensor_forecast.py). Not
    included: the delensing bias from reusing the same B modes in φ̂ (see
    :data:`lensrec.tensor_forecast.DELENSING_BIAS_NOTE`) and a reconstruction whose noise differs from ``n0``.

    Parameters
    ----------
    unlensed : mapping of str to array_like
        Unlensed ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (µK², raw C_ℓ, from ℓ = 0).
    phi : array_like
        C_L^φφ (dimensionless), from L = 0.
    n0 : array_like
        Reconstruction noise N0_L in C_L^φφ units (e.g. the MV gradient N0), from L = 0; NaN allowed at L < 2,
        ``inf`` where there is no reconstruction, L beyond its end taken as not reconstructed.
    lmax : int
        Highest output multipole.
    ell_margin : int, default 2000
        Inputs are used up to lmax + ell_margin (see :func:`lensed_cmb_spectra`).
    ee_noise : array_like, optional
        Beam-deconvolved E-mode noise N_ℓ^EE (µK², ``inf`` outside the survey's cuts), reaching
        lmax + ell_margin. If omitted the template E modes are taken noise-free.
    lensed_ee : array_like, optional
        The observed (lensed) C_ℓ^EE used in the Wiener factor W; default the unlensed EE (the difference
        is of second order in the lensing).
    nthreads : int, optional
        Threads for the Wigner-d engine.

    Returns
    -------
    dict of str to ndarray
        Delensed ``"TT"``, ``"EE"``, ``"BB"``, ``"TE"`` (µK², ℓ = 0 … lmax) and ``"phi_residual"``, the residual
        C_L^φφ (L = 0 … lmax + ell_margin).

    Raises
    ------
    TypeError, ValueError
        As :func:`lensed_cmb_spectra` and :func:`residual_lensing_potential`, and for a too short, NaN or
        negative ``ee_noise`` or ``lensed_ee``.

    References
    ----------
    Smith, Hanson, LoVerde, Hirata & Zahn 2012, JCAP 06, 014 (forecast delensing, residual
    C^φφ(1 − ρ²) and the E-noise factor); Challinor & Lewis 2005, PRD 71, 103010 (lensed spectra).

    Examples
    --------
    >>> import numpy as np, lensrec
    >>> s = lensrec.fiducial_spectra()
    >>> n0 = np.full(s.lmax + 1, 1e-8)   # a flat toy reconstruction noise
    >>> out = lensrec.delensed_spectra(s.unlensed, s.phi, n0, lmax=200)
    >>> bool(out["BB"][100] < s.lensed["BB"][100])
    True
    """
    lmax, ell_margin = _check_margin(lmax, ell_margin)
    cl = _check_unlensed(unlensed, lmax, ell_margin)
    phi = _check_phi(phi, lmax, ell_margin)
    residual = residual_lensing_potential(phi, n0)
    nthreads = resolve_nthreads(nthreads)
    out = _lensed_from_checked(cl, residual, lmax, nthreads)
    if ee_noise is not None:
        noise = _noise_array(ee_noise, "ee_noise", lmax, ell_margin)
        if lensed_ee is None:
            observed = cl["EE"]
        else:
            observed = as_finite_array(lensed_ee, "lensed_ee", ndim=1)
            if np.any(observed < 0):
                raise ValueError(f"lensed_ee must be non-negative; got {observed.min():.4g}")
            observed = _need(observed, "lensed_ee", lmax, ell_margin)
        with np.errstate(invalid="ignore", divide="ignore"):
            wiener = np.where(np.isfinite(noise) & (observed + noise > 0), observed / (observed + noise), 0.0)
        reconstructed = phi - residual  # ρ² C^φφ
        out["BB"] = out["BB"] + _first_order_bb_checked((1.0 - wiener) * cl["EE"], reconstructed, lmax, nthreads)
    out["phi_residual"] = residual
    return out


def _noise_array(values, name, lmax, ell_margin):
    if isinstance(values, (str, bytes)):
        raise TypeError(f"{name} must be a numeric array, got {type(values).__name__}")
    array = np.asarray(values)
    if not (np.issubdtype(array.dtype, np.floating) or np.issubdtype(array.dtype, np.integer)) or array.ndim != 1:
        raise TypeError(f"{name} must be a 1-D real numeric array, got dtype {array.dtype} shape {array.shape}")
    array = array.astype(np.float64)
    if np.any(np.isnan(array)) or np.any(array < 0):
        raise ValueError(f"{name} must be non-negative with no NaN (use inf outside the survey's cuts)")
    return _need(array, name, lmax, ell_margin)
