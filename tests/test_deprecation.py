"""Old public names keep working for one release, each with a DeprecationWarning, and give the same result."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from lensrec import tensor_forecast


def test_sigma_r_old_keywords_warn_and_agree():
    ell = np.arange(301)
    tensor = np.where(ell >= 2, 1e-4, 0.0)
    new = tensor_forecast.sigma_r(
        lensed_bb=np.full(301, 1e-6), noise_bb=np.full(301, 2e-6), tensor_bb=tensor, sky_fraction=0.5, ell_min=2,
        ell_max=300,
    )  # fmt: skip
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        old = tensor_forecast.sigma_r(
            bb_lensing=np.full(301, 1e-6), bb_noise=np.full(301, 2e-6), bb_tensor_r1=tensor, sky_fraction=0.5,
            ell_min=2, ell_max=300,
        )  # fmt: skip
    assert old == new
    messages = sorted(str(w.message) for w in caught if w.category is DeprecationWarning)
    assert len(messages) == len(caught) == 3 and "'bb_lensing' is deprecated" in messages[0]
    assert all("use 'lensed_bb'" in m or "use 'noise_bb'" in m or "use 'tensor_bb'" in m for m in messages)
    with pytest.raises(TypeError, match="got both 'bb_noise' \\(deprecated\\) and 'noise_bb'"):
        tensor_forecast.alens_residual(np.ones(10), np.ones(10), noise_bb=np.ones(10), bb_noise=np.ones(10),
                                       ell_min=2, ell_max=9)  # fmt: skip


def test_mask_moments_answer_the_old_keys_with_a_warning():
    from lensrec.masks import MaskMoments, sky_fraction_moments

    moments = sky_fraction_moments(np.r_[np.ones(6), np.zeros(6)])
    assert "fsky" not in moments and moments["sky_fraction"] == 0.5  # only the new keys are stored (and written)
    with pytest.warns(DeprecationWarning, match="'fsky_spectra' is deprecated.*'sky_fraction_spectra'"):
        assert moments["fsky_spectra"] == moments["sky_fraction_spectra"]
    with pytest.warns(DeprecationWarning, match="mask moments: 'fsky' is deprecated"):
        upgraded = MaskMoments.upgraded({"w1": 0.5, "fsky": 0.5})
    assert dict(upgraded) == {"w1": 0.5, "sky_fraction": 0.5}
    with pytest.raises(KeyError):
        moments["w9"]


def test_isotropic_filter_old_iterations_keyword():
    from lensrec import Experiment, IsotropicFilter, harmonics

    experiment = Experiment(name="tiny", ell_max_temperature=20, ell_max_polarization=20)
    with pytest.warns(DeprecationWarning, match=r"iterations=\.\.\.\) is deprecated; use jacobi_iterations"):
        old = IsotropicFilter(experiment, iterations=1, nthreads=1)
    assert old.jacobi_iterations == 1
    maps = np.random.default_rng(3).normal(size=12 * 8**2)
    with pytest.warns(DeprecationWarning, match="map2alm"):
        via_old = harmonics.map2alm(maps, 16, iterations=2, nthreads=1)
    assert np.array_equal(via_old, harmonics.map2alm(maps, 16, jacobi_iterations=2, nthreads=1))


def test_old_cli_option_spelling_warns_and_sets_the_new_option(capsys):
    from lensrec.cli import build_parser

    parser = build_parser(["suite"])
    common = ["suite", "run", "--nside", "16", "--lmax", "32", "--n-sims", "4", "--out", "x"]
    assert parser.parse_args(common).nthreads == 1
    assert parser.parse_args([*common, "--nthreads", "3"]).nthreads == 3
    with pytest.warns(DeprecationWarning, match="--threads-per-task is deprecated.*use --nthreads"):
        args = parser.parse_args([*common, "--threads-per-task", "2"])
    assert args.nthreads == 2 and not hasattr(args, "threads_per_task")
    assert "--threads-per-task is deprecated" in capsys.readouterr().err
    assert "--threads-per-task" not in parser.format_help()


def test_suites_written_with_the_old_key_names_keep_their_fingerprint():
    import hashlib
    import json

    from lensrec.suite_runner import settings_fingerprint
    from lensrec.suite_settings import upgrade_settings

    old = {
        "kind": "lensing_suite",
        "format": 1,
        "seed": 3,
        "threads_per_task": 2,
        "mask_moments": {"w1": 0.5, "fsky": 0.5, "fsky_spectra": 0.4},
        "n_sims": 8,
    }
    # the fingerprint as the first suites computed it: SHA-256 of the sorted, compact JSON without n_sims
    canonical = {k: v for k, v in old.items() if k != "n_sims"}
    stored = hashlib.sha256(json.dumps(canonical, sort_keys=True, separators=(",", ":")).encode()).hexdigest()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        new = upgrade_settings(old)
    assert {str(w.message).split("'")[1] for w in caught} == {"threads_per_task", "fsky", "fsky_spectra"}
    assert new["nthreads"] == 2 and "threads_per_task" not in new
    assert new["mask_moments"] == {"w1": 0.5, "sky_fraction": 0.5, "sky_fraction_spectra": 0.4}
    assert settings_fingerprint(new) == stored
    assert settings_fingerprint(dict(new, nthreads=3)) != stored


def test_old_palette_name_warns():
    from lensrec import report

    with pytest.warns(DeprecationWarning, match="ESTIMATOR_COLOURS.*ESTIMATOR_COLORS"):
        assert report.ESTIMATOR_COLOURS is report.ESTIMATOR_COLORS
    assert report.estimator_color("MV") == report.ESTIMATOR_COLORS["MV"]
    assert report.estimator_color("a label without a color").startswith("#")


def test_british_spellings_of_public_names_warn():
    from lensrec import biases

    cross, auto = np.full((3, 4), 0.5), np.full((3, 4), 1.0)
    with pytest.warns(DeprecationWarning, match="'normalisation_correction' is deprecated.*'normalization_correction'"):
        old = biases.normalisation_correction(cross, auto)
    new = biases.normalization_correction(cross, auto)
    assert np.array_equal(old.value, new.value) and new.name == "normalization"
    from lensrec.bandpowers import LensingBandpowers
    from lensrec.reconstruction import Reconstruction

    for cls, old, new in (
        (Reconstruction, "unnormalised", "unnormalized"),
        (LensingBandpowers, "normalisation", "normalization"),
        (LensingBandpowers, "normalisation_error", "normalization_error"),
    ):
        holder = type(cls.__name__, (), {new: "value"})()  # the alias reads the new attribute
        with pytest.warns(DeprecationWarning, match=f"{cls.__name__}.{old}' is deprecated"):
            assert getattr(cls, old).fget(holder) == "value"
