import math

import numpy as np
import pytest

import lensrec
from lensrec import Experiment


def test_noise_matches_the_knox_formula_written_out():
    # common practice (Knox 1995 form): N_l = (Delta * pi/10800)^2 exp(l(l+1) sigma^2), sigma = FWHM/sqrt(8 ln 2)
    e = Experiment(noise_temperature=5.0, beam_fwhm=3.0, ell_min=2, ell_max_temperature=3000)
    ell = np.arange(3001)
    sigma = 3.0 / 60.0 * math.pi / 180.0 / math.sqrt(8 * math.log(2))
    expected = (5.0 / 60.0 * math.pi / 180.0) ** 2 * np.exp(ell * (ell + 1) * sigma**2)
    noise = e.noise_spectrum("T", 3000)
    np.testing.assert_allclose(noise[2:], expected[2:], rtol=1e-12)  # same formula, float rounding only
    assert np.all(np.isinf(noise[:2]))
    np.testing.assert_allclose(e.beam(3000)[2:] ** 2 * noise[2:], (5.0 * math.pi / 10800) ** 2, rtol=1e-12)


def test_polarization_defaults_to_sqrt2_and_cuts_are_infinite():
    e = Experiment(noise_temperature=2.0, ell_min=30, ell_max_polarization=2000)
    assert e.noise_polarization == pytest.approx(2.0 * math.sqrt(2.0), rel=1e-15)
    n = e.noise_spectrum("EE", 2500)
    assert np.all(np.isinf(n[:30])) and np.all(np.isinf(n[2001:])) and np.all(np.isfinite(n[30:2001]))


def test_one_over_f_knee_doubles_the_noise_at_the_knee():
    # the 1 + (l/l_knee)^alpha form is 2 at l = l_knee by construction (common practice)
    e = Experiment(noise_temperature=1.0, beam_fwhm=0.0, ell_knee_temperature=500, alpha_knee_temperature=-3)
    n = e.noise_spectrum("T", 1000)
    assert n[500] / n[1000] == pytest.approx(2.0 / (1 + 0.5**3), rel=1e-12)


def test_toml_round_trip_and_refusal_to_overwrite(tmp_path):
    e = Experiment(
        name="Round Trip",
        noise_temperature=3.3,
        beam_fwhm=1.5,
        ell_min=40,
        sky_fraction=0.25,
        ell_knee_polarization=200.0,
        alpha_knee_polarization=-2.0,
    )
    path = tmp_path / "e.toml"
    e.to_toml(path)
    assert Experiment.from_toml(path) == e
    with pytest.raises(lensrec.OutputExistsError, match="already exists"):
        e.to_toml(path)
    e.replace(noise_temperature=1.0).to_toml(path, force=True)
    assert Experiment.from_toml(path).noise_temperature == 1.0


def test_typo_in_a_toml_key_gets_a_suggestion(tmp_path):
    path = tmp_path / "typo.toml"
    path.write_text('[experiment]\nname = "x"\nnoise_temprature = 2.0\n')
    with pytest.raises(ValueError, match="did you mean 'noise_temperature'"):
        Experiment.from_toml(path)
    path.write_text('[survey]\nname = "x"\n')
    with pytest.raises(ValueError, match=r"\[experiment\] table"):
        Experiment.from_toml(path)
    path.write_text("[experiment\n")
    with pytest.raises(ValueError, match="not valid TOML"):
        Experiment.from_toml(path)


@pytest.mark.parametrize(
    "changes, match",
    [
        ({"noise_temperature": -1.0}, "noise_temperature must be >= 0"),
        ({"noise_temperature": float("nan")}, "must be finite"),
        ({"noise_polarization": 1e9}, "noise_polarization must be <= "),
        ({"ell_min": 3000}, "inverted multipole cuts"),
        ({"ell_max_temperature": 1.5}, "must be an integer"),
        ({"beam_fwhm": 60.0, "ell_max_temperature": 4000}, "cannot be deconvolved"),
        ({"sky_fraction": 0.0}, "sky_fraction must be > 0"),
        ({"ell_knee_temperature": 100.0, "alpha_knee_temperature": 0.0}, "must be negative"),
        ({"name": ""}, "non-empty string"),
        ({"noise_temperature": True}, "real number"),
    ],
)
def test_bad_experiments_are_refused_with_a_named_value(changes, match):
    with pytest.raises((ValueError, TypeError), match=match):
        Experiment(**changes)


def test_shipped_examples_load_by_name_and_have_invented_names():
    names = lensrec.available_experiments()
    assert len(names) >= 3
    for name in names:
        e = lensrec.load_experiment(name)
        assert isinstance(e, Experiment)
    with pytest.raises(ValueError, match="did you mean 'deep_highland'"):
        lensrec.load_experiment("deep_highlnd")


def test_total_spectra_adds_noise_and_zeroes_te_outside_cuts(fiducial):
    e = Experiment(noise_temperature=10.0, ell_min=50, ell_max_temperature=2000, ell_max_polarization=2500)
    total = e.total_spectra(fiducial, 3000)
    np.testing.assert_allclose(total["EE"][100], fiducial.lensed["EE"][100] + e.noise_spectrum("E", 3000)[100])
    assert total["TE"][2100] == 0.0 and total["TE"][40] == 0.0 and total["TE"][100] == fiducial.lensed["TE"][100]
    assert np.isinf(total["TT"][2100]) and np.isfinite(total["EE"][2100])
