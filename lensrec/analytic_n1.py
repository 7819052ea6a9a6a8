# Over 600 lines: one flat-sky convolution engine for the N1 of every estimator and combination.
r"""Analytic N1 bias of the quadratic lensing estimators (flat sky, FFT convolutions on a coarse L grid).

N1 is the part of the reconstruction power ⟨φ̂^α φ̂^β*⟩ that is first order in C^φφ and comes from contracting
φ *across* the two estimates (Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507; Hanson, Challinor,
Efstathiou & Bielewicz 2011, PRD 83, 043005). For estimators ḡ^α = (1/η_α) ∫ W^α(l1, l2) X(l1) Y(l2) and
ḡ^β on the fields (Z, V), with ⟨X(la) Z(lb)⟩ = f^XZ(la, lb) φ(la + lb) to first order::

    N1^αβ_L = A^α_L A^β_L / (η_α η_β) ∫ d²l1/(2π)² ∫ d²l1'/(2π)² W^α(l1, l2) W^β*(l1', l2')
              × [ C^φφ_|l1−l1'| f^XZ(l1, −l1') f^YV(l2, −l2') + C^φφ_|l1−l2'| f^XV(l1, −l2') f^YZ(l2, −l1') ] ,

l2 = L − l1, l2' = L − l1', A = 1/R the normalization. The second (crossed) contraction is the first one with
β's field pair exchanged, so one routine does both. For the curl estimator the same formula holds with the
curl weights W (the legs f are always the gradient response: the simulated sky is lensed by φ alone).

How it is evaluated
===================
Every weight and response is a finite sum of separable spin-weighted terms (:mod:`lensrec.estimator_weights`,
module docstring item 4): c · u(ℓ1) v(L) w(ℓ2) · N · (ℓ1 L ℓ2; s1 sL s2). On the flat sky such a term becomes
c · u(|l1|) v(|L|) w(|l2|) · exp(∓i[s1(φ_l1 − φ_L) + s2(φ_l2 − φ_L)]) (upper sign for the responses f, lower
for the weights W = f*·filters, so that the response ∫ W f is positive), with the ℓ-weights read at
ℓ = |l| − ½. This reproduces the flat-sky kernels of Hu & Okamoto 2002 (ApJ 574, 566, Table 1) term by term,
so any estimator given as separable terms (including joint ones) gets its N1 from the same code.

With the terms expanded, each contraction is a sum of Σ_{l1,l1'} A(l1) D_m(l1 − l1') B(l1') over a Cartesian
l grid, with D_m(q) = q(q+1) C^φφ_q e^{−imφ_q} (m = −2, 0, 2) and A, B products of the weights and the leg
factors at fixed L. By Parseval this is Σ_k ifft(A)(k) fft(D_m)(k) fft(B)(k): two FFTs per distinct A and B,
and fft(D_m) once for all L. The box is 4 ℓ_max wide (no wrap-around of l1 − l1'); D_m is averaged over each
cell near q = 0. The normalization A_L uses the response computed on the same grid, so grid errors common to
numerator and normalization cancel. N1 is computed on a coarse L grid and interpolated (monotone cubic in
log L of L²(L+1)² N1).

Accuracy
========
Flat-sky: the grid N0 of each estimator agrees with the exact full-sky N0 of
:func:`lensrec.reconstruction_noise` to the flat-sky accuracy of Hu & Okamoto (2002), a few percent at L ≳ 30
on the default grid (measured figures in docs/validation.md); N1, a ratio of grid sums, carries errors of the
same order, well below its cosmic variance and the difference between lensed-spectrum and higher-order N1
(Hanson et al. 2011, §IV). The legs use lensed spectra (Hanson et al. 2011 show these capture most of the
higher-order terms). MV combines the pair N1^αβ with the per-L MV weights of the exact full-sky N0 covariance.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
import scipy.fft
from scipy.interpolate import PchipInterpolator

from ._checks import as_finite_array, as_int, readonly_copy, resolve_nthreads, run_parallel
from .estimator_noise import (
    ReconstructionNoise,
    joint_estimator_parts,
    minimum_variance,
    reconstruction_noise,
    standard_factors,
)
from .estimator_weights import _LADDER as _LADDER_NAME
from .estimator_weights import (
    COMPONENTS,
    FactorTable,
    PairKernel,
    QuadraticEstimator,
    quadratic_estimator,
    response_kernel,
    spectrum_name,
)
from .experiment import as_experiment
from .gradient_spectra import DEFAULT_WEIGHTS, parse_weights
from .labels import (
    COMBINED_ESTIMATORS,
    ESTIMATOR_FIELDS,
    ESTIMATORS,
    JOINT_ESTIMATORS,
    parse_components,
    parse_estimators,
)
from .spectra import as_spectra

__all__ = ["AnalyticN1", "analytic_n1", "default_n1_L_grid", "pair_n1", "reconstruction_n1"]

(JOINT_LABEL,) = tuple(JOINT_ESTIMATORS)
_LEG_PREFIX = "leg"  # spectra in the lensing response of the legs (always lensed)
DEFAULT_GRID_SIZE = 128


# ----------------------------------------------------------------------------------------- L grid
def default_n1_L_grid(lmax_L: int, count: int = 24) -> np.ndarray:
    """The coarse L grid of :func:`analytic_n1`: ``count`` points from 2 to ``lmax_L``, log-spaced.

    Parameters
    ----------
    lmax_L : int
        Highest lensing multipole (≥ 2).
    count : int
        Number of points (≥ 4; fewer distinct integers are returned when lmax_L is small).
    """
    lmax_L = as_int(lmax_L, "lmax_L", minimum=2)
    count = as_int(count, "count", minimum=4)
    grid = np.unique(np.round(np.geomspace(2, lmax_L, count)).astype(int))
    return grid


# ------------------------------------------------------------------------------------------- grid
class _Grid:
    """A Cartesian l grid in FFT order, 4 ℓ_max wide, and radial factor look-ups on it."""

    def __init__(self, factors: FactorTable, lmax: int, size: int, nthreads: int, box: float = 4.0):
        self.factors = factors
        self.lmax = lmax
        self.size = size
        self.nthreads = nthreads
        self.spacing = box * (lmax + 1) / size
        # threads pay off only for large transforms (measured: 128² is faster on one thread)
        self.workers = nthreads if size >= 512 else 1
        k = np.fft.fftfreq(size, d=1.0 / size) * self.spacing
        self.lx, self.ly = np.meshgrid(k, k, indexing="ij")
        self.mod1 = np.hypot(self.lx, self.ly)
        self.phase1 = np.exp(1j * np.arctan2(self.ly, self.lx))
        self._radial_cache: dict = {}
        self._ell = np.arange(lmax + 2, dtype=np.float64)

    def radial(self, names: tuple, modulus: np.ndarray, key=None) -> np.ndarray:
        """Π of the named ℓ-weights at ℓ = |l| − ½ (linear interpolation, 0 beyond ℓ_max)."""
        cache_key = (names, key)
        if key is not None and cache_key in self._radial_cache:
            return self._radial_cache[cache_key]
        ell = modulus - 0.5
        out = np.ones(modulus.shape)
        for name in names:
            match = _LADDER_NAME.match(name)
            if match:
                q = int(match.group(1))
                out = out * np.sqrt(np.clip((ell - q) * (ell + q + 1.0), 0.0, None))
            else:
                values = np.zeros(self.lmax + 2)
                values[: self.lmax + 1] = self.factors.values(name, self.lmax)
                out = out * np.interp(np.clip(ell, 0.0, None), self._ell, values, right=0.0)
        if key is not None:
            self._radial_cache[cache_key] = out
        return out

    def fft(self, array):
        return scipy.fft.fft2(array, workers=self.workers)

    def ifft(self, array):
        return scipy.fft.ifft2(array, workers=self.workers)


class _AtL:
    """The geometry at one L (L along x, |L| = L + ½): l2 = L − l1 on the grid."""

    def __init__(self, grid: _Grid, L: int):
        self.grid = grid
        self.L = L
        self.modulus_L = L + 0.5
        l2x = self.modulus_L - grid.lx
        l2y = -grid.ly
        self.mod2 = np.hypot(l2x, l2y)
        self.phase2 = np.exp(1j * np.arctan2(l2y, l2x))
        self._phases: dict = {}
        self._radials: dict = {}

    def spin_phase(self, side: int, spin: int) -> np.ndarray | float:
        if spin == 0:
            return 1.0
        key = (side, spin)
        if key not in self._phases:
            base = self.grid.phase1 if side == 1 else self.phase2
            self._phases[key] = base**spin
        return self._phases[key]

    def radial(self, names, side: int) -> np.ndarray:
        if side == 1:
            return self.grid.radial(tuple(names), self.grid.mod1, key=1)
        key = tuple(names)
        if key not in self._radials:
            self._radials[key] = self.grid.radial(key, self.mod2)
        return self._radials[key]

    def leg_factor(self, names, spin: int, side: int) -> np.ndarray:
        """u(|l|) e^{−i s φ_l} on side 1 (l1) or 2 (l2), cached."""
        key = ("leg", tuple(names), spin, side)
        if key not in self._radials:
            self._radials[key] = self.radial(names, side) * self.spin_phase(side, -spin)
        return self._radials[key]

    def kernel(self, kernel: PairKernel, sign: int) -> np.ndarray:
        """Σ c u(|l1|) v(L) w(|l2|) exp(sign·i[s1 φ1 + s2 φ2]) on the grid (φ_L = 0)."""
        out = np.zeros(self.grid.mod1.shape, dtype=np.complex128)
        factors = self.grid.factors
        for term in kernel.terms:
            if term.coefficient == 0:
                continue
            names = term.first + term.lensing + term.second
            if any(factors.is_zero(n) for n in names):
                continue
            s1, _, s2 = term.spins
            v = float(self.grid.radial(tuple(term.lensing), np.array([self.modulus_L]))[0])
            if v == 0.0:
                continue
            u = self.radial(term.first, 1)
            w = self.radial(term.second, 2)
            phase = self.spin_phase(1, sign * s1) * self.spin_phase(2, sign * s2)
            out += (term.coefficient * v) * u * w * phase
        return out


# ------------------------------------------------------------------------------------ leg terms
def _leg_terms(x: str, z: str, factors: FactorTable):
    """Non-zero terms of the gradient response f^XZ with the leg spectra, as plain tuples."""
    out = []
    for term in response_kernel((x, z), "gradient", _LEG_PREFIX).terms:
        names = term.first + term.lensing + term.second
        if term.coefficient == 0 or any(factors.is_zero(n) for n in names):
            continue
        out.append(term)
    return out


def _phi_kernels(grid: _Grid, phi: np.ndarray, lensing_names, spins, basis=None) -> dict:
    """fft of D_m(q) = Π v(|q|) · C^φφ_|q| e^{−imφ_q} on the grid, averaged over each cell near q = 0.

    Returns {(names, m): array} or, with ``basis`` (k, ℓ) weights, {(names, m): array (k, N, N)}.
    """
    dl = grid.spacing
    ell = np.arange(phi.size, dtype=np.float64)
    # sub-cell samples for cells within 4 spacings of q = 0 (D_m varies fast there)
    sub = 8
    offsets = (np.arange(sub) + 0.5) / sub - 0.5
    near = grid.mod1 < 4.5 * dl
    idx = np.flatnonzero(near)
    qx = (grid.lx.ravel()[idx, None, None] + dl * offsets[None, :, None]) * np.ones((1, 1, sub))
    qy = (grid.ly.ravel()[idx, None, None] + dl * offsets[None, None, :]) * np.ones((1, sub, 1))
    qmod_near = np.hypot(qx, qy)
    qphase_near = np.exp(-1j * np.arctan2(qy, qx))
    qphase = np.conj(grid.phase1)
    weights = [phi] if basis is None else list(basis * phi[None, :])
    out = {}
    for names in lensing_names:
        for m in spins:
            stack = []
            for spectrum in weights:
                values = np.zeros(grid.lmax + 2)
                n = min(values.size, spectrum.size)
                values[:n] = spectrum[:n]

                def radial(modulus, values=values, names=names):
                    r = np.interp(np.clip(modulus - 0.5, 0.0, None), ell[: values.size], values, right=0.0)
                    for name in names:
                        q = int(_LADDER_NAME.match(name).group(1))
                        lm = modulus - 0.5
                        r = r * np.sqrt(np.clip((lm - q) * (lm + q + 1.0), 0.0, None))
                    return r

                d = radial(grid.mod1) * (qphase**m if m else 1.0)
                d = d.astype(np.complex128)
                d.ravel()[idx] = np.mean(radial(qmod_near) * (qphase_near**m if m else 1.0), axis=(1, 2))
                d.ravel()[0] = 0.0
                stack.append(grid.fft(d))
            out[names, m] = stack[0] if basis is None else np.array(stack)
    return out


# ------------------------------------------------------------------------------------ core sums
class _Contraction:
    """Σ over leg terms of Σ_k ifft(A) fft(D_m) fft(B) for one L and estimator pair."""

    def __init__(self, at: _AtL, phi_hat: Mapping, factors: FactorTable):
        self.at = at
        self.phi_hat = phi_hat
        self.factors = factors
        self._ffts: dict = {}
        self.fft_count = 0

    def _transform(self, key, build, inverse):
        if key not in self._ffts:
            array = build()
            self._ffts[key] = self.at.grid.ifft(array) if inverse else self.at.grid.fft(array)
            self.fft_count += 1
        return self._ffts[key]

    def contraction(self, a_id, weight_a: np.ndarray, b_id, weight_b_conj: np.ndarray, fields_a, fields_b):
        """Σ_{l1,l1'} W^α(l1,l2) W^β*(l1',l2') C^φφ f^XZ(l1,−l1') f^YV(l2,−l2') (no 1/η, no measure)."""
        x, y = fields_a
        z, v = fields_b
        leg1 = _leg_terms(x, z, self.factors)
        leg2 = _leg_terms(y, v, self.factors)
        at = self.at
        groups: dict = {}
        for t in leg1:
            for r in leg2:
                s1, sl_t, s2 = t.spins
                r1, sl_r, r2 = r.spins
                coef = t.coefficient * r.coefficient * (-1) ** ((s2 + r2 + sl_r) % 2)
                akey = (t.first, s1, r.first, r1)
                bkey = (t.second, s2, r.second, r2)
                dkey = (tuple(sorted(t.lensing + r.lensing)), sl_t + sl_r)
                inner = groups.setdefault(dkey, {}).setdefault(akey, {})
                inner[bkey] = inner.get(bkey, 0.0) + coef
        results = {}
        for dkey, by_a in groups.items():
            accumulated = None
            for akey, by_b in by_a.items():
                names1, spin1, names2, spin2 = akey

                def build_a(names1=names1, spin1=spin1, names2=names2, spin2=spin2):
                    return weight_a * at.leg_factor(names1, spin1, 1) * at.leg_factor(names2, spin2, 2)

                a_hat = self._transform(("A", a_id, akey), build_a, inverse=True)
                b_sum = None
                for bkey, coef in by_b.items():
                    if coef == 0:
                        continue
                    names1b, spin1b, names2b, spin2b = bkey

                    def build_b(names1b=names1b, spin1b=spin1b, names2b=names2b, spin2b=spin2b):
                        return weight_b_conj * at.leg_factor(names1b, spin1b, 1) * at.leg_factor(names2b, spin2b, 2)

                    b_hat = self._transform(("B", b_id, bkey), build_b, inverse=False)
                    b_sum = coef * b_hat if b_sum is None else b_sum + coef * b_hat
                if b_sum is None:
                    continue
                product = a_hat * b_sum
                accumulated = product if accumulated is None else accumulated + product
            if accumulated is not None:
                results[dkey] = accumulated
        return results

    def evaluate(self, products: Mapping, matrix: bool = False):
        """Σ_k fft(D) × accumulated products (a scalar, or a vector over the C^φφ basis)."""
        total = 0.0
        for dkey, q in products.items():
            d = self.phi_hat[dkey]
            if matrix:
                total = total + np.einsum("kij,ij->k", d, q)
            else:
                total = total + np.sum(d * q)
        return total


def _estimators_for(labels, component, spectra_prefix="cmb", filters="inverse"):
    return [quadratic_estimator(label, component, spectra_prefix, filters) for label in labels]


def _joint_raw_estimators(component: str) -> list[QuadraticEstimator]:
    """The joint estimator ½ Σ_pq f^pq* X̄^p X̄^q (X̄ = C_tot⁻¹ X) as nine estimators on the raw field pairs (i, j):
    W^ij = Σ_pq f^pq* (C⁻¹)^pi_ℓ1 (C⁻¹)^qj_ℓ2 with symmetry factor 2 (the ½), so their sum is the joint ḡ."""
    parts = joint_estimator_parts(component)
    out = []
    for i in "TEB":
        for j in "TEB":
            terms = []
            for (p, q), part in parts.items():
                first = spectrum_name("joint", p, i)
                second = spectrum_name("joint", q, j)
                terms.extend(part.weight.times(first=(first,), second=(second,)).terms)
            out.append(QuadraticEstimator(f"{JOINT_LABEL}:{i}{j}", component, PairKernel((i, j), tuple(terms)), 2))
    return out


def _swap(estimator: QuadraticEstimator) -> QuadraticEstimator:
    return QuadraticEstimator(
        estimator.label + "~", estimator.component, estimator.weight.swapped(), estimator.symmetry
    )


def pair_n1(
    estimators,
    factors: FactorTable,
    phi,
    lmax: int,
    L_grid,
    grid_size: int = DEFAULT_GRID_SIZE,
    box: float = 4.0,
    phi_basis=None,
    nthreads=None,
    progress=None,
):
    """N1 covariance of any normalized quadratic estimators on a coarse L grid (flat sky).

    Parameters
    ----------
    estimators : sequence of QuadraticEstimator
        Estimators given by their separable weights (see :mod:`lensrec.estimator_weights`); their responses
        are computed on the same grid against the gradient response kernel with the factor table's ``"cmb"``
        spectra for the normalization.
    factors : FactorTable
        Must hold the weights' factors and the lensed leg spectra ``"leg:TT"``, ``"leg:EE"``, ``"leg:BB"``,
        ``"leg:TE"``.
    phi : array_like
        C_L^φφ from L = 0.
    lmax : int
        Highest CMB multipole of the weights.
    L_grid : array_like of int
        The L values (≥ 2) at which N1 is computed.
    grid_size : int
        Cells per side of the l grid (even; spacing 4(ℓ_max+1)/grid_size).
    phi_basis : array_like, shape (k, len(phi)), optional
        Fractional weights h_j(L'); with it the result also holds the N1 matrix M[j] = N1 for C^φφ h_j.
    nthreads : int, optional
    progress : callable, optional
        Called with (done, total) after each L.

    Returns
    -------
    dict with "n1" (n, n, nL) complex, "response" (n, nL) grid responses, "n0" (n, n, nL) grid N0 covariance,
    and "matrix" (n, n, nL, k) when ``phi_basis`` is given.
    """
    estimators = list(estimators)
    lmax = as_int(lmax, "lmax", minimum=2)
    grid_size = as_int(grid_size, "grid_size", minimum=16, maximum=4096)
    if grid_size % 2:
        raise ValueError(f"grid_size must be even, got {grid_size}")
    L_grid = np.asarray(L_grid)
    if L_grid.ndim != 1 or L_grid.size == 0 or np.any(L_grid < 2) or np.any(L_grid != np.round(L_grid)):
        raise ValueError(f"L_grid must be a 1-D array of integers >= 2, got {L_grid!r}")
    phi = as_finite_array(phi, "phi", ndim=1)
    nthreads = resolve_nthreads(nthreads)
    grid = _Grid(factors, lmax, grid_size, nthreads, box)
    basis = None if phi_basis is None else as_finite_array(phi_basis, "phi_basis", ndim=2)
    lensing_names = {("ladder(0)", "ladder(0)")}  # v(q) of two gradient legs, √(q(q+1)) each
    phi_hat = _phi_kernels(grid, phi, lensing_names, (-2, 0, 2))
    phi_hat_basis = None if basis is None else _phi_kernels(grid, phi, lensing_names, (-2, 0, 2), basis)
    n = len(estimators)
    n_L = L_grid.size
    measure = (grid.spacing**2 / (2.0 * math.pi) ** 2) ** 2
    n1 = np.zeros((n, n, n_L), dtype=np.complex128)
    n0 = np.zeros((n, n, n_L), dtype=np.complex128)
    response = np.zeros((n, n_L))
    matrix = None if basis is None else np.zeros((n, n, n_L, basis.shape[0]), dtype=np.complex128)
    swapped = [_swap(e) for e in estimators]
    fft_counts = []
    lock = threading.Lock()
    done = [0]

    def one_L(index: int) -> None:
        L = L_grid[index]
        at = _AtL(grid, int(L))
        weights = [at.kernel(e.weight, +1) for e in estimators]
        weights_swapped = [at.kernel(e.weight, +1) for e in swapped]
        for i, e in enumerate(estimators):
            f = at.kernel(response_kernel(e.fields, "gradient" if e.component == "gradient" else "curl"), -1)
            response[i, index] = (np.sum(weights[i] * f).real / e.symmetry) * grid.spacing**2 / (2 * math.pi) ** 2
        contraction = _Contraction(at, phi_hat, factors)
        for i, a in enumerate(estimators):
            for j in range(i, n):
                b = estimators[j]
                scale = 1.0 / (a.symmetry * b.symmetry)
                # Gaussian N0 on the grid (both Wick terms), for the accuracy check against the full sky
                n0[i, j, index] = (
                    scale
                    * grid.spacing**2
                    / (2 * math.pi) ** 2
                    * _grid_noise(at, weights[i], weights[j], weights_swapped[j], a.fields, b.fields)
                )
                value = 0.0
                value_m = 0.0
                for b_id, weight_b, fields_b in (
                    (j, weights[j], b.fields),
                    (("s", j), weights_swapped[j], swapped[j].fields),
                ):
                    products = contraction.contraction(i, weights[i], b_id, np.conj(weight_b), a.fields, fields_b)
                    value = value + contraction.evaluate(products)
                    if phi_hat_basis is not None:
                        saved = contraction.phi_hat
                        contraction.phi_hat = phi_hat_basis
                        value_m = value_m + contraction.evaluate(products, matrix=True)
                        contraction.phi_hat = saved
                n1[i, j, index] = scale * measure * value
                n1[j, i, index] = np.conj(n1[i, j, index])
                n0[j, i, index] = np.conj(n0[i, j, index])
                if matrix is not None:
                    matrix[i, j, index] = scale * measure * value_m
                    matrix[j, i, index] = np.conj(matrix[i, j, index])
        with lock:
            fft_counts.append(contraction.fft_count)
            done[0] += 1
            if progress is not None:
                progress(done[0], n_L)

    # the grid points are independent: numpy and the FFTs release the GIL
    run_parallel(one_L, range(n_L), nthreads)
    fft_count = sum(fft_counts)
    with np.errstate(divide="ignore", invalid="ignore"):
        norm = np.where(response > 0, 1.0 / response, np.nan)
    out = {
        "n1_raw": n1,
        "n0_raw": n0,
        "n1": n1 * norm[:, None, :] * norm[None, :, :],
        "n0": n0 * norm[:, None, :] * norm[None, :, :],
        "response": response,
        "grid_spacing": grid.spacing,
        "fft_count": fft_count,
    }
    if matrix is not None:
        out["matrix_raw"] = matrix
        out["matrix"] = matrix * (norm[:, None, :] * norm[None, :, :])[..., None]
    return out


def _grid_noise(at: _AtL, wa, wb, wb_swapped, fields_a, fields_b) -> complex:
    """Σ_l1 [W^α W^β* C^XZ C^YV + W^α W^β~* C^XV C^YZ] on the grid (Gaussian N0 before normalization)."""
    from .estimator_weights import spectrum_name

    x, y = fields_a
    z, v = fields_b
    c_xz = at.radial((spectrum_name("total", x, z),), 1)
    c_yv = at.radial((spectrum_name("total", y, v),), 2)
    c_xv = at.radial((spectrum_name("total", x, v),), 1)
    c_yz = at.radial((spectrum_name("total", y, z),), 2)
    return np.sum(wa * np.conj(wb) * c_xz * c_yv + wa * np.conj(wb_swapped) * c_xv * c_yz)


# ---------------------------------------------------------------------------------------- result
_frozen = readonly_copy


@dataclass(frozen=True, eq=False)
class AnalyticN1:
    """Analytic N1 of the quadratic estimators (read-only; flat-sky evaluation, see the module docstring).

    Attributes
    ----------
    L : ndarray
        0 … lmax_L.
    n1 : mapping label → component → ndarray
        N1_L in C_L^φφ units (C_L^ΩΩ units for the curl), interpolated from the coarse grid; NaN for L < 2.
    L_grid : ndarray
        The L values where N1 was computed.
    n1_grid : mapping label → component → ndarray
        N1 on ``L_grid``.
    n0_grid : mapping label → component → ndarray
        The flat-sky N0 on ``L_grid`` from the same grid (a measure of the flat-sky accuracy: compare with the
        exact N0 of :func:`lensrec.reconstruction_noise`).
    covariance : mapping component → ndarray, shape (n, n, len(L_grid))
        N1^αβ of the normalized pair estimators listed in ``covariance_labels``.
    covariance_labels : tuple of str
    matrix : mapping label → component → ndarray, shape (len(L_grid), len(L_grid)), or empty
        dN1_L/dC^φφ_L' on the grid: N1(L_i) = Σ_j M[i, j] C^φφ(L_j) for any C^φφ that is the fiducial times
        a function linear between grid points (only when ``matrix=True``).
    phi_spectrum : ndarray
        C_L^φφ used (L = 0 … lmax_L).
    settings : mapping
    """

    L: np.ndarray
    n1: Mapping
    L_grid: np.ndarray
    n1_grid: Mapping
    n0_grid: Mapping
    covariance: Mapping
    covariance_labels: tuple
    matrix: Mapping
    phi_spectrum: np.ndarray
    settings: Mapping

    def to_dict(self, include_matrix: bool = False) -> dict:
        """Plain lists and dicts for JSON (NaN stays NaN; ``lensrec.io.write_json`` turns it into null)."""
        document = {
            "L": self.L.tolist(),
            "n1": {label: {c: v.tolist() for c, v in parts.items()} for label, parts in self.n1.items()},
            "L_grid": self.L_grid.tolist(),
            "settings": dict(self.settings),
        }
        if include_matrix and self.matrix:
            document["matrix"] = {
                label: {c: v.tolist() for c, v in parts.items()} for label, parts in self.matrix.items()
            }
        return document


def _interpolate(L_grid: np.ndarray, values: np.ndarray, lmax_L: int) -> np.ndarray:
    """Monotone cubic interpolation of L²(L+1)² N1 in log L; NaN for L < 2 and outside the grid."""
    out = np.full(lmax_L + 1, np.nan)
    if L_grid.size == 1:
        out[L_grid[0]] = values[0]
        return out
    scale = (L_grid * (L_grid + 1.0)) ** 2
    interpolator = PchipInterpolator(np.log(L_grid), values * scale, extrapolate=False)
    ell = np.arange(L_grid[0], L_grid[-1] + 1)
    out[ell] = interpolator(np.log(ell)) / (ell * (ell + 1.0)) ** 2
    return out


def _hat_basis(L_grid: np.ndarray, size: int) -> np.ndarray:
    """Piecewise-linear hats on L_grid over L = 0 … size−1 (flat beyond the end points); they sum to one."""
    ell = np.arange(size, dtype=np.float64)
    basis = np.zeros((L_grid.size, size))
    for j in range(L_grid.size):
        values = np.zeros(L_grid.size)
        values[j] = 1.0
        basis[j] = np.interp(ell, L_grid.astype(float), values)
    return basis


def analytic_n1(
    experiment,
    spectra=None,
    estimators=ESTIMATORS,
    lmax_L=None,
    components=COMPONENTS,
    L_grid=None,
    weights=None,
    matrix: bool = False,
    grid_size: int = DEFAULT_GRID_SIZE,
    noise=None,
    nthreads=None,
    progress=None,
) -> AnalyticN1:
    """Analytic N1 bias of the quadratic lensing estimators, gradient and curl, including MV.

    Parameters
    ----------
    experiment : Experiment or str
        The survey (noise, beam, ℓ cuts), or the name/path of an experiment TOML file.
    spectra : Spectra, optional
        Theory spectra (default: the embedded fiducial cosmology).
    estimators : sequence of str or str
        Labels of :mod:`lensrec.labels` (default all). A combined estimator ("MV") combines every pair term
        N1^αβ with its per-L weights from the exact full-sky N0 covariance; the joint estimator ("GMV") is
        evaluated from its own separable weights on the raw field pairs (nine parts, all cross terms).
    lmax_L : int, optional
        Highest lensing multipole (default: the CMB ℓ_max).
    components : sequence of str
        "gradient" and/or "curl".
    L_grid : array_like of int, optional
        The coarse L grid (default :func:`default_n1_L_grid`, 24 log-spaced points from 2 to lmax_L).
    weights : {"lensed", "unlensed", "gradient"}, optional
        CMB spectra in the estimator weights (as in :func:`lensrec.reconstruction_noise`; default
        :data:`lensrec.gradient_spectra.DEFAULT_WEIGHTS`).
    matrix : bool
        Also return dN1_L/dC^φφ_L' on the grid (costs about one more pass per grid point).
    grid_size : int
        Cells per side of the flat-sky l grid (spacing 3(ℓ_max+1)/grid_size; default 128).
    noise : ReconstructionNoise, optional
        A result of :func:`lensrec.reconstruction_noise` for the same experiment, spectra and weights, reused
        for the MV weights (computed when absent and "MV" is requested).
    nthreads : int, optional
    progress : callable, optional
        Called as progress(done, total) after each grid point.

    Returns
    -------
    AnalyticN1

    References
    ----------
    Kesden, Cooray & Kamionkowski 2003, PRD 67, 123507 (N1); Hanson, Challinor, Efstathiou & Bielewicz 2011,
    PRD 83, 043005 (N1 for all estimator pairs, lensed spectra in the legs); Hu & Okamoto 2002, ApJ 574, 566
    (flat-sky weights).

    Examples
    --------
    >>> import lensrec
    >>> e = lensrec.Experiment(name="demo", noise_temperature=5.0, beam_fwhm=2.0,
    ...                        ell_max_temperature=1000, ell_max_polarization=1000)
    >>> n1 = lensrec.analytic_n1(e, estimators="TT", components="gradient", lmax_L=500, grid_size=64)
    >>> bool(n1.n1["TT"]["gradient"][100] > 0)
    True
    """
    experiment, spectra = as_experiment(experiment), as_spectra(spectra)
    labels = parse_estimators(estimators)
    components = parse_components(components)
    weights = parse_weights(DEFAULT_WEIGHTS if weights is None else weights)
    lmax = max(experiment.ell_max_temperature, experiment.ell_max_polarization)
    if spectra.lmax < lmax:
        raise ValueError(
            f"spectra reach only l = {spectra.lmax} but the experiment uses l up to {lmax}; "
            "lower the experiment's ell_max or pass spectra computed to higher l"
        )
    lmax_L = lmax if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=2, maximum=lmax)
    if L_grid is None:
        L_grid = default_n1_L_grid(lmax_L)
    else:
        L_grid = np.unique(np.asarray(L_grid))
        if (
            L_grid.ndim != 1
            or L_grid.size == 0
            or L_grid.dtype.kind not in "iu"
            or L_grid[0] < 2
            or L_grid[-1] > lmax_L
        ):
            raise ValueError(f"L_grid must be integers in [2, lmax_L={lmax_L}], got {L_grid!r}")
    grid_size = as_int(grid_size, "grid_size", minimum=16, maximum=4096)
    if noise is None:
        noise = reconstruction_noise(
            experiment,
            spectra,
            estimators=labels,
            lmax_L=lmax_L,
            weights=weights,
            nthreads=nthreads,
            components=components,
        )
    elif not isinstance(noise, ReconstructionNoise):
        raise TypeError(f"noise must be a ReconstructionNoise (or None), got {type(noise).__name__}")
    elif int(noise.L[-1]) < lmax_L or noise.experiment != experiment or not set(components) <= set(noise.covariance):
        raise ValueError(
            f"the given noise (lmax_L={int(noise.L[-1])}, experiment {noise.experiment.name!r}, components "
            f"{sorted(noise.covariance)}) does not cover lmax_L={lmax_L}, experiment {experiment.name!r} and "
            f"components {list(components)}; compute it for them or omit it"
        )
    wanted = set(labels).union(*(COMBINED_ESTIMATORS.get(label, ()) for label in labels))
    base = tuple(label for label in noise.covariance_labels if label in wanted)
    missing = [label for label in labels if label in ESTIMATOR_FIELDS and label not in base]
    if missing:
        raise ValueError(f"the given noise does not hold the estimators {missing}; compute it with them")
    position = [list(noise.covariance_labels).index(label) for label in base]
    factors = standard_factors(experiment, spectra, lmax, weights)
    for key in ("TT", "EE", "BB", "TE"):
        factors.add(f"{_LEG_PREFIX}:{key}", spectra.lensed[key][: lmax + 1])
    phi = np.asarray(spectra.phi, dtype=np.float64)
    basis = _hat_basis(L_grid, phi.size) if matrix else None
    n1, n1_grid, n0_grid, covariance, matrices = {}, {}, {}, {}, {}
    joint_count = sum(label in JOINT_ESTIMATORS for label in labels)
    total_steps = len(components) * L_grid.size * ((1 if base else 0) + joint_count)
    done = [0]

    def step(_done, _total):
        done[0] += 1
        if progress is not None:
            progress(done[0], total_steps)

    def n1_sums(estimators):
        return pair_n1(estimators, factors, phi, lmax, L_grid, grid_size, box=3.0, phi_basis=basis,
                       nthreads=nthreads, progress=step)  # fmt: skip

    joint = [label for label in labels if label in JOINT_ESTIMATORS]
    for component in components:
        per_label, per_label_n0, per_label_matrix = {}, {}, {}
        if base:
            result = n1_sums(_estimators_for(base, component))
            cov = result["n1"].real
            covariance[component] = _frozen(cov)
            for i, label in enumerate(base):
                per_label[label] = cov[i, i]
                per_label_n0[label] = result["n0"][i, i].real
                if matrix:
                    per_label_matrix[label] = result["matrix"][i, i].real
            n0_cov = np.asarray(noise.covariance[component])[np.ix_(position, position, L_grid)]
            for label in labels:
                if label not in COMBINED_ESTIMATORS:
                    continue
                index = [i for i, pair in enumerate(base) if pair in COMBINED_ESTIMATORS[label]]
                part = n0_cov[np.ix_(index, index)]
                _, w = minimum_variance(np.where(np.isnan(part), np.inf, part))
                w = np.nan_to_num(w)
                sub = np.ix_(index, index)
                per_label[label] = np.einsum("il,ijl,jl->l", w, cov[sub], w)
                per_label_n0[label] = np.einsum("il,ijl,jl->l", w, result["n0"].real[sub], w)
                if matrix:
                    per_label_matrix[label] = np.einsum("il,ijlk,jl->lk", w, result["matrix"].real[sub], w)
        for label in joint:
            parts = _joint_raw_estimators(component)
            result = n1_sums(parts)
            response = result["response"].sum(axis=0)
            with np.errstate(divide="ignore", invalid="ignore"):
                norm = np.where(response > 0, 1.0 / response, np.nan) ** 2
            per_label[label] = result["n1_raw"].real.sum(axis=(0, 1)) * norm
            per_label_n0[label] = result["n0_raw"].real.sum(axis=(0, 1)) * norm
            if matrix:
                per_label_matrix[label] = result["matrix_raw"].real.sum(axis=(0, 1)) * norm[:, None]
        for label in labels:
            n1.setdefault(label, {})[component] = _frozen(_interpolate(L_grid, per_label[label], lmax_L))
            n1_grid.setdefault(label, {})[component] = _frozen(per_label[label])
            n0_grid.setdefault(label, {})[component] = _frozen(per_label_n0[label])
            if matrix:
                matrices.setdefault(label, {})[component] = _frozen(per_label_matrix[label] / phi[L_grid][None, :])
    settings = {
        "lmax": lmax,
        "lmax_L": lmax_L,
        "weights": weights,
        "estimators": list(labels),
        "components": list(components),
        "grid_size": grid_size,
        "grid_spacing": 3.0 * (lmax + 1) / grid_size,
        "method": "flat-sky FFT convolution, lensed spectra in the legs",
    }

    def freeze(mapping):
        return MappingProxyType({label: MappingProxyType(parts) for label, parts in mapping.items()})

    return AnalyticN1(
        L=_frozen(np.arange(lmax_L + 1)),
        n1=freeze(n1),
        L_grid=_frozen(L_grid),
        n1_grid=freeze(n1_grid),
        n0_grid=freeze(n0_grid),
        covariance=MappingProxyType(covariance),
        covariance_labels=base,
        matrix=freeze(matrices),
        phi_spectrum=_frozen(phi[: lmax_L + 1]),
        settings=MappingProxyType(settings),
    )


def reconstruction_n1(reconstruction, spectra=None, points: int = 16, nthreads=None) -> AnalyticN1:
    """The analytic N1 of a :class:`lensrec.Reconstruction`'s estimator (both components), on a coarse grid.

    Uses the reconstruction's own normalization (its ``noise``: experiment, ℓ cuts, weights) and L range;
    ``points`` log-spaced grid points (interpolated between), grid size 96, which keeps it to seconds. This
    is the N1 that lensrec's recipes add to N0 in the φ Wiener filter.

    Raises
    ------
    TypeError
        If ``reconstruction`` is not a Reconstruction.
    """
    from .reconstruction import Reconstruction

    if not isinstance(reconstruction, Reconstruction):
        raise TypeError(f"reconstruction must be a lensrec Reconstruction, got {type(reconstruction).__name__}")
    noise = reconstruction.noise
    lmax_L = int(reconstruction.lmax_L)
    return analytic_n1(
        noise.experiment,
        spectra,
        estimators=[reconstruction.estimator],
        lmax_L=lmax_L,
        L_grid=default_n1_L_grid(lmax_L, points),
        weights=noise.settings.get("weights")
        or ("lensed" if noise.settings.get("lensed_weights", True) else "unlensed"),
        grid_size=96,
        noise=noise if int(noise.L[-1]) == lmax_L else None,
        nthreads=nthreads,
    )
