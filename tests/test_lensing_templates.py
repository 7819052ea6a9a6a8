"""Lensing B-mode templates: the first-order template as the small-deflection limit of the remapping,
symmetric inputs without B modes, and bad input. (Their delensing power on simulations: tests/test_lensing_templates.py.)"""

import numpy as np
import pytest

from lensrec import lensing_templates
from lensrec.harmonics import nalm
from lensrec.sky import gaussian_alm


@pytest.fixture(scope="module")
def small_fields():
    rng = np.random.default_rng(3)
    e_alm = rng.normal(size=nalm(40)) + 1j * rng.normal(size=nalm(40))
    phi_alm = 1e-5 * (rng.normal(size=nalm(30)) + 1j * rng.normal(size=nalm(30)))
    return e_alm, phi_alm


# ------------------------------------------------------------------------------ first-order signs
def test_first_order_template_is_the_small_deflection_limit_of_the_remapping(fiducial):
    # The first-order template is the linear term of the remapping (Taylor expansion of P(n + d) with the
    # covariant derivative; Hu 2000, PRD 62, 043007), so for φ → ε φ the two templates differ by the
    # second-order term: |B_first - B_remap| / |B_remap| ∝ ε. A wrong sign of either spin term gives an O(1)
    # difference that does not shrink with ε. Remapping at epsilon 1e-12 (numerical precision ~1e-12).
    rng = np.random.default_rng(5)
    e_alm = gaussian_alm(fiducial.unlensed["EE"], 300, rng)
    phi_alm = gaussian_alm(fiducial.phi, 300, rng)
    differences = []
    for scale in (1e-2, 5e-3):
        first = lensing_templates.lensing_b_template(e_alm, scale * phi_alm, 200, method="first_order", nthreads=2)
        exact = lensing_templates.lensing_b_template(
            e_alm, scale * phi_alm, 200, method="remap", epsilon=1e-12, nthreads=2
        )
        differences.append(np.linalg.norm(first - exact) / np.linalg.norm(exact))
    assert differences[0] < 5e-3  # the second-order term; measured 1.08e-3 at ε = 0.01
    # halving ε halves the relative difference (linear in ε) to 1%: the next term is O(ε²)
    assert differences[1] / differences[0] == pytest.approx(0.5, rel=0.01)


def test_azimuthally_symmetric_inputs_make_no_b_modes():
    # m = 0 E and m = 0 φ are both symmetric about the z axis, and parity keeps a pure-E field lensed by a
    # parity-even, axisymmetric deflection free of B modes (common practice, no source): both templates vanish.
    e_alm = np.zeros(nalm(60), complex)
    phi_alm = np.zeros(nalm(60), complex)
    e_alm[10], e_alm[23], phi_alm[5], phi_alm[12] = 1.0, -0.5, 3e-4, 1e-4
    for method in lensing_templates.TEMPLATE_METHODS:
        template = lensing_templates.lensing_b_template(e_alm, phi_alm, 40, method=method, nthreads=1)
        assert np.abs(template).max() < 1e-9 * np.abs(e_alm).max(), method  # numerical precision


@pytest.mark.parametrize(
    ("change", "error", "match"),
    [
        ({"lmax": 41}, ValueError, "exceeds the band limit of e_alm"),
        ({"lmax": 1}, ValueError, "lmax must be >= 2"),
        ({"method": "second_order"}, ValueError, "method must be one of 'remap', 'first_order'"),
        ({"method": None}, ValueError, "method must be one of"),
        ({"e_alm": "nan"}, ValueError, "e_alm contains 1 non-finite"),
        ({"phi_alm": "nan"}, ValueError, "phi_alm contains 1 non-finite"),
        ({"e_alm": "2d"}, ValueError, "e_alm must be one set of harmonic coefficients"),
        ({"e_alm": "short"}, ValueError, "not \\(lmax\\+1\\)\\(lmax\\+2\\)/2"),
        ({"e_alm": "text"}, TypeError, "e_alm must be a numeric array"),
    ],
)
def test_template_input_errors(small_fields, change, error, match):
    e_alm, phi_alm = (np.array(a) for a in small_fields)
    kwargs = {"e_alm": e_alm, "phi_alm": phi_alm, "lmax": 30, "method": "remap"}
    for key, value in change.items():
        if value == "nan":
            kwargs[key] = kwargs[key].copy()
            kwargs[key][7] = np.nan
        elif value == "2d":
            kwargs[key] = np.stack([kwargs[key], kwargs[key]])
        elif value == "short":
            kwargs[key] = kwargs[key][:-1]
        elif value == "text":
            kwargs[key] = "E.fits"
        else:
            kwargs[key] = value
    with pytest.raises(error, match=match):
        lensing_templates.lensing_b_template(
            kwargs["e_alm"], kwargs["phi_alm"], kwargs["lmax"], method=kwargs["method"], nthreads=1
        )
