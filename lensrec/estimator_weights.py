r"""Full-sky quadratic-estimator weights as separable spin-weighted terms, and the sums they feed.

Definitions (shared with every other implementation in lensrec; a position-space implementation must
reproduce ``R_L`` below exactly)
===========================================================================================================
Fields X, Y, Z, V ∈ {T, E, B} have harmonic coefficients X_ℓm in healpy's convention, X_{ℓ,−m} = (−1)^m X*_ℓm,
with the spin-2 combinations ₊₂a_ℓm = −(E_ℓm + iB_ℓm), ₋₂a_ℓm = −(E_ℓm − iB_ℓm). The source ψ is either the
lensing potential φ (component "gradient") or the curl potential Ω (component "curl"); the spin-1
deflection is ₁d = −ð(φ + iΩ), so ₁d_LM = −√(L(L+1)) (φ_LM + iΩ_LM) (docs/conventions.md, "Signs"; the
sign of Ω is a convention no response or N0 depends on). N = √((2ℓ1+1)(2L+1)(2ℓ2+1)/4π), (ℓ1 L ℓ2; m1 m2 m3) a Wigner 3j symbol.

1. Response functions (Okamoto & Hu 2003, PRD 67, 083002 [OH03], §II and Table I). To first order in ψ,
   for (ℓ1, m1) ≠ (ℓ2, −m2)::

       ⟨X_ℓ1m1 Y_ℓ2m2⟩ = Σ_LM (−1)^M (ℓ1 ℓ2 L; m1 m2 −M) f^XY_{ℓ1 L ℓ2} ψ_LM .

   Lensing moves power from Z at ℓ2 into X at ℓ1,
   δX_ℓ1m1 = Σ (−1)^m1 (ℓ1 L ℓ2; −m1 M m2) K^XZ_{ℓ1 L ℓ2} ψ_LM Z_ℓ2m2, which gives::

       f^XY_{ℓ1 L ℓ2} = Σ_Z [ K^XZ_{ℓ1 L ℓ2} C^ZY_ℓ2 + (−1)^(ℓ1+L+ℓ2) K^YZ_{ℓ2 L ℓ1} C^ZX_ℓ1 ] ,

   with K^TT = ₀S, K^EE = K^BB = S⁺, K^EB = +i S⁻, K^BE = −i S⁻, K^TE = K^TB = K^ET = K^BT = 0,
   S^± = (₂S ± ₋₂S)/2 and, for a spin-s field (from δ(ₛX) = −½ (₋₁d ð + ₁d ð̄) ₛX)::

       ₛS_{ℓ1 L ℓ2} = −(−1)^s/2 · √(L(L+1)) · N · Σ_{σ=±1} κ_σ γ^σ_{ℓ2,s} (ℓ1 L ℓ2; s σ −s−σ) ,
       γ^σ_{ℓ,s} = √((ℓ − σs)(ℓ + σs + 1)),   κ_σ = 1 (gradient),   κ_σ = −iσ (curl).

   For the gradient ₛS equals OH03's ₛF_{ℓ1Lℓ2} = [L(L+1) + ℓ2(ℓ2+1) − ℓ1(ℓ1+1)] √(…/16π)(ℓ1 L ℓ2; s 0 −s)
   identically (a 3j recursion; verified numerically in the tests), so f^TT, f^TE, f^EE, f^TB and f^EB are
   OH03's Table I. The sign of the C^BB term of f^EB is the one derived here,
   f^EB = i [C^EE_ℓ1 S⁻_{ℓ2Lℓ1} + C^BB_ℓ2 S⁻_{ℓ1Lℓ2}]: it is fixed by the exact symmetry that a field with
   C^EE = C^BB and no EB has ⟨₂a ₂a⟩ = 0 before and after remapping (tested); printed tables with a minus
   sign there differ from it only through lensed or primordial C^BB in the weights. The derivation from the
   spin-2 remapping, and a simulation with C^BB = C^EE that confirms it, are in docs/conventions.md.

2. Estimator. With diagonal (per-field) inverse-variance filtering X̄_ℓm = X_ℓm / C^XX_tot,ℓ (C_tot = lensed
   CMB + beam-deconvolved noise, infinite outside the field's ℓ cuts so X̄ = 0 there)::

       ḡ^XY_LM = (1/η_XY) Σ_{ℓ1 m1 ℓ2 m2} (−1)^M (ℓ1 ℓ2 L; m1 m2 −M) [f^XY_{ℓ1 L ℓ2}]* X̄_ℓ1m1 Ȳ_ℓ2m2 ,

   η = 2 for TT and EE (each unordered pair counted twice), 1 otherwise (OH03 §III). Its response,
   ⟨ḡ_LM⟩ = R_L ψ_LM, follows from 3j orthogonality::

       R_L = 1/(η (2L+1)) · Σ_{ℓ1 ℓ2} [f^XY_{ℓ1Lℓ2}]* f^XY,source_{ℓ1Lℓ2} / (C^XX_tot,ℓ1 C^YY_tot,ℓ2) ,

   the normalization is A_L = 1/R_L and ψ̂_LM = A_L ḡ_LM. These are OH03's optimal weights for TT, EE, EB
   and TB (TB's exact optimum, because C^TB = 0); for TE they are not the optimum, whose weight mixes both
   orderings through C^TE.

3. Gaussian noise (disconnected four-point function, OH03 §III). For α = XY (weight W^α = f^α*/(C^XX C^YY))
   and β = ZV::

       ⟨ḡ^α_LM ḡ^β*_L'M'⟩ = δ_LL' δ_MM' N^αβ_L ,
       N^αβ_L = 1/(η_α η_β (2L+1)) Σ_{ℓ1ℓ2} [ W^α_{ℓ1Lℓ2} W^β*_{ℓ1Lℓ2} C^XZ_tot,ℓ1 C^YV_tot,ℓ2
                                           + (−1)^(ℓ1+L+ℓ2) W^α_{ℓ1Lℓ2} W^β*_{ℓ2Lℓ1} C^XV_tot,ℓ1 C^YZ_tot,ℓ2 ] ,
       N0^αβ_L = A^α_L A^β_L N^αβ_L .

   For TT, EE, TB and EB this gives N0 = A_L exactly; for TE the second (C^TE C^TE) term, of either sign, makes
   N0 differ from A_L (and N0 ≥ the N0 of OH03's optimal TE weight). Blocks between {TT, TE, EE}
   and {TB, EB} vanish (C^TB = C^EB = 0), so e.g. EE×EB is zero while TT×TE, TT×EE, TE×EE and TB×EB are not.

4. Exact evaluation. Every f, W above is a finite sum of separable terms
   c · u(ℓ1) v(L) w(ℓ2) · N · (ℓ1 L ℓ2; s1 sL s2), s1 + sL + s2 = 0 (:class:`SeparableTerm`). A double sum of
   two such terms is, by the identity of :mod:`lensrec.quadrature`,
   (1/(2L+1)) Σ_{ℓ1ℓ2} [term][term'] a(ℓ1) b(ℓ2)
   = c c' v v'(L)/(8π) ∫ ξ1(x) ξ2(x) d^L_{sL sL'}(x) dx, ξ1 = Σ_ℓ (2ℓ+1) u u' a d^ℓ_{s1 s1'}, ξ2 likewise,
   exact with Gauss–Legendre quadrature of npoints_for(ℓ1max, ℓ2max, Lmax) nodes: O(ℓ²) work.

   Accuracy: at L ≳ 30 the sums agree with direct 3j summation to ~1e-10. At L ≪ ℓ the direct and swapped
   halves of f (each O(Lℓ)) cancel to O(L²), so the O(ℓ²) term-pair integrals cancel by ~(ℓ/L)², which
   amplifies the ~1e-11 polar rounding of the Wigner-d recursions: measured relative errors of R_L for TT
   are 3e-7 at L = 2 for ℓ_max = 1000 and 1.4e-4 at L = 2, 6.5e-6 at L = 10 for ℓ_max = 3000 (≈ 6e-4/L²).

5. Position space (for a map-based implementation of the same ḡ). For any spin-weighted harmonics with
   ∫ ₛ₁Y ₛ₂Y ₛ₃Y = N (3j; m)(3j; −s) and ₛY*_ℓm = (−1)^(s+m) ₋ₛY_ℓ,−m,
   (−1)^M (ℓ1 ℓ2 L; m1 m2 −M) N (ℓ1 L ℓ2; s1 sL s2) = (−1)^sL ∫ dn ₋ₛL Y*_LM ₛ₁Y_ℓ1m1 ₛ₂Y_ℓ2m2, so each
   term t of f^XY contributes to ḡ^XY_LM::

       (1/η) c_t* v_t(L) (−1)^(sL) ∫ dn ₋ₛL Y*_LM(n) [Σ_ℓm u_t(ℓ) X̄_ℓm ₛ₁Y_ℓm(n)] [Σ_ℓm w_t(ℓ) Ȳ_ℓm ₛ₂Y_ℓm(n)] .

   (healpy/ducc0 spin transforms take G/C inputs with ₛf = −Σ (G + iC) ₛY and differ for odd s by signs
   recorded in :mod:`lensrec.quadrature`.)

Representation
==============
:class:`SeparableTerm` holds (c, (s1, sL, s2), first, lensing, second), where first/lensing/second are tuples
of names of ℓ-weights multiplied together, looked up in a :class:`FactorTable`. Named factors make identical
series recognizable across estimators, components and covariance terms, so each Wigner-d series is computed
once. Built-in names: ``"ladder(q)"`` = √((ℓ−q)(ℓ+q+1)) (0 where negative), plus any array the caller adds
(lensrec uses ``"cmb:TT"`` … for the spectra in the weights, ``"inverse:T"`` … for 1/C_tot and
``"total:TT"`` … for C_tot). A :class:`PairKernel` is a tuple of terms acting on the ordered field pair
(X at ℓ1, Y at ℓ2); :class:`KernelSums` evaluates many sums (1/(2L+1)) Σ P Q a b together.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from ._checks import as_finite_array, as_int, resolve_nthreads
from .labels import COMPONENTS, ESTIMATOR_FIELDS, PAIR_ESTIMATORS, parse_component, parse_estimator
from .quadrature import _canonical, _nodes_with_theta, _project_many, _series_many, npoints_for

__all__ = [
    "ESTIMATOR_FIELDS",
    "COMPONENTS",
    "SeparableTerm",
    "PairKernel",
    "FactorTable",
    "QuadraticEstimator",
    "spectrum_name",
    "lensing_operator",
    "response_kernel",
    "quadratic_estimator",
    "KernelSums",
]

_ORDER = {"T": 0, "E": 1, "B": 2}
_LADDER = re.compile(r"^ladder\(([+-]?\d+)\)$")
_ODD_CROSS = re.compile(r"^[^:]+:(TB|EB)$")


def spectrum_name(prefix: str, first: str, second: str) -> str:
    """Factor name of a cross-spectrum, field order normalized (``spectrum_name("cmb", "E", "T") == "cmb:TE"``)."""
    a, b = sorted((first, second), key=_ORDER.__getitem__)
    return f"{prefix}:{a}{b}"


# ------------------------------------------------------------------------------------------- terms
@dataclass(frozen=True)
class SeparableTerm:
    """One separable piece c · u(ℓ1) v(L) w(ℓ2) · N_{ℓ1Lℓ2} · (ℓ1 L ℓ2; s1 sL s2) of a kernel.

    Parameters
    ----------
    coefficient : complex
        The constant c.
    spins : (int, int, int)
        (s1, sL, s2) with s1 + sL + s2 = 0.
    first, lensing, second : tuple of str
        Names of the factors whose product is u(ℓ1), v(L), w(ℓ2) (empty tuple = 1).
    """

    coefficient: complex
    spins: tuple[int, int, int]
    first: tuple[str, ...] = ()
    lensing: tuple[str, ...] = ()
    second: tuple[str, ...] = ()

    def __post_init__(self):
        if len(self.spins) != 3 or sum(self.spins) != 0:
            raise ValueError(f"spins must be three integers summing to zero, got {self.spins}")

    def swapped(self) -> SeparableTerm:
        """The term of (−1)^(ℓ1+L+ℓ2) K_{ℓ2 L ℓ1}: ℓ1 and ℓ2 exchanged (3j column swap absorbs the sign)."""
        s1, s_l, s2 = self.spins
        return SeparableTerm(self.coefficient, (s2, s_l, s1), self.second, self.lensing, self.first)

    def conjugate(self) -> SeparableTerm:
        """Complex conjugate (the 3j symbols and factors are real)."""
        return SeparableTerm(complex(self.coefficient).conjugate(), self.spins, self.first, self.lensing, self.second)

    def times(self, factor: complex = 1.0, first=(), lensing=(), second=()) -> SeparableTerm:
        """This term times a constant and extra named factors."""
        return SeparableTerm(
            self.coefficient * factor,
            self.spins,
            self.first + tuple(first),
            self.lensing + tuple(lensing),
            self.second + tuple(second),
        )


@dataclass(frozen=True)
class PairKernel:
    """A function of (ℓ1, L, ℓ2) acting on the ordered field pair (X at ℓ1, Y at ℓ2), as separable terms."""

    fields: tuple[str, str]
    terms: tuple[SeparableTerm, ...]

    def __post_init__(self):
        if len(self.fields) != 2 or any(f not in _ORDER for f in self.fields):
            raise ValueError(f"fields must be a pair from 'T', 'E', 'B', got {self.fields!r}")
        object.__setattr__(self, "terms", tuple(self.terms))

    def swapped(self) -> PairKernel:
        """K'_{ℓ1Lℓ2} = (−1)^(ℓ1+L+ℓ2) K_{ℓ2Lℓ1}, acting on (Y, X)."""
        return PairKernel((self.fields[1], self.fields[0]), tuple(t.swapped() for t in self.terms))

    def conjugate(self) -> PairKernel:
        return PairKernel(self.fields, tuple(t.conjugate() for t in self.terms))

    def times(self, factor: complex = 1.0, first=(), lensing=(), second=()) -> PairKernel:
        return PairKernel(self.fields, tuple(t.times(factor, first, lensing, second) for t in self.terms))

    def __add__(self, other: PairKernel) -> PairKernel:
        if not isinstance(other, PairKernel) or other.fields != self.fields:
            raise ValueError(
                f"can only add kernels on the same field pair, got {self.fields} and {getattr(other, 'fields', other)}"
            )
        return PairKernel(self.fields, self.terms + other.terms)


# ---------------------------------------------------------------------------------------- factors
class FactorTable:
    """Named ℓ-weights (real 1-D arrays indexed from ℓ = 0) referred to by :class:`SeparableTerm`.

    ``"ladder(q)"`` = √((ℓ−q)(ℓ+q+1)) (zero where the product is ≤ 0) is built in for any integer q; other
    names are added with :meth:`add`. Entries beyond an array's length count as zero. A name that was never
    added is an error, except parity-odd cross-spectra ``"<prefix>:TB"`` and ``"<prefix>:EB"``, which are
    zero unless given (lensrec's spectra have C^TB = C^EB = 0).
    """

    def __init__(self, arrays: Mapping | None = None):
        self._arrays: dict[str, np.ndarray] = {}
        for name, array in (arrays or {}).items():
            self.add(name, array)

    def add(self, name: str, array) -> None:
        """Add (or replace) the factor ``name``."""
        if not isinstance(name, str) or not name:
            raise TypeError(f"factor names must be non-empty strings, got {name!r}")
        if _LADDER.match(name):
            raise ValueError(f"{name!r} is a built-in factor and cannot be replaced")
        values = as_finite_array(array, f"factor {name!r}", ndim=1).copy()
        values.setflags(write=False)
        self._arrays[name] = values

    def names(self) -> list[str]:
        return sorted(self._arrays)

    def __contains__(self, name) -> bool:
        return isinstance(name, str) and (bool(_LADDER.match(name)) or name in self._arrays)

    def _lookup(self, name: str):
        if name in self._arrays:
            return self._arrays[name]
        if _ODD_CROSS.match(name):
            return None
        raise KeyError(f"unknown factor {name!r}; known: {self.names()} and 'ladder(q)'")

    def values(self, name: str, lmax: int) -> np.ndarray:
        """The factor ``name`` on ℓ = 0 … lmax (zero-padded)."""
        match = _LADDER.match(name)
        if match:
            q = int(match.group(1))
            ell = np.arange(lmax + 1, dtype=np.float64)
            return np.sqrt(np.clip((ell - q) * (ell + q + 1.0), 0.0, None))
        array = self._lookup(name)
        out = np.zeros(lmax + 1)
        if array is not None:
            n = min(lmax + 1, array.size)
            out[:n] = array[:n]
        return out

    def is_zero(self, name: str) -> bool:
        """True if the factor is identically zero (including an absent TB or EB cross-spectrum)."""
        if _LADDER.match(name):
            return False
        array = self._lookup(name)
        return array is None or not np.any(array)

    def product(self, names, lmax: int) -> np.ndarray:
        """Π of the named factors on ℓ = 0 … lmax."""
        out = np.ones(lmax + 1)
        for name in names:
            out *= self.values(name, lmax)
        return out


# --------------------------------------------------------------------------------- lensing kernels
def _spin_kernel(spin: int, component: str, weight: complex) -> list[SeparableTerm]:
    """``weight`` · ₛS_{ℓ1Lℓ2} (module docstring, item 1) as two separable terms (σ = ±1)."""
    terms = []
    for sigma in (1, -1):
        kappa = 1.0 if component == "gradient" else -1j * sigma
        coefficient = weight * kappa * (-((-1) ** spin) / 2.0)
        terms.append(
            SeparableTerm(
                complex(coefficient), (spin, sigma, -spin - sigma), (), ("ladder(0)",), (f"ladder({sigma * spin})",)
            )
        )
    return terms


def lensing_operator(lensed: str, unlensed: str, component: str = "gradient") -> tuple[SeparableTerm, ...]:
    """K^XZ_{ℓ1Lℓ2}: how the unlensed field Z at ℓ2 feeds the lensed field X at ℓ1 (first order in ψ).

    Parameters
    ----------
    lensed, unlensed : {'T', 'E', 'B'}
    component : {'gradient', 'curl'}

    Returns
    -------
    tuple of SeparableTerm (empty when lensing does not couple the two fields, e.g. T and E).
    """
    _check_component(component)
    pair = lensed + unlensed
    if pair == "TT":
        return tuple(_spin_kernel(0, component, 1.0))
    if lensed in "EB" and unlensed in "EB":
        # S± = (₂S ± ₋₂S)/2; K^EE = K^BB = S⁺, K^EB = iS⁻, K^BE = −iS⁻
        sign, factor = {"EE": (1, 1.0), "BB": (1, 1.0), "EB": (-1, 1j), "BE": (-1, -1j)}[pair]
        return tuple(_spin_kernel(2, component, 0.5 * factor) + _spin_kernel(-2, component, 0.5 * sign * factor))
    return ()


def response_kernel(fields, component: str = "gradient", spectra: str = "cmb") -> PairKernel:
    """The first-order response f^XY_{ℓ1Lℓ2} to the gradient (φ) or curl (Ω) source.

    Parameters
    ----------
    fields : str or pair of str
        "TT", "TE", "EE", "TB", "EB" (or any ordered pair of 'T', 'E', 'B').
    component : {'gradient', 'curl'}
    spectra : str
        Prefix of the CMB spectra factors used (``"cmb:TT"``, ``"cmb:TE"``, … in the :class:`FactorTable`).

    Returns
    -------
    PairKernel

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002, §II and Table I (gradient); the curl piece follows from the same
    derivation with the rotational deflection (Namikawa, Yamauchi & Taruya 2012, JCAP 01, 007).
    """
    x, y = _pair(fields)
    _check_component(component)
    terms = []
    for z in "TEB":
        for term in lensing_operator(x, z, component):
            terms.append(term.times(second=(spectrum_name(spectra, z, y),)))
        for term in lensing_operator(y, z, component):
            terms.append(term.times(second=(spectrum_name(spectra, z, x),)).swapped())
    return PairKernel((x, y), tuple(terms))


@dataclass(frozen=True)
class QuadraticEstimator:
    """An unnormalized estimator ḡ = (1/η) Σ (−1)^M (3j) W X Y with weight kernel W on the pair (X, Y).

    Attributes
    ----------
    label : str
        A name for tables ("TT", …).
    component : str
        The source its weights are matched to ("gradient" or "curl").
    weight : PairKernel
        W_{ℓ1Lℓ2}, including the filters (for lensrec's estimators W = f* / (C^XX_tot C^YY_tot)).
    symmetry : int
        η: 2 when X = Y and both orderings are summed, else 1.
    """

    label: str
    component: str
    weight: PairKernel
    symmetry: int = 1

    @property
    def fields(self) -> tuple[str, str]:
        return self.weight.fields


def quadratic_estimator(
    label: str, component: str = "gradient", spectra: str = "cmb", filters: str = "inverse"
) -> QuadraticEstimator:
    """lensrec's estimator for a pair: weight [f^XY]* × filter(X)(ℓ1) × filter(Y)(ℓ2).

    Parameters
    ----------
    label : {'TT', 'TE', 'EE', 'TB', 'EB'}
    component : {'gradient', 'curl'}
    spectra : str
        Prefix of the CMB spectra in the weights (see :func:`response_kernel`).
    filters : str
        Prefix of the per-field filters, ``"inverse:T"`` … = 1/C_tot (0 outside the ℓ cuts).
    """
    label = parse_estimator(label, allowed=PAIR_ESTIMATORS)
    x, y = ESTIMATOR_FIELDS[label]
    weight = (
        response_kernel((x, y), component, spectra)
        .conjugate()
        .times(first=(f"{filters}:{x}",), second=(f"{filters}:{y}",))
    )
    return QuadraticEstimator(label, component, weight, 2 if x == y else 1)


def _pair(fields) -> tuple[str, str]:
    if isinstance(fields, str):
        fields = tuple(fields)
    fields = tuple(fields)
    if len(fields) != 2 or any(f not in _ORDER for f in fields):
        raise ValueError(f"fields must name two of 'T', 'E', 'B' (e.g. 'TE'), got {fields!r}")
    return fields


def _check_component(component) -> None:
    parse_component(component)


# ------------------------------------------------------------------------------------- the sums
@dataclass
class _Sum:
    left: PairKernel
    right: PairKernel
    first: tuple[str, ...]
    second: tuple[str, ...]
    scale: complex


@dataclass
class KernelSums:
    """Evaluate many S_L = scale/(2L+1) Σ_{ℓ1ℓ2} P_{ℓ1Lℓ2} Q_{ℓ1Lℓ2} a(ℓ1) b(ℓ2) together, exactly.

    Register sums with :meth:`add` (it returns an index), then call :meth:`evaluate` once: every distinct
    Wigner-d series (same factor names and spins) is computed once for all sums, series are batched into
    ducc0 calls, and each sum costs one projection per distinct L-spin pair (module docstring, item 4).

    Parameters
    ----------
    factors : FactorTable
    lmax_first, lmax_second : int
        Highest ℓ1 and ℓ2 in the sums.
    lmax_L : int
        Highest L returned.
    nthreads : int, optional
    """

    factors: FactorTable
    lmax_first: int
    lmax_second: int
    lmax_L: int
    nthreads: int | None = None
    _sums: list = field(default_factory=list, init=False, repr=False)

    def __post_init__(self):
        self.lmax_first = as_int(self.lmax_first, "lmax_first", minimum=0)
        self.lmax_second = as_int(self.lmax_second, "lmax_second", minimum=0)
        self.lmax_L = as_int(self.lmax_L, "lmax_L", minimum=0)
        self.nthreads = resolve_nthreads(self.nthreads)

    def add(self, left: PairKernel, right: PairKernel, first=(), second=(), scale: complex = 1.0) -> int:
        """Register scale/(2L+1) Σ left·right·Π first(ℓ1)·Π second(ℓ2); returns its index."""
        for kernel in (left, right):
            for term in kernel.terms:
                for name in term.first + term.lensing + term.second:
                    self.factors.is_zero(name)  # raises KeyError for an unknown name
        for name in tuple(first) + tuple(second):
            self.factors.is_zero(name)
        self._sums.append(_Sum(left, right, tuple(first), tuple(second), complex(scale)))
        return len(self._sums) - 1

    def evaluate(self) -> list[np.ndarray]:
        """Complex arrays S_L, L = 0 … lmax_L, in the order the sums were added."""
        npoints = npoints_for(self.lmax_first, self.lmax_second, self.lmax_L)
        _, weights, theta = _nodes_with_theta(npoints)
        series_keys: dict = {}
        plans = []
        for item in self._sums:
            plan: dict = {}
            for t in item.left.terms:
                for u in item.right.terms:
                    c = t.coefficient * u.coefficient * item.scale
                    if c == 0:
                        continue
                    names1 = tuple(sorted(t.first + u.first + item.first))
                    names2 = tuple(sorted(t.second + u.second + item.second))
                    names_l = tuple(sorted(t.lensing + u.lensing))
                    if any(self.factors.is_zero(n) for n in names1 + names2 + names_l):
                        continue
                    a1, b1, sign1 = _canonical(t.spins[0], u.spins[0])
                    a2, b2, sign2 = _canonical(t.spins[2], u.spins[2])
                    a_l, b_l, sign_l = _canonical(t.spins[1], u.spins[1])
                    key1 = (names1, a1, b1, self.lmax_first)
                    key2 = (names2, a2, b2, self.lmax_second)
                    i1 = series_keys.setdefault(key1, len(series_keys))
                    i2 = series_keys.setdefault(key2, len(series_keys))
                    if i1 > i2:
                        i1, i2 = i2, i1
                    products = plan.setdefault((names_l, a_l, b_l), {})
                    products[(i1, i2)] = products.get((i1, i2), 0.0) + c * sign1 * sign2 * sign_l
            plans.append(plan)
        requests = []
        for names, a, b, lmax in series_keys:
            ell = np.arange(lmax + 1, dtype=np.float64)
            requests.append(((2.0 * ell + 1.0) * self.factors.product(names, lmax), a, b))
        series = _series_many(requests, theta, self.nthreads)
        # grids: Σ c ξ1 ξ2 for each (sum, L-spin pair), real and imaginary parts separately
        projections = []
        owners = []
        for index, plan in enumerate(plans):
            for (names_l, a_l, b_l), products in plan.items():
                real = np.zeros(theta.size)
                imag = np.zeros(theta.size)
                for (i1, i2), c in products.items():
                    product = series[i1] * series[i2]
                    if c.real:
                        real += c.real * product
                    if c.imag:
                        imag += c.imag * product
                for part, grid in ((1.0, real), (1j, imag)):
                    if np.any(grid):
                        projections.append((grid, a_l, b_l, self.lmax_L))
                        owners.append((index, names_l, part))
        projected = _project_many(projections, theta, weights, self.nthreads)
        results = [np.zeros(self.lmax_L + 1, dtype=np.complex128) for _ in self._sums]
        for (index, names_l, part), values in zip(owners, projected, strict=True):
            results[index] += part * values * self.factors.product(names_l, self.lmax_L) / (8.0 * math.pi)
        self.last_counts = {"series": len(series_keys), "projections": len(projections), "npoints": npoints}
        return results
