# Over 600 lines: one algorithm (plan, legs, ring blocks, products) sharing one workspace and derivation.
r"""Position-space engine of the quadratic estimators: unnormalized ḡ_LM from pairs of filtered fields.

The estimators are those of :mod:`lensrec.estimator_weights` (TT, TE, EE, TB, EB; weights [f^XY]* of
Okamoto & Hu 2003, PRD 67, 083002), evaluated in position space as products of filtered maps and
normalized with the exact full-sky responses of :mod:`lensrec.estimator_noise`.

Position-space form
===================
By item 5 of the :mod:`lensrec.estimator_weights` docstring, each separable term t of the weight
(coefficient c_t, spins (s1, sL, s2), ℓ-weights u_t(ℓ1), v(L) = √(L(L+1)), w_t(ℓ2)) contributes::

    ḡ_LM ⊃ (1/η) c_t v(L) (−1)^sL ∫ dn ₋ₛL Y*_LM(n) A_t(n) B_t(n),
    A_t = Σ_ℓm u_t(ℓ) X̄^a_ℓm ₛ₁Y_ℓm ,   B_t = Σ_ℓm w_t(ℓ) Ȳ^b_ℓm ₛ₂Y_ℓm ,

where X̄^a is the filtered field X of the *first* input and Ȳ^b the filtered Y of the *second* input. All
lensing kernels have sL = ±1 and v(L) = √(L(L+1)). Three facts make this cheap:

1. A leg Σ u(ℓ) X̄_ℓm ₛY_ℓm of a real field with a real ℓ-weight is one spin-|s| synthesis (gradient
   coefficients −u X̄, no curl, in healpy/ducc0's convention ₛf = −Σ (G + iC) ₛY), and its spin −s
   partner is free: Σ u X̄ ₋ₛY = (−1)^s conj(Σ u X̄ ₛY) (from ₛY*_ℓm = (−1)^(s+m) ₋ₛY_ℓ,−m and
   X̄_ℓ,−m = (−1)^m X̄*_ℓm).
2. With F₊₁ = Σ_{sL=−1} c_t A_t B_t and F₋₁ = Σ_{sL=+1} c_t A_t B_t, the relation
   ∫ ₋₁Y*_LM F = −(−1)^M conj(∫ ₁Y*_L,−M conj F) and the reality of ḡ (ḡ_L,−M = (−1)^M ḡ*_LM, which
   f* = (−1)^(ℓ1+L+ℓ2) f guarantees for any two real inputs) give::

       ḡ^grad_LM = √(L(L+1))/η · G_LM[H],    H = F₊₁ − conj(F₋₁),

   where G, C are the gradient and curl coefficients of the spin-1 field H = −Σ (G + iC) ₁Y: one spin-1
   analysis per estimator. conj(F₋₁) is again a sum of products of legs (at negated spins).
3. The curl weights are the gradient ones times iσ (κ_σ = −iσ in the kernel), so H^curl = −i H^grad
   and ḡ^curl_LM = √(L(L+1))/η · C_LM[H^grad]: the same analysis gives both components (checked when
   the plan is built).

The products are evaluated on a Gauss–Legendre grid with ⌊(2ℓ_max + L_max)/2⌋ + 1 rings and
≥ 2ℓ_max + L_max + 1 pixels per ring (:func:`lensrec.harmonics.gl_grid_for_band_limits`): H is
band-limited at 2ℓ_max, so the analysis to L_max is exact quadrature (no aliasing). The grid is processed
in blocks of ring pairs (north and south together) to bound memory (``workspace_mb``); within a block, the
legs of one spin are one batched ducc0 synthesis and the estimators' H fields one batched spin-1 analysis
(each ducc0 call sets up its Legendre recursions once, ~0.1 s at ℓ_max = 3000, so blocks should be few).

Transform counts (full-sky equivalents, ``Reconstruction.settings["transforms"]``) for one input (a = b):
TT 2 syntheses (spin 0 T̄, spin 1 √(ℓ(ℓ+1)) C^TT T̄) + 1 spin-1 analysis; EE 3 + 1 (Ē at spin 2, C^EE Ē
at spins 1 and 3); TB 3 + 1; TE 5 + 1; EB 6 + 1 (3 + 1 when C^BB = 0 in the weights); MV 11 + 5, every
leg shared between the estimators that use it. Each distinct (field, ℓ-weight, |spin|) needs its own
synthesis and each estimator its own analysis (its normalization and MV weight depend on L), so these are
the minimum for this form. Two different inputs need both sides' legs (e.g. MV: 16 syntheses + 5).

Leg order of ḡ[a, b]: the first field of the label comes from the first input, the second from the
second input: TE[a, b] uses T̄ of a and Ē of b; TB[a, b] T̄ of a and B̄ of b; EB[a, b] Ē of a and B̄ of b;
TT and EE are symmetric, ḡ[a, b] = ḡ[b, a]. Mixed pairs (data × simulation, simulation i × j) are what
realization-dependent N0 and N1 need (Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609).

Joint
=====
The joint estimator "GMV" (Maniyar, Ali-Haïmoud, Carron, Lewis & Madhavacheril 2021, PRD 103, 083524;
weights in :func:`lensrec.estimator_noise.joint_estimator_parts`) is ½ Σ_pq ḡ^pq over the nine ordered pairs
of *jointly* filtered fields (X̄ = C_tot⁻¹ X). Summed over all pairs, the swapped half of f^qp repeats the
direct half of f^pq with the inputs exchanged, so H = ½ [D(a, b) + D(b, a)] with
D(x, y) = Σ_{p,z} X̄^p_x · (ladder-weighted W^z_y at the partner spin), W^z = Σ_q C^zq X̄^q the Wiener-filtered
field z. Regrouping these products (one combined leg per block of proportional rows) leaves five legs for
one input: T̄ (spin 0), P̄ = Ē + iB̄ (spin 2), and √(ℓ(ℓ+1)) W^T (spin 1), and W^E + iW^B at spins 1 and 3
with the spin-2 ladder weights: 5 syntheses + 1 spin-1 analysis (10 + 1 for a mixed pair), against 11 + 5
for MV. It is checked against brute-force 3j sums of its definition in tests/test_joint_estimator.py.

The normalized public API (:func:`lensrec.reconstruct`, :func:`lensrec.reconstruct_filtered`) is in
:mod:`lensrec.reconstruction`.
"""

from __future__ import annotations

import concurrent.futures
import difflib
import functools
import time
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from ._checks import as_float, as_int, readonly_copy, resolve_nthreads
from ._deprecation import renamed_arguments
from .estimator_noise import JOINT_ESTIMATOR
from .estimator_weights import (
    ESTIMATOR_FIELDS,
    FactorTable,
    lensing_operator,
    quadratic_estimator,
    spectrum_name,
)
from .filtering import FilteredFields
from .gradient_spectra import resolve_weights, weight_spectra
from .harmonics import ell_of_alm, gl_grid_for_band_limits, nalm
from .labels import ESTIMATORS, PAIR_ESTIMATORS
from .spectra import Spectra, fiducial_spectra

__all__ = ["QuadraticEstimates", "quadratic_estimates"]

BASE_ESTIMATORS = PAIR_ESTIMATORS
# labels quadratic_estimates computes directly (MV is a weighted sum of the five pair estimates)
_POSITION_LABELS = BASE_ESTIMATORS + (JOINT_ESTIMATOR,)
_FIELD_INDEX = {"T": 0, "E": 1, "B": 2}
# Work space for one block of rings (legs and products); bounds the peak memory at any size.
_WORKSPACE_BYTES = 1024 * 2**20
# Points per product block: a few arrays of this many complex values stay in cache.
_PRODUCT_BLOCK = 1 << 15
# ducc0 0.42 measured: the "STANDARD" spin-1 and spin-2 syntheses (with a zero curl) are faster than
# "GRAD_ONLY"; for spin 3 the reverse holds. Only speed depends on this choice.
_SYNTHESIS_MODE = {1: "STANDARD", 2: "STANDARD", 3: "GRAD_ONLY"}


# ------------------------------------------------------------------------------------------- labels
def _check_label(estimator, allowed=ESTIMATORS) -> str:
    if not isinstance(estimator, str):
        raise TypeError(f"estimator must be a string from {allowed}, got {estimator!r}")
    if estimator not in allowed:
        close = difflib.get_close_matches(estimator.upper(), allowed, n=1, cutoff=0.4)
        hint = f"; did you mean {close[0]!r}?" if close else "."
        raise ValueError(f"unknown estimator {estimator!r}{hint} Allowed: {', '.join(allowed)}")
    return estimator


def _check_labels(estimators) -> tuple[str, ...]:
    if isinstance(estimators, str):
        estimators = [part.strip() for part in estimators.split(",")]
    labels = tuple(_check_label(label, _POSITION_LABELS) for label in estimators)
    if not labels or len(set(labels)) != len(labels):
        raise ValueError(f"estimators must be distinct labels from {_POSITION_LABELS}, got {estimators!r}")
    return labels


# --------------------------------------------------------------------------------------------- plan
def _strip_filters(names) -> tuple[str, ...]:
    """ℓ-weights of a leg without the filters (the filtered fields already hold them)."""
    return tuple(sorted(name for name in names if not name.startswith("inverse:")))


def _products(label: str, component: str, factors: FactorTable, shared: bool) -> dict:
    """{((leg, spin), (leg, spin)): coefficient} of H = F₊₁ − conj(F₋₁) for one estimator and component.

    A leg is (side, field, ℓ-weight names, |spin|); side 0 is the first input, 1 the second (0 for both
    when they are the same fields, and then the unordered pair is the key).
    """
    estimator = quadratic_estimator(label, component)
    x, y = estimator.fields
    out: dict = {}
    for term in estimator.weight.terms:
        names = [n for n in term.first + term.lensing + term.second if not n.startswith("inverse:")]
        if any(factors.is_zero(name) for name in names):
            continue
        if term.lensing != ("ladder(0)",):
            raise RuntimeError(f"internal error: unexpected lensing factor {term.lensing} in {label}")
        s1, s_l, s2 = term.spins
        if s_l == -1:
            coefficient, spin_a, spin_b = complex(term.coefficient), s1, s2
        elif s_l == 1:  # −conj(c A B) = conj(c)·(−1)^(s1+s2+1)·A_{−s1} B_{−s2}, with s1 + s2 = −1
            coefficient, spin_a, spin_b = complex(term.coefficient).conjugate(), -s1, -s2
        else:
            raise RuntimeError(f"internal error: lensing spin {s_l} in {label}")
        leg_a = ((0, x, _strip_filters(term.first), abs(spin_a)), spin_a)
        leg_b = ((0 if shared else 1, y, _strip_filters(term.second), abs(spin_b)), spin_b)
        key = (leg_a, leg_b) if not shared or leg_a <= leg_b else (leg_b, leg_a)
        out[key] = out.get(key, 0.0) + coefficient
    return {key: value for key, value in out.items() if abs(value) > 1e-15}


def _joint_products(component: str, factors: FactorTable, shared: bool) -> dict:
    """{((leg, spin), (leg, spin)): coefficient} of H for the joint estimator (module docstring, "Joint").

    ḡ^GMV = ½ Σ_pq ḡ^pq over the nine ordered pairs of jointly filtered fields. The swapped half of f^qp
    gives the same products as the direct half of f^pq with the inputs exchanged, so
    H = ½ [D(a, b) + D(b, a)] (η = 1), D(x, y) = Σ_{p,z,q} [direct terms of f^pq]*: X̄^p of x unweighted times
    the ladder-weighted C^zq X̄^q of y. For one input that is D(a, a). Legs are (side, field, names, |spin|).
    """
    sides = ((0, 0),) if shared else ((0, 1), (1, 0))
    scale = 1.0 if shared else 0.5
    out: dict = {}
    for side_a, side_b in sides:
        for p in "TEB":
            for z in "TEB":
                terms = lensing_operator(p, z, component)
                for q in "TEB":
                    name = spectrum_name("cmb", z, q)
                    if not terms or factors.is_zero(name):
                        continue
                    for term in terms:
                        term = term.conjugate()
                        s1, s_l, s2 = term.spins
                        if term.first or term.lensing != ("ladder(0)",):
                            raise RuntimeError(f"internal error: unexpected factors in the kernel of {p}{z}")
                        if s_l == -1:
                            coefficient, spin_a, spin_b = complex(term.coefficient), s1, s2
                        else:  # −conj(c A B) = conj(c)·A_{−s1} B_{−s2} (see _products)
                            coefficient, spin_a, spin_b = complex(term.coefficient).conjugate(), -s1, -s2
                        leg_a = ((side_a, p, (), abs(spin_a)), spin_a)
                        leg_b = ((side_b, q, tuple(sorted(term.second + (name,))), abs(spin_b)), spin_b)
                        out[leg_a, leg_b] = out.get((leg_a, leg_b), 0.0) + scale * coefficient
    return {key: value for key, value in out.items() if abs(value) > 1e-15}


def _symmetrized(products: dict) -> dict:
    """½ (H[a, b] + H[b, a]): the products with the two inputs exchanged (side 0 ↔ 1) averaged in."""

    def swap(item):
        (side, name, weights, spin), signed = item
        return ((1 - side, name, weights, spin), signed)

    out: dict = {}
    for (a, b), value in products.items():
        for key in ((a, b), (swap(a), swap(b))):
            out[key] = out.get(key, 0.0) + 0.5 * value
    return {key: value for key, value in out.items() if abs(value) > 1e-15}


def _plan(labels, factors: FactorTable, shared: bool, symmetrize: bool = False) -> dict:
    """Per estimator: its products (gradient form) and η; checks H^curl = −i H^grad term by term.

    With ``symmetrize`` (two inputs), the products of ½ (ḡ[a, b] + ḡ[b, a]) in one plan: the legs of each
    input are synthesized once and the two orderings share one spin-1 analysis.
    """
    plan = {}
    for label in labels:
        build = _joint_products if label == JOINT_ESTIMATOR else functools.partial(_products, label)
        if symmetrize and not shared and label != JOINT_ESTIMATOR:  # the joint plan is symmetric already
            build = functools.partial(lambda inner, *args: _symmetrized(inner(*args)), build)
        gradient = build("gradient", factors, shared)
        curl = build("curl", factors, shared)
        if set(gradient) != set(curl) or any(
            abs(curl[k] + 1j * gradient[k]) > 1e-12 * abs(gradient[k]) for k in gradient
        ):
            raise RuntimeError(f"internal error: the curl weights of {label} are not i·sigma times the gradient ones")
        if label == JOINT_ESTIMATOR:
            plan[label] = (gradient, 1)
        else:
            x, y = ESTIMATOR_FIELDS[label]
            plan[label] = (gradient, 2 if x == y else 1)
    return plan


def _key_number(value: complex) -> complex:
    """A coefficient rounded for use in dictionary keys (the plan's coefficients are exact small numbers)."""
    return complex(round(value.real, 13) + 0.0, round(value.imag, 13) + 0.0)


def _normalized(combination: dict) -> tuple[tuple, complex]:
    """(key, scale) with combination = scale · key; the key's first coefficient is one."""
    items = sorted(combination.items())
    scale = items[0][1]
    return tuple((leg, _key_number(value / scale)) for leg, value in items), scale


def _combined_plan(plan: dict, merge: set) -> tuple[list, list]:
    """Synthesis legs and per-estimator products, merging legs into linear combinations where possible.

    A leg of the engine is (|spin|, ((base leg, weight), …)): one spin-|s| synthesis of Σ weight·base, with
    base = (side, field, ℓ-weight names) and complex weights (real part → gradient, imaginary → curl
    coefficients). For estimators in ``merge`` the products H = Σ c A B are regrouped: per (A kind, B kind)
    block (side, |spin|, conjugation of each leg), rows A_i with proportional B combinations share one
    combined A leg, and each distinct B combination is one combined B leg. That turns the joint estimator's
    per-field legs into T̄, P̄ = Ē + iB̄ and the ladder-weighted Wiener-filtered T and P (5 syntheses for one
    input). Other estimators keep one base leg per synthesis.

    Returns (legs sorted by spin, products: per estimator a list of (leg a, conj a, leg b, conj b, c)).
    """
    legs: dict = {}
    per_label = []

    def leg_index(spin, combination: dict, conj: bool) -> tuple[int, complex]:
        # Σ w_i conj(L_i) = conj(Σ conj(w_i) L_i): synthesize the conjugated weights, conjugate the scale back
        synth = {leg: (np.conj(value) if conj else value) for leg, value in combination.items()}
        key, scale = _normalized(synth)
        index = legs.setdefault((spin, key), len(legs))
        return index, (np.conj(scale) if conj else scale)

    for label, (products, _eta) in plan.items():
        items = []
        # a leg at spin −s is (−1)^s conj(leg at +s)
        signed = []
        for ((leg_a, spin_a), (leg_b, spin_b)), coefficient in products.items():
            conj_a, conj_b = spin_a < 0, spin_b < 0
            sign = (-1) ** (abs(spin_a) * conj_a + abs(spin_b) * conj_b)
            signed.append((leg_a, conj_a, leg_b, conj_b, complex(sign * coefficient)))
        if label not in merge:
            for leg_a, conj_a, leg_b, conj_b, coefficient in signed:
                ia, sa = leg_index(leg_a[3], {leg_a[:3]: 1.0}, conj_a)
                ib, sb = leg_index(leg_b[3], {leg_b[:3]: 1.0}, conj_b)
                items.append((ia, conj_a, ib, conj_b, coefficient * sa * sb))
            per_label.append(items)
            continue
        blocks: dict = {}
        for leg_a, conj_a, leg_b, conj_b, coefficient in signed:
            kind = (leg_a[0], leg_a[3], conj_a, leg_b[0], leg_b[3], conj_b)
            row = blocks.setdefault(kind, {}).setdefault(leg_a[:3], {})
            row[leg_b[:3]] = row.get(leg_b[:3], 0.0) + coefficient
        for (_sa, spin_a, conj_a, _sb, spin_b, conj_b), rows in blocks.items():
            grouped: dict = {}
            for base_a, combination in rows.items():
                key, scale = _normalized(combination)  # row = scale · B_key
                grouped.setdefault(key, {})[base_a] = scale
            for key, a_combination in grouped.items():
                ia, scale_a = leg_index(spin_a, a_combination, conj_a)
                ib, scale_b = leg_index(spin_b, dict(key), conj_b)
                items.append((ia, conj_a, ib, conj_b, scale_a * scale_b))
        per_label.append(items)
    order = sorted(legs, key=lambda item: (item[0], item[1]))
    position = {legs[item]: k for k, item in enumerate(order)}
    products = [[(position[a], ca, position[b], cb, c) for a, ca, b, cb, c in items] for items in per_label]
    return order, products


# ------------------------------------------------------------------------------------------- result
def _readonly(values, dtype=None) -> np.ndarray:
    return readonly_copy(values, dtype)


@dataclass(frozen=True, eq=False)
class QuadraticEstimates:
    """Unnormalized estimates ḡ^XY_LM of a pair of filtered inputs (read-only).

    Attributes
    ----------
    gradient, curl : mapping label → complex ndarray, shape (nalm(lmax_L),)
        ḡ for the lensing (φ) and curl (Ω) weights, healpy layout; normalize with A_L = 1/R_L.
    lmax_L : int
    shared : bool
        True when both legs came from the same filtered fields.
    settings : mapping
        Grid shape, ring blocks, transform counts.
    """

    gradient: Mapping
    curl: Mapping
    lmax_L: int
    shared: bool
    settings: Mapping


# ------------------------------------------------------------------------------------------- engine
def _ring_blocks(ntheta: int, rings_per_block: int) -> list[np.ndarray]:
    """Ring indices in blocks of north/south pairs (θ and π − θ together), the equator in the last one."""
    half = ntheta // 2
    pairs = max(1, rings_per_block // 2)
    blocks = []
    for start in range(0, half, pairs):
        north = np.arange(start, min(start + pairs, half))
        blocks.append(np.concatenate([north, ntheta - 1 - north[::-1]]))
    if ntheta % 2:
        if blocks:
            blocks[-1] = np.sort(np.append(blocks[-1], half))
        else:
            blocks.append(np.array([half]))
    return blocks


def _spin_groups(legs) -> list[tuple[int, int, int]]:
    """(spin, first row, count) of the runs of equal |spin| in the sorted leg list (one ducc0 call each)."""
    groups = []
    for row, leg in enumerate(legs):
        if groups and groups[-1][0] == leg[0]:
            spin, first, count = groups[-1]
            groups[-1] = (spin, first, count + 1)
        else:
            groups.append((leg[0], row, 1))
    return groups


def _has_curl(leg) -> bool:
    return any(weight.imag != 0 for _, weight in leg[1])


def _synthesis_layout(legs) -> dict:
    """Per spin group: (mode, first row of its curl rows or None). Groups with a curl part get their own
    curl rows (after the gradient rows); the others share zero rows (as many as the largest such group)."""
    layout = {}
    row = len(legs)
    for spin, _first, count in _spin_groups(legs):
        curl = any(_has_curl(leg) for leg in legs if leg[0] == spin)
        if spin == 0:
            if curl:
                raise RuntimeError("internal error: a spin-0 leg with a complex combination")
            layout[spin] = ("", None)
        elif curl:
            layout[spin] = ("STANDARD", row)
            row += count
        else:
            layout[spin] = (_SYNTHESIS_MODE[spin], None)
    zeros = max([count for spin, _, count in _spin_groups(legs) if layout[spin] == ("STANDARD", None)], default=0)
    layout["zero_row"] = row
    layout["rows"] = row + zeros
    return layout


def _leg_coefficients(legs, fields, factors: FactorTable, lmax: int) -> tuple[np.ndarray, dict]:
    """Gradient rows −Σ Re(w) u(ℓ) X̄_ℓm for every leg (legs sorted by spin), curl rows −Σ Im(w) u X̄ for the
    spin groups that have any, then zero rows for the curl parts of the other batched "STANDARD" syntheses."""
    ell = ell_of_alm(lmax)
    layout = _synthesis_layout(legs)
    out = np.zeros((layout["rows"], nalm(lmax)), dtype=np.complex128)
    for spin, first, count in _spin_groups(legs):
        curl_row = layout[spin][1]
        for k in range(count):
            for (side, name, weights), weight in legs[first + k][1]:
                u = factors.product(weights, lmax)[ell]
                alm = fields[side].alm[_FIELD_INDEX[name]]
                if weight.real:
                    out[first + k] -= (weight.real * u) * alm
                if weight.imag:
                    out[curl_row + k] -= (weight.imag * u) * alm
    return out, layout


class _Workspace:
    """Buffers for one block of rings, allocated once and reused for every block (no page faults per block).

    Complex maps are stored as interleaved float pairs so that ducc0 can write and read their real and
    imaginary parts in place through strided (k, 2, npix) views.
    """

    def __init__(self, legs, n_labels: int, max_npix: int, lmax_L: int):
        self.groups = _spin_groups(legs)
        self.leg_buffers = {}
        for spin, _first, count in self.groups:
            shape = (count, 1, max_npix) if spin == 0 else (count, max_npix, 2)
            self.leg_buffers[spin] = np.empty(shape)
        self.products = np.empty((n_labels, max_npix, 2))
        self.analysis = np.empty((n_labels, 2, nalm(lmax_L)), dtype=np.complex128)

    def leg_maps(self, npix: int) -> list[np.ndarray]:
        """Per leg (in leg order): a real (npix,) view for spin 0, a complex (npix,) view otherwise."""
        maps = []
        for spin, _first, count in self.groups:
            buffer = self.leg_buffers[spin]
            for k in range(count):
                maps.append(buffer[k, 0, :npix] if spin == 0 else buffer[k, :npix].view(np.complex128)[:, 0])
        return maps

    def leg_output(self, spin: int, npix: int) -> np.ndarray:
        """The (count, ncomp, npix) float view ducc0 writes the legs of one spin into."""
        buffer = self.leg_buffers[spin]
        return buffer[:, :, :npix] if spin == 0 else buffer[:, :npix, :].transpose(0, 2, 1)

    def product_maps(self, npix: int) -> np.ndarray:
        return self.products[:, :npix, :].view(np.complex128)[..., 0]

    def product_output(self, npix: int) -> np.ndarray:
        return self.products[:, :npix, :].transpose(0, 2, 1)


def _synthesise_legs(legs, coefficients, layout, lmax, geometry, npix, nthreads, workspace: _Workspace) -> None:
    """Leg maps on the rings of ``geometry`` into the workspace: Σ w u X̄ ₛY (real for spin 0).

    Legs of one spin are synthesized in one batched ducc0 call (one set-up of the recursions per call).
    """
    import ducc0
    from numpy.lib.stride_tricks import as_strided

    row_bytes, item_bytes = coefficients.strides
    for spin, first, count in workspace.groups:
        rows = coefficients[first : first + count]
        out = workspace.leg_output(spin, npix)
        if spin == 0:
            ducc0.sht.synthesis(alm=rows[:, None, :], lmax=lmax, spin=0, nthreads=nthreads, map=out, **geometry)
            out *= -1.0  # the stored coefficients are −u X̄
            continue
        mode, curl_row = layout[spin]
        if mode == "GRAD_ONLY":
            alm = rows[:, None, :]
        else:  # each gradient row with its curl row (own or zero), as one (count, 2, nalm) array without a copy
            curl_row = layout["zero_row"] if curl_row is None else curl_row
            alm = as_strided(
                coefficients[first],
                shape=(count, 2, coefficients.shape[1]),
                strides=(row_bytes, (curl_row - first) * row_bytes, item_bytes),
            )
        ducc0.sht.synthesis(alm=alm, lmax=lmax, spin=spin, nthreads=nthreads, map=out, mode=mode, **geometry)


def _multiply_block(block, legs_maps, products, out, scratch):
    """out[e, block] = Σ coefficient · leg_a · leg_b for every estimator e (legs conjugated as needed)."""
    tmp = scratch[: block.stop - block.start]
    for e, items in enumerate(products):
        acc = out[e, block]
        first = True
        for index_a, conj_a, index_b, conj_b, coefficient in items:
            a = legs_maps[index_a][block]
            b = legs_maps[index_b][block]
            if conj_a and conj_b:
                np.multiply(a, b, out=tmp)
                np.conjugate(tmp, out=tmp)
            elif conj_a:
                np.conjugate(a, out=tmp)
                tmp *= b
            elif conj_b:
                np.conjugate(b, out=tmp)
                tmp *= a
            else:
                np.multiply(a, b, out=tmp)
            if first:
                np.multiply(tmp, coefficient, out=acc)
                first = False
            else:
                tmp *= coefficient
                acc += tmp
        if first:
            acc[...] = 0.0


@renamed_arguments(symmetrise="symmetrize")
def quadratic_estimates(
    first: FilteredFields,
    second: FilteredFields | None = None,
    estimators=BASE_ESTIMATORS,
    lmax_L: int | None = None,
    spectra: Spectra | None = None,
    weights: str | None = None,
    nthreads: int | None = None,
    workspace_mb: int | None = None,
    symmetrize: bool = False,
    lensed_weights: bool | None = None,
) -> QuadraticEstimates:
    """Unnormalized quadratic estimates ḡ^XY_LM[a, b] in position space (gradient and curl weights).

    Parameters
    ----------
    first : FilteredFields
        Input a: the first field of each label (T of TE, TB; E of EB) comes from it.
    second : FilteredFields, optional
        Input b: the second field of each label; default ``first`` (then legs are shared and the
        symmetric products computed once).
    estimators : sequence of str or str
        Labels from "TT", "TE", "EE", "TB", "EB" (default all five); a comma-separated string works too.
    lmax_L : int, optional
        Highest L returned (default: the fields' lmax; at most 2·lmax, the band limit of the products).
    spectra : Spectra, optional
        CMB spectra in the weights f^XY (default: the fiducial cosmology).
    weights : {"lensed", "unlensed", "gradient"}, optional
        CMB spectra in the weights (:func:`lensrec.gradient_spectra.weight_spectra`; default
        :data:`lensrec.gradient_spectra.DEFAULT_WEIGHTS`). A bool here is read as the deprecated
        ``lensed_weights``.
    nthreads : int, optional
    workspace_mb : float, optional
        Memory for one block of rings (the legs and products of those rings), in MB; default 1024. The grid
        is processed in as many blocks of north/south ring pairs as this requires; fewer, larger blocks
        save per-call set-up in the transforms.
    symmetrize : bool
        With two inputs: return ½ (ḡ[a, b] + ḡ[b, a]) in one pass (each input's legs synthesized once, one
        analysis per estimator), as realization-dependent N0 and N1 use mixed pairs; about half the cost of
        two calls. Ignored for one input (ḡ[a, a] is its own mirror).
    lensed_weights : bool, optional
        Deprecated: True means ``weights="lensed"``, False ``weights="unlensed"``.

    Returns
    -------
    QuadraticEstimates
        ḡ as defined in :mod:`lensrec.estimator_weights` (item 2) with X̄ = the given filtered fields.

    Raises
    ------
    TypeError, ValueError
        Inputs that are not FilteredFields or of different lmax, unknown labels, lmax_L out of range,
        spectra too short.

    References
    ----------
    Okamoto & Hu 2003, PRD 67, 083002 (full-sky estimators); the position-space form follows from the
    Gaunt integral of spin-weighted harmonics (module docstring).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.filtering import FilteredFields
    >>> from lensrec.harmonics import nalm
    >>> rng = np.random.default_rng(1)
    >>> alm = rng.normal(size=(3, nalm(16))) + 0j
    >>> fields = FilteredFields(alm, 16, {k: np.ones(17) for k in ("TT", "EE", "BB", "TE")})
    >>> g = quadratic_estimates(fields, estimators="TT,EB", lmax_L=8, nthreads=1)
    >>> sorted(g.gradient), g.gradient["TT"].shape
    (['EB', 'TT'], (45,))
    """
    import ducc0

    if not isinstance(first, FilteredFields):
        raise TypeError(f"first must be FilteredFields (from a filter's filter(maps)), got {type(first).__name__}")
    shared = second is None or second is first
    second = first if second is None else second
    if not isinstance(second, FilteredFields):
        raise TypeError(f"second must be FilteredFields or None, got {type(second).__name__}")
    if second.lmax != first.lmax:
        raise ValueError(f"the two inputs must share one lmax, got {first.lmax} and {second.lmax}")
    labels = _check_labels(estimators)
    lmax = first.lmax
    lmax_L = lmax if lmax_L is None else as_int(lmax_L, "lmax_L", minimum=1, maximum=2 * lmax)
    spectra = fiducial_spectra() if spectra is None else spectra
    if not isinstance(spectra, Spectra):
        raise TypeError(f"spectra must be a lensrec Spectra object, got {type(spectra).__name__}")
    if spectra.lmax < lmax:
        raise ValueError(f"spectra reach l={spectra.lmax} but the filtered fields go to lmax={lmax}")
    nthreads = resolve_nthreads(nthreads)
    weights = resolve_weights(weights, lensed_weights)
    signal = weight_spectra(spectra, weights, lmax)
    factors = FactorTable({f"cmb:{key}": signal[key][: lmax + 1] for key in ("TT", "EE", "BB", "TE")})
    symmetrize = bool(symmetrize) and not shared
    plan = _plan(labels, factors, shared, symmetrize)
    fields = (first, second)

    # legs sorted by |spin|: each spin is one batched synthesis
    legs, products = _combined_plan(plan, {JOINT_ESTIMATOR})

    grid = gl_grid_for_band_limits(lmax_L, 2 * lmax)
    theta = ducc0.misc.GL_thetas(grid.ntheta)
    ring_weights = ducc0.sht.get_gridweights("GL", grid.ntheta) / grid.nphi
    if workspace_mb is None:
        workspace_bytes = _WORKSPACE_BYTES
    else:
        workspace_bytes = int(as_float(workspace_mb, "workspace_mb", minimum=0.0, strict_minimum=True) * 2**20)
    n_complex = sum(1 for leg in legs if leg[0] > 0) + len(labels)
    ring_bytes = grid.nphi * (16 * n_complex + 8 * (len(legs) + len(labels) - n_complex))
    blocks = _ring_blocks(grid.ntheta, max(2, workspace_bytes // max(ring_bytes, 1)))
    coefficients, layout = _leg_coefficients(legs, fields, factors, lmax)
    workspace = _Workspace(legs, len(labels), max(rings.size for rings in blocks) * grid.nphi, lmax_L)
    result = np.zeros((len(labels), 2, nalm(lmax_L)), dtype=np.complex128)
    pool = concurrent.futures.ThreadPoolExecutor(nthreads) if nthreads > 1 else None
    scratches: dict = {}

    def multiply(piece, leg_maps, h):
        import threading

        key = threading.get_ident()
        if key not in scratches:
            scratches[key] = np.empty(_PRODUCT_BLOCK, dtype=np.complex128)
        _multiply_block(piece, leg_maps, products, h, scratches[key])

    seconds = {"legs": 0.0, "products": 0.0, "analysis": 0.0}
    try:
        for rings in blocks:
            clock = time.perf_counter()
            npix = rings.size * grid.nphi
            geometry = {
                "theta": np.ascontiguousarray(theta[rings]),
                "nphi": np.full(rings.size, grid.nphi, np.uintp),
                "phi0": np.zeros(rings.size),
                "ringstart": (np.arange(rings.size) * grid.nphi).astype(np.uintp),
            }
            _synthesise_legs(legs, coefficients, layout, lmax, geometry, npix, nthreads, workspace)
            seconds["legs"] += time.perf_counter() - clock
            clock = time.perf_counter()
            leg_maps, h = workspace.leg_maps(npix), workspace.product_maps(npix)
            pieces = [slice(start, min(start + _PRODUCT_BLOCK, npix)) for start in range(0, npix, _PRODUCT_BLOCK)]
            if pool is None:
                for piece in pieces:
                    multiply(piece, leg_maps, h)
            else:
                list(pool.map(functools.partial(multiply, leg_maps=leg_maps, h=h), pieces))
            seconds["products"] += time.perf_counter() - clock
            clock = time.perf_counter()
            ducc0.sht.adjoint_synthesis(
                map=workspace.product_output(npix),
                lmax=lmax_L,
                spin=1,
                nthreads=nthreads,
                ringfactor=np.ascontiguousarray(ring_weights[rings]),
                alm=workspace.analysis,
                **geometry,
            )
            result += workspace.analysis
            seconds["analysis"] += time.perf_counter() - clock
    finally:
        if pool is not None:
            pool.shutdown()
    del workspace, coefficients

    ell = ell_of_alm(lmax_L).astype(np.float64)
    root = np.sqrt(ell * (ell + 1.0))
    gradient, curl = {}, {}
    for k, label in enumerate(labels):
        eta = plan[label][1]
        gradient[label] = _readonly(result[k, 0] * (root / eta))
        curl[label] = _readonly(result[k, 1] * (root / eta))
    spins = {}
    for leg in legs:
        spins[str(leg[0])] = spins.get(str(leg[0]), 0) + 1
    settings = {
        "lmax": lmax,
        "lmax_L": lmax_L,
        "weights": weights,
        "lensed_weights": weights == "lensed",
        "estimators": list(labels),
        "symmetrized": symmetrize,
        "grid": [grid.ntheta, grid.nphi],
        "ring_blocks": len(blocks),
        "transforms": {
            "synthesis_by_spin": spins,
            "synthesis": len(legs),
            "analysis_spin1": len(labels),
            "total": len(legs) + len(labels),
        },
        "products": int(sum(len(items) for items in products)),
        "seconds": seconds,
    }
    return QuadraticEstimates(
        gradient=MappingProxyType(gradient),
        curl=MappingProxyType(curl),
        lmax_L=lmax_L,
        shared=shared,
        settings=MappingProxyType(settings),
    )
