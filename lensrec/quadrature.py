"""Gauss–Legendre quadrature and Wigner small-d series: the engine behind exact, fast full-sky sums.

For m1 + m2 + m3 = 0 and n1 + n2 + n3 = 0 (Varshalovich, Moskalev & Khersonskii 1988, *Quantum Theory of
Angular Momentum*, §4.11.1)::

    ∫_{-1}^{1} d^{l1}_{m1 n1}(β) d^{l2}_{m2 n2}(β) d^{l3}_{m3 n3}(β) d(cos β)
        = 2 (l1 l2 l3; m1 m2 m3) (l1 l2 l3; n1 n2 n3)

so a double sum over l1, l2 of a_{l1} b_{l2} times two 3j symbols is one integral over cos β of two
Wigner-d series and one d-function. The integrand is a polynomial in cos β (times an integer power of
sin β when spins differ, which pairs up to a polynomial again) of degree at most l1 + l2 + l3, so
Gauss–Legendre quadrature with ``npoints_for(l1max, l2max, l3max)`` nodes is exact.

Convention: the standard small-d of Varshalovich et al. (their §4.3), d^l_{mn}(β) = <l m| exp(−iβJ_y) |l n>,
with d^l_{mn}(0) = δ_mn, d^l_{00}(β) = P_l(cos β), d^l_{mn} = (−1)^{m−n} d^l_{nm} = d^l_{−n,−m}; it is the one
for which the identity above holds with the 3j symbols of ``wigners.wigner_3j`` (checked in the tests).

Implementation: ducc0's spin-weighted Legendre transforms (``ducc0.sht.alm2leg`` / ``leg2alm``) evaluate
Σ_l a_l λ^s_{lm}(θ) at arbitrary colatitudes with stable, SIMD-vectorised recursions. With
λ^s_{lm} expressed through d^l_{m,±s} (normalization √((2l+1)/4π); the signs were measured against
``wigners`` and are recorded in ``_ducc_forward`` / ``_ducc_adjoint``), one spin-s call evaluates four real
d-series (two with d_{m,s}, two with d_{m,−s}) and one spin-0 call two. Calls run concurrently in a small
thread pool (ducc0 releases the GIL).
"""

from __future__ import annotations

import functools
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ._checks import as_finite_array, as_int, resolve_nthreads

__all__ = ["gauss_legendre", "npoints_for", "wigner_d_series", "wigner_d_project"]

# ducc0 allows any spin <= lmax; we promise (and test) |m|, |n| up to this value.
MAX_SPIN = 16


# --------------------------------------------------------------------------------------- quadrature
@functools.lru_cache(maxsize=16)
def _gauss_legendre_cached(npoints: int):
    import ducc0

    theta = np.asarray(ducc0.misc.GL_thetas(npoints), dtype=np.float64)  # ascending θ
    # GL_weights(n, nlon) returns the quadrature weights times 2π/nlon (weights of a full-sphere ring).
    weights = np.asarray(ducc0.misc.GL_weights(npoints, 1), dtype=np.float64) / (2.0 * np.pi)
    theta = theta[::-1].copy()  # ascending x = cos θ
    weights = weights[::-1].copy()
    x = np.cos(theta)
    for array in (theta, weights, x):
        array.setflags(write=False)
    return x, weights, theta


def gauss_legendre(npoints):
    """Gauss–Legendre nodes and weights on [−1, 1].

    Parameters
    ----------
    npoints : int
        Number of nodes (≥ 1). The rule integrates polynomials of degree ≤ 2·npoints − 1 exactly.

    Returns
    -------
    x : ndarray, shape (npoints,)
        Nodes x_k = cos β_k in increasing order.
    w : ndarray, shape (npoints,)
        Weights, Σ w_k = 2.

    Raises
    ------
    TypeError, ValueError
        If ``npoints`` is not an integer ≥ 1.

    References
    ----------
    Abramowitz & Stegun 1964, *Handbook of Mathematical Functions*, eq. 25.4.29. Nodes and weights come from
    ducc0 (Bogaert's asymptotic method, accurate to a few ulp for any npoints).

    Examples
    --------
    >>> from lensrec.quadrature import gauss_legendre
    >>> x, w = gauss_legendre(3)
    >>> float(round(w.sum(), 12)), float(round(x[2] ** 2, 12))
    (2.0, 0.6)
    """
    npoints = as_int(npoints, "npoints", minimum=1, maximum=10**6)
    x, w, _ = _gauss_legendre_cached(npoints)
    return x.copy(), w.copy()


def _nodes_with_theta(npoints: int):
    """(x, w, θ) of the Gauss–Legendre rule, read-only and cached (θ straight from ducc0, not arccos x)."""
    return _gauss_legendre_cached(as_int(npoints, "npoints", minimum=1, maximum=10**6))


def npoints_for(*lmaxes) -> int:
    """Number of Gauss–Legendre nodes that integrates a product of series with these band limits exactly.

    A product of Wigner-d functions of degrees l1 … lk is a polynomial of degree ≤ Σ l_i in cos β (the
    half-angle powers pair up whenever the spins sum to zero), which an n-point rule integrates exactly
    when 2n − 1 ≥ Σ l_i, i.e. n = (Σ l_i)//2 + 1.

    Parameters
    ----------
    *lmaxes : int
        Band limits of the factors (each ≥ 0, at least one).

    Returns
    -------
    int

    Examples
    --------
    >>> from lensrec.quadrature import npoints_for
    >>> npoints_for(3000, 3000, 3000)
    4501
    """
    if not lmaxes:
        raise ValueError("npoints_for needs at least one band limit, got none")
    total = sum(as_int(value, f"lmaxes[{i}]", minimum=0) for i, value in enumerate(lmaxes))
    return total // 2 + 1


# ------------------------------------------------------------------------- ducc0 conventions (measured)
def _canonical(m: int, n: int) -> tuple[int, int, int]:
    """Return (a, b, sign) with d^l_{mn} = sign · d^l_{ab}, a ≥ |b| ≥ 0 … the form ducc0 evaluates.

    Uses d_{mn} = d_{−n,−m} and d_{mn} = (−1)^{m−n} d_{nm} (Varshalovich et al. 1988, §4.4).
    """
    parity = -1 if (m - n) % 2 else 1
    if abs(m) >= abs(n):
        return (m, n, 1) if m >= 0 else (-m, -n, parity)
    return (n, m, parity) if n >= 0 else (-n, -m, 1)


def _norm(lmax: int) -> np.ndarray:
    ell = np.arange(lmax + 1, dtype=np.float64)
    return np.sqrt((2.0 * ell + 1.0) / (4.0 * np.pi))


def _ducc_forward(a: int, spin: int, lmax: int, theta: np.ndarray, minus: list, plus: list) -> list:
    """Evaluate up to two series with d^l_{a,−spin} (``minus``) and two with d^l_{a,+spin} (``plus``).

    ducc0's spin-s synthesis of (G, C) at one m gives, with N_l = √((2l+1)/4π) (measured against wigners):
        leg0 + i·leg1 = (−1)^{s+1} Σ_l N_l (G_l + iC_l) d^l_{m,−s}
        leg0 − i·leg1 = −Σ_l N_l (G_l − iC_l) d^l_{m,s}
    and for spin 0, leg = Σ_l N_l G_l d^l_{m0}. Feeding complex G, C packs four real series into one call.
    """
    import ducc0

    norm = _norm(lmax)
    mval = np.array([a], dtype=np.uintp)
    mstart = np.zeros(1, dtype=np.uintp)
    zero = np.zeros(lmax + 1)
    if spin == 0:
        c1, c2 = (list(plus) + list(minus) + [zero, zero])[:2]
        alm = ((c1 + 1j * c2) / norm)[None, :]
        leg = ducc0.sht.alm2leg(alm=alm, lmax=lmax, theta=theta, spin=0, mval=mval, mstart=mstart, nthreads=1)
        values = leg[0, :, 0]
        return [values.real.copy(), values.imag.copy()]
    u1, u2 = (list(minus) + [zero, zero])[:2]
    v1, v2 = (list(plus) + [zero, zero])[:2]
    g = ((u1 + v1) + 1j * (u2 + v2)) / (2.0 * norm)
    c = ((u2 - v2) + 1j * (v1 - u1)) / (2.0 * norm)
    alm = np.stack([g, c])
    leg = ducc0.sht.alm2leg(alm=alm, lmax=lmax, theta=theta, spin=spin, mval=mval, mstart=mstart, nthreads=1)
    p = (leg[0, :, 0] + 1j * leg[1, :, 0]) * (1.0 if spin % 2 else -1.0)
    q = -(leg[0, :, 0] - 1j * leg[1, :, 0])
    return [p.real.copy(), p.imag.copy(), q.real.copy(), q.imag.copy()]


def _ducc_adjoint(a: int, spin: int, lmax: int, theta: np.ndarray, minus: list, plus: list) -> list:
    """Project up to two weighted value sets on d^l_{a,−spin} (``minus``) and two on d^l_{a,+spin} (``plus``).

    The adjoint of ``_ducc_forward`` (ducc0's leg2alm, measured against wigners): with leg0 = (P + M)/2,
    leg1 = (P − M)/(2i), Σ_k P_k d^l_{m,−s}(θ_k) = (−1)^{s+1} (G_l + iC_l)/N_l and
    Σ_k M_k d^l_{m,s}(θ_k) = −(G_l − iC_l)/N_l; for spin 0, Σ_k leg_k d^l_{m0}(θ_k) = G_l / N_l.
    """
    import ducc0

    norm = _norm(lmax)
    ntheta = theta.size
    mval = np.array([a], dtype=np.uintp)
    mstart = np.zeros(1, dtype=np.uintp)
    zero = np.zeros(ntheta)
    if spin == 0:
        f1, f2 = (list(plus) + list(minus) + [zero, zero])[:2]
        leg = (f1 + 1j * f2)[None, :, None]
        alm = ducc0.sht.leg2alm(leg=leg, lmax=lmax, theta=theta, spin=0, mval=mval, mstart=mstart, nthreads=1)
        values = alm[0] / norm
        values[:a] = 0.0
        return [values.real.copy(), values.imag.copy()]
    f1, f2 = (list(minus) + [zero, zero])[:2]
    g1, g2 = (list(plus) + [zero, zero])[:2]
    p = f1 + 1j * f2
    q = g1 + 1j * g2
    leg = np.empty((2, ntheta, 1), dtype=np.complex128)
    leg[0, :, 0] = 0.5 * (p + q)
    leg[1, :, 0] = (p - q) / 2j
    alm = ducc0.sht.leg2alm(leg=leg, lmax=lmax, theta=theta, spin=spin, mval=mval, mstart=mstart, nthreads=1)
    pm = (alm[0] + 1j * alm[1]) / norm * (1.0 if spin % 2 else -1.0)
    pp = -(alm[0] - 1j * alm[1]) / norm
    out = [pm.real.copy(), pm.imag.copy(), pp.real.copy(), pp.imag.copy()]
    for array in out:
        array[: max(a, spin)] = 0.0
    return out


def _run(jobs, nthreads: int) -> list:
    if nthreads <= 1 or len(jobs) <= 1:
        return [job() for job in jobs]
    with ThreadPoolExecutor(max_workers=min(nthreads, len(jobs))) as pool:
        return list(pool.map(lambda job: job(), jobs))


def _pack(requests, key_of):
    """Group request indices by ducc0 call signature and split each group into calls of ≤ 2+2 series."""
    groups: dict = {}
    for index, request in enumerate(requests):
        a, b, lmax = key_of(request)
        entry = groups.setdefault((a, abs(b), lmax), ([], []))
        entry[0 if b < 0 else 1].append(index)
    calls = []
    for (a, spin, lmax), (minus, plus) in groups.items():
        if spin == 0:
            both = minus + plus
            for start in range(0, len(both), 2):
                calls.append((a, 0, lmax, [], both[start : start + 2]))
        else:
            for start in range(0, max(len(minus), len(plus)), 2):
                calls.append((a, spin, lmax, minus[start : start + 2], plus[start : start + 2]))
    return calls


def _scatter(finished, prepared, live, results) -> None:
    """Put each packed call's outputs back in request order, times the canonicalisation sign."""
    for (_, spin, _, minus, plus), out in finished:
        slots = (
            list(enumerate(plus)) if spin == 0 else list(enumerate(minus)) + [(2 + k, i) for k, i in enumerate(plus)]
        )
        for slot, i in slots:
            results[live[i]] = prepared[live[i]][3] * out[slot]


def _series_many(requests, theta: np.ndarray, nthreads: int) -> list[np.ndarray]:
    """Evaluate many series f(θ_k) = Σ_l c_l d^l_{mn}(θ_k); ``requests`` is a list of (c, m, n).

    Each c is a real 1-D array indexed from l = 0; entries below max(|m|, |n|) are ignored. Series that share
    (a, |b|, lmax) after canonicalisation are packed into one ducc0 call, and calls run in a thread pool.
    """
    prepared = []
    for coefficients, m, n in requests:
        a, b, sign = _canonical(int(m), int(n))
        c = np.asarray(coefficients, dtype=np.float64)
        lowest = max(a, abs(b))
        nonzero = np.flatnonzero(c[lowest:])
        lmax = lowest + int(nonzero[-1]) if nonzero.size else -1
        if lmax >= 0:
            c = c[: lmax + 1].copy()
            c[:lowest] = 0.0
        prepared.append((c, a, b, sign, lmax))
    results: list = [None] * len(prepared)
    live = [i for i, item in enumerate(prepared) if item[4] >= 0]
    for i, item in enumerate(prepared):
        if item[4] < 0:
            results[i] = np.zeros(theta.size)
    calls = _pack([prepared[i] for i in live], lambda item: (item[1], item[2], item[4]))

    def job(call):
        a, spin, lmax, minus, plus = call
        out = _ducc_forward(
            a, spin, lmax, theta, [prepared[live[i]][0] for i in minus], [prepared[live[i]][0] for i in plus]
        )
        return call, out

    _scatter(_run([functools.partial(job, call) for call in calls], nthreads), prepared, live, results)
    return results


def _project_many(requests, theta: np.ndarray, weights: np.ndarray, nthreads: int) -> list[np.ndarray]:
    """Many projections c_l = Σ_k w_k f(θ_k) d^l_{mn}(θ_k), l = 0 … lmax; ``requests`` is (f, m, n, lmax)."""
    prepared = []
    for values, m, n, lmax in requests:
        a, b, sign = _canonical(int(m), int(n))
        prepared.append((np.asarray(values, dtype=np.float64) * weights, a, b, sign, int(lmax)))
    results: list = [None] * len(prepared)
    live = []
    for i, item in enumerate(prepared):
        if item[4] < max(item[1], abs(item[2])):
            results[i] = np.zeros(item[4] + 1)
        else:
            live.append(i)
    calls = _pack([prepared[i] for i in live], lambda item: (item[1], item[2], item[4]))

    def job(call):
        a, spin, lmax, minus, plus = call
        out = _ducc_adjoint(
            a, spin, lmax, theta, [prepared[live[i]][0] for i in minus], [prepared[live[i]][0] for i in plus]
        )
        return call, out

    _scatter(_run([functools.partial(job, call) for call in calls], nthreads), prepared, live, results)
    return results


# ------------------------------------------------------------------------------------- public series
def _check_spins(m, n) -> tuple[int, int]:
    m = as_int(m, "m", minimum=-MAX_SPIN, maximum=MAX_SPIN)
    n = as_int(n, "n", minimum=-MAX_SPIN, maximum=MAX_SPIN)
    return m, n


def _theta_of(x) -> tuple[np.ndarray, np.ndarray]:
    """Validate x = cos β and return (x, β).

    arccos loses accuracy near the poles (δβ ≈ ε/sin β, 4e-10 relative at the outermost node of a 4500-point
    rule, which a degree-6000 d-function turns into ~1e-9 errors), so when x are exactly the nodes of
    :func:`gauss_legendre` the colatitudes computed by ducc0 are used instead.
    """
    x = as_finite_array(x, "x", ndim=1)
    if x.size == 0:
        raise ValueError("x must hold at least one node, got an empty array")
    if np.any(np.abs(x) > 1.0):
        raise ValueError(f"x = cos(beta) must lie in [-1, 1]; found values from {x.min():.6g} to {x.max():.6g}")
    if x.size <= 200001:
        nodes, _, theta = _gauss_legendre_cached(x.size)
        if np.array_equal(nodes, x):
            return x, theta
    return x, np.arccos(x)


def wigner_d_series(coefficients, m, n, x, nthreads=None) -> np.ndarray:
    """Evaluate f(x_k) = Σ_l c_l d^l_{mn}(β_k), x_k = cos β_k.

    Parameters
    ----------
    coefficients : array_like, shape (lmax+1,) or (k, lmax+1)
        Real coefficients c_l indexed from l = 0; entries with l < max(|m|, |n|) are ignored. A 2-D array
        holds k independent series sharing (m, n).
    m, n : int
        Indices of d^l_{mn}, any signs, |m|, |n| ≤ 16.
    x : array_like, shape (npoints,)
        Evaluation points cos β in [−1, 1] (any points, not only quadrature nodes). Near the poles cos β
        carries little information about β (δβ ≈ ε/sin β); for the nodes of :func:`gauss_legendre` the exact
        colatitudes are used.
    nthreads : int, optional
        Threads (default: ``LENSREC_NTHREADS`` or all cores).

    Returns
    -------
    ndarray, shape (npoints,) or (k, npoints)

    Raises
    ------
    TypeError, ValueError
        Non-integer or out-of-range m, n; non-finite coefficients or x; x outside [−1, 1].

    References
    ----------
    Varshalovich, Moskalev & Khersonskii 1988, §4.3 (definition and symmetries of d^l_{mn}).

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.quadrature import wigner_d_series
    >>> beta = 0.7
    >>> # d^1_{00} = cos β and d^1_{10} = −sin β / √2
    >>> bool(np.isclose(wigner_d_series([0.0, 1.0], 0, 0, [np.cos(beta)])[0], np.cos(beta)))
    True
    >>> bool(np.isclose(wigner_d_series([0.0, 1.0], 1, 0, [np.cos(beta)])[0], -np.sin(beta) / np.sqrt(2)))
    True
    """
    m, n = _check_spins(m, n)
    c = as_finite_array(coefficients, "coefficients", ndim=(1, 2))
    if c.shape[-1] == 0:
        raise ValueError("coefficients must hold at least the l = 0 entry, got an empty last axis")
    _, theta = _theta_of(x)
    rows = c[None, :] if c.ndim == 1 else c
    out = _series_many([(row, m, n) for row in rows], theta, resolve_nthreads(nthreads))
    result = np.array(out)
    return result[0] if c.ndim == 1 else result


def wigner_d_project(values, m, n, lmax, x, w, nthreads=None) -> np.ndarray:
    """Project values on Wigner-d functions: c_l = Σ_k w_k f(x_k) d^l_{mn}(β_k), l = 0 … lmax.

    With Gauss–Legendre nodes and weights this is the exact integral ∫ f(x) d^l_{mn}(x) dx whenever f is a
    band-limited product of d-series (see :func:`npoints_for`); in particular projecting a
    :func:`wigner_d_series` returns (2/(2l+1)) c_l (orthogonality, Varshalovich et al. 1988, §4.10).

    Parameters
    ----------
    values : array_like, shape (npoints,) or (k, npoints)
        Real f(x_k); a 2-D array holds k functions.
    m, n : int
        Indices of d^l_{mn} (any signs, |m|, |n| ≤ 16).
    lmax : int
        Highest multipole returned (≥ 0).
    x, w : array_like, shape (npoints,)
        Nodes cos β_k in [−1, 1] and weights (for the nodes of :func:`gauss_legendre` the exact colatitudes
        are used, which keeps ~1e-12 accuracy at l = 6000).
    nthreads : int, optional

    Returns
    -------
    ndarray, shape (lmax+1,) or (k, lmax+1)
        Entries with l < max(|m|, |n|) are zero.

    Raises
    ------
    TypeError, ValueError
        Bad m, n, lmax; non-finite input; mismatched shapes.

    Examples
    --------
    >>> import numpy as np
    >>> from lensrec.quadrature import gauss_legendre, wigner_d_series, wigner_d_project
    >>> x, w = gauss_legendre(11)
    >>> f = wigner_d_series(np.eye(11)[7], 2, -1, x)     # d^7_{2,-1}
    >>> c = wigner_d_project(f, 2, -1, 10, x, w)
    >>> bool(np.allclose(c, np.eye(11)[7] * 2 / 15))
    True
    """
    m, n = _check_spins(m, n)
    lmax = as_int(lmax, "lmax", minimum=0, maximum=100000)
    x, theta = _theta_of(x)
    w = as_finite_array(w, "w", ndim=1)
    if w.shape != x.shape:
        raise ValueError(f"w must have the shape of x {x.shape}, got {w.shape}")
    f = as_finite_array(values, "values", ndim=(1, 2))
    if f.shape[-1] != x.size:
        raise ValueError(f"values must have last axis of length len(x) = {x.size}, got shape {f.shape}")
    rows = f[None, :] if f.ndim == 1 else f
    out = _project_many([(row, m, n, lmax) for row in rows], theta, w, resolve_nthreads(nthreads))
    result = np.array(out)
    return result[0] if f.ndim == 1 else result
