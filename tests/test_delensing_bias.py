"""Treatments of the internal-delensing bias: the rules, the B-excluded reconstruction and the forecasts."""

import doctest

import numpy as np
import pytest

import lensrec
from lensrec import delensing_bias
from lensrec.delensing_bias import exclude_delensed_b, internal_delensing_forecast, resolve_bias_treatment


def test_treatment_rules_come_from_the_label_table():
    # the "uses B modes" rule is lensrec.labels.uses_b_modes, for every label there is
    for label in lensrec.labels.ESTIMATORS:
        expected = "exclude_delensed_b" if lensrec.labels.uses_b_modes(label) else "b_free"
        assert resolve_bias_treatment(label) == expected
    assert resolve_bias_treatment("MV", "none") == "none"
    with pytest.raises(ValueError, match="TT\\+TE\\+EE reads no B modes"):
        resolve_bias_treatment("TT+TE+EE", "exclude_delensed_b")
    with pytest.raises(ValueError, match="bias treatment must be one of"):
        resolve_bias_treatment("MV", "subtract")
    with pytest.raises(ValueError, match="unknown estimator"):
        resolve_bias_treatment("TT+EE")


def test_excluding_the_delensed_b_modes_changes_only_the_b_leg():
    # Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016: the reconstruction without the delensed B
    # modes. Estimators that read no B are unchanged to the last bit; EB loses information (higher N0);
    # simulated noise (uncut) is unchanged.
    experiment = lensrec.load_experiment("deep_highland")
    excluded = exclude_delensed_b(experiment, 400)
    assert excluded.to_dict() == experiment.to_dict() and excluded.b_excluded_ell_max == 400
    assert np.array_equal(excluded.noise_spectrum("B", 600, cut=False), experiment.noise_spectrum("B", 600, cut=False))
    full = lensrec.reconstruction_noise(experiment, estimators=("EE", "EB"), lmax_L=500)
    cut = lensrec.reconstruction_noise(excluded, estimators=("EE", "EB"), lmax_L=500)
    assert np.array_equal(full.n0["EE"]["gradient"][2:], cut.n0["EE"]["gradient"][2:])
    assert np.all(cut.n0["EB"]["gradient"][2:] > full.n0["EB"]["gradient"][2:])
    # with every B mode excluded, MV combines TT, TE and EE only: it is TT+TE+EE (Okamoto & Hu 2003, §III)
    everything = lensrec.reconstruction_noise(exclude_delensed_b(experiment, 4000), estimators=("MV",), lmax_L=300).n0[
        "MV"
    ]["gradient"]
    b_free = lensrec.reconstruction_noise(experiment, estimators=("TT+TE+EE",), lmax_L=300).n0["TT+TE+EE"]["gradient"]
    np.testing.assert_allclose(everything[2:], b_free[2:], rtol=1e-12)


def test_forecasts_say_which_treatment_was_applied():
    # BLCC 2021 (JCAP 03, 016): excluding the delensed B modes costs a little delensing power; dropping B
    # altogether (TT+TE+EE) costs much more at 1.4 uK-arcmin, where EB dominates (common practice).
    kwargs = {"lmax": 300, "lmax_L": 1000}
    reuse, _ = internal_delensing_forecast("deep_highland", "MV", "none", **kwargs)
    excluded, summary = internal_delensing_forecast("deep_highland", "MV", **kwargs)
    free, free_summary = internal_delensing_forecast("deep_highland", "TT+TE+EE", **kwargs)
    assert summary["bias_treatment"] == "exclude_delensed_b" and summary["ell_max_delensed"] == 300
    assert free_summary["bias_treatment"] == "b_free" and free_summary["ell_max_delensed"] is None
    assert excluded.notes[0].startswith("bias treatment: exclude_delensed_b")
    assert free.notes[0].startswith("bias treatment: b_free") and "E-reuse" in free.notes[0]
    assert reuse.notes[0].startswith("bias treatment: none")
    assert reuse.alens_residual < excluded.alens_residual < free.alens_residual


def test_docstring_examples_run():
    assert doctest.testmod(delensing_bias).failed == 0
