"""Lensed-gradient spectra C^{T∇T} and the ``weights`` option of the estimators, N0 and the CLI.

References: Lewis, Challinor & Hanson 2011, JCAP 03, 018 (lensed-gradient spectra); Hu 2000, PRD 62, 043007
(first-order flat-sky lensed spectrum, the independent check of the difference C^{T∇T} − C̃^TT).
"""

import json
import math

import numpy as np
import pytest

import lensrec
from lensrec.cli import main
from lensrec.gradient_spectra import (
    _gradient_and_lensed_tt,
    lensed_gradient_spectra,
    parse_weights,
    resolve_weights,
    weight_spectra,
)
from lensrec.lensed_spectra import _check_phi, _check_unlensed

LMAX, MARGIN = 3000, 1500


@pytest.fixture(scope="module")
def engine_pair():
    spectra = lensrec.fiducial_spectra()
    cl = _check_unlensed(spectra.unlensed, LMAX, MARGIN)
    phi = _check_phi(spectra.phi, LMAX, MARGIN)
    gradient, lensed = _gradient_and_lensed_tt(cl, phi, LMAX, 2)
    return cl, phi, gradient, lensed


def _first_order_difference(tt, phi, ell, nangles=512):
    """Flat-sky first order in C^φφ: C^{T∇T}_l − C̃_l = ∫ d²l'/(2π)² C_l' C^φφ_|l−l'| [(l−l')·l']² (l·l'/l² − 1).

    The expansion of T̃ = T + α·∇T + ½ α_i α_j ∂_i∂_j T (Hu 2000, PRD 62, 043007): the self terms are equal in
    ⟨T̃ T̃⟩ and ⟨T̃ (∇T)~⟩, the convolution term of the gradient carries the extra l·l'/l².
    """
    radii = np.arange(2, tt.size, dtype=float)
    angles = np.linspace(0.0, 2.0 * math.pi, nangles, endpoint=False)
    px, py = radii[:, None] * np.cos(angles), radii[:, None] * np.sin(angles)
    qx, qy = ell - px, -py
    cphi = np.interp(np.hypot(qx, qy), np.arange(phi.size), phi, right=0.0)
    integrand = tt[2:, None] * cphi * (qx * px + qy * py) ** 2 * (px * ell / ell**2 - 1.0) * radii[:, None]
    return integrand.sum() * (angles[1] - angles[0]) / (2.0 * math.pi) ** 2


@pytest.mark.parametrize("ell", [1000, 2000, 2500, 3000])
def test_gradient_minus_lensed_matches_first_order_flat_sky(engine_pair, ell):
    cl, phi, gradient, lensed = engine_pair
    expected = _first_order_difference(cl["TT"], phi, ell)
    # 10%: higher orders in C^φφ and the flat-sky limit (measured agreement 1–3%); a 30% error or a sign flip fails
    assert (gradient[ell] - lensed[ell]) / expected == pytest.approx(1.0, abs=0.10)


def test_gradient_spectrum_size_against_lensed(engine_pair):
    _, _, gradient, lensed = engine_pair
    ratio = gradient[2:] / lensed[2:] - 1.0
    ell = np.arange(2, LMAX + 1)
    # from memory (Lewis, Challinor & Hanson 2011, their figure of C^{T∇T}/C̃^TT): sub-percent below ℓ ~ 1000,
    # several percent below the lensed spectrum at ℓ ≈ 2500–3000 (the lensed spectrum there holds power moved
    # from larger scales that does not correlate with the unlensed gradient)
    assert np.max(np.abs(ratio[ell < 1000])) < 0.006
    assert np.max(np.abs(ratio[ell < 600])) < 0.001
    high = ratio[(ell >= 2500) & (ell <= 3000)].mean()
    assert -0.10 < high < -0.02


def test_public_function_matches_engine_and_zero_lensing_is_exact():
    spectra = lensrec.fiducial_spectra()
    out = lensed_gradient_spectra(spectra.unlensed, np.zeros(spectra.lmax + 1), lmax=500, ell_margin=200, nthreads=1)
    unlensed = np.array(spectra.unlensed["TT"][:501])
    unlensed[:2] = 0.0
    assert np.array_equal(out["TT"], unlensed)  # no lensing: C^{T∇T} = C^TT exactly (changes are projected)


def _no_lensing_spectra():
    fiducial = lensrec.fiducial_spectra()
    unlensed = {key: np.array(value) for key, value in fiducial.unlensed.items()}
    return lensrec.Spectra(
        unlensed=unlensed,
        lensed=dict(unlensed),
        phi=np.zeros_like(fiducial.phi),
        tensor=dict(fiducial.tensor),
        metadata=dict(fiducial.metadata),
    )


def _experiment(lmax=300):
    return lensrec.Experiment(
        name="weights check", noise_temperature=2.0, beam_fwhm=2.0,
        ell_max_temperature=lmax, ell_max_polarization=lmax,
    )  # fmt: skip


def test_without_lensing_all_weight_choices_coincide_exactly():
    spectra = _no_lensing_spectra()
    results = {
        w: lensrec.reconstruction_noise(
            _experiment(), spectra, estimators=("TT", "EB", "MV"), lmax_L=200, weights=w, nthreads=1
        )
        for w in ("lensed", "unlensed", "gradient")
    }
    for label in ("TT", "EB", "MV"):
        for other in ("unlensed", "gradient"):
            assert np.array_equal(
                results["lensed"].n0[label]["gradient"], results[other].n0[label]["gradient"], equal_nan=True
            )
    assert results["gradient"].settings["weights"] == "gradient"


def test_gradient_weights_change_only_temperature_terms():
    spectra = lensrec.fiducial_spectra()
    chosen = weight_spectra(spectra, "gradient", 1500)
    lensed = weight_spectra(spectra, "lensed", 1500)
    for key in ("EE", "BB", "TE"):
        assert np.array_equal(chosen[key], lensed[key])
    assert not np.allclose(chosen["TT"][1200:], lensed["TT"][1200:], rtol=1e-3)  # TT moves at high ℓ
    noise = {
        w: lensrec.reconstruction_noise(
            _experiment(1500), spectra, estimators=("TT", "EB"), lmax_L=100, weights=w, nthreads=2
        )
        for w in ("lensed", "gradient")
    }
    assert np.array_equal(noise["lensed"].n0["EB"]["gradient"], noise["gradient"].n0["EB"]["gradient"], equal_nan=True)
    assert not np.allclose(
        noise["lensed"].n0["TT"]["gradient"][2:], noise["gradient"].n0["TT"]["gradient"][2:], rtol=1e-5, atol=0
    )


def test_bad_weights_and_deprecated_flag():
    with pytest.raises(ValueError, match="gradients"):
        parse_weights("gradients")
    with pytest.raises(TypeError, match="weights"):
        parse_weights(1)
    with pytest.raises(ValueError, match="lensed, unlensed, gradient"):
        lensrec.reconstruction_noise(_experiment(), lmax_L=50, weights="delensed")
    with pytest.warns(DeprecationWarning, match="lensed_weights"):
        assert resolve_weights(None, lensed_weights=False) == "unlensed"
    with pytest.warns(DeprecationWarning), pytest.raises(ValueError, match="contradicts"):
        resolve_weights("gradient", lensed_weights=True)
    with pytest.warns(DeprecationWarning):
        old = lensrec.reconstruction_noise(_experiment(), estimators="TT", lmax_L=50, lensed_weights=False)
    new = lensrec.reconstruction_noise(_experiment(), estimators="TT", lmax_L=50, weights="unlensed")
    assert np.array_equal(old.n0["TT"]["gradient"], new.n0["TT"]["gradient"], equal_nan=True)


def test_cli_weights_option_and_deprecated_alias(tmp_path, capsys):
    path = tmp_path / "small.toml"
    _experiment().to_toml(path)
    common = ["forecast", "--experiment", str(path), "--lmax-L", "100", "--estimators", "TT", "--nthreads", "1"]
    assert main([*common, "--weights", "unlensed", "--out", str(tmp_path / "a.json")]) == 0
    with pytest.warns(DeprecationWarning, match="--weights unlensed"):
        assert main([*common, "--unlensed-weights", "--out", str(tmp_path / "b.json")]) == 0
    assert "deprecated" in capsys.readouterr().err
    a, b = (json.loads((tmp_path / name).read_text()) for name in ("a.json", "b.json"))
    assert a["n0"] == b["n0"]
    assert a["provenance"]["arguments"]["weights"] == "unlensed"
    assert main([*common, "--weights", "bogus", "--out", str(tmp_path / "c.json")]) == 2
    assert "invalid choice: 'bogus'" in capsys.readouterr().err


def test_suite_settings_record_weights_only_when_not_lensed():
    from lensrec.suites import lensing_suite_settings

    common = dict(nside=32, lmax=48, n_sims=4, lmax_margin=32)
    assert "weights" not in lensing_suite_settings(_experiment(), **common)  # existing fingerprints unchanged
    assert lensing_suite_settings(_experiment(), weights="gradient", **common)["weights"] == "gradient"
    with pytest.raises(ValueError, match="weights must be one of"):
        lensing_suite_settings(_experiment(), weights="lensd", **common)
