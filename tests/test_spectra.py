import numpy as np
import pytest

import lensrec
from lensrec.spectra import Spectra, load_spectra_file


def test_fiducial_loads_without_camb_and_records_its_recipe(fiducial):
    assert fiducial.lmax == 6000
    meta = fiducial.metadata
    assert meta["camb_version"]
    for key in ("H0", "ombh2", "omch2", "tau", "ns", "As", "mnu"):
        assert key in meta["parameters"]
    assert meta["camb_settings"]["lens_potential_accuracy"] == 1
    for group in (fiducial.unlensed, fiducial.lensed):
        for key in ("TT", "EE", "BB", "TE"):
            assert group[key][:2].tolist() == [0.0, 0.0]
    assert not fiducial.phi.flags.writeable


def test_fiducial_spectra_have_the_expected_shape_of_the_trade(fiducial):
    # common practice (no source): the TT first acoustic peak sits near l ~ 220 with D_l ~ 5700 uK^2.
    ell = np.arange(fiducial.lmax + 1)
    dl = ell * (ell + 1) * fiducial.lensed["TT"] / (2 * np.pi)
    peak = int(np.argmax(dl[2:500])) + 2
    assert 200 <= peak <= 240
    assert 5000 < dl[peak] < 6500
    # common practice: the lensing B-mode spectrum peaks near l ~ 1000 and is nearly white at ~5 uK-arcmin
    # below it, i.e. C_l^BB ~ (5 * pi/10800)^2 uK^2.
    bb = fiducial.lensed["BB"]
    dl_bb = ell * (ell + 1) * bb / (2 * np.pi)
    assert 800 <= int(np.argmax(dl_bb[2:3000])) + 2 <= 1300
    white = (5.0 * np.pi / 10800) ** 2
    assert 0.5 * white < np.mean(bb[100:500]) < 1.5 * white  # "about 5 uK-arcmin": a factor 1.5 in power
    assert np.all(fiducial.unlensed["BB"] == 0)
    # common practice: [L(L+1)]^2 C_L^pp / 2pi peaks near L ~ 40-60 at ~1.3e-7 (from memory)
    d_pp = (ell * (ell + 1)) ** 2 * fiducial.phi / (2 * np.pi)
    assert 30 <= int(np.argmax(d_pp[2:400])) + 2 <= 70
    assert 1.0e-7 < d_pp.max() < 1.6e-7


@pytest.mark.slow
def test_fiducial_file_matches_a_fresh_camb_run(fiducial):
    # reference library: camb, with the parameters in the file's header
    pytest.importorskip("camb")
    fresh = lensrec.spectra_from_camb(lmax=3000)
    for key in ("TT", "EE", "TE"):
        np.testing.assert_allclose(
            fresh.lensed[key][2:2500],
            fiducial.lensed[key][2:2500],
            rtol=1e-3,
            atol=1e-6 * np.abs(fiducial.lensed[key][2:2500]).max(),
        )  # camb lmax changes accuracy settings slightly
    np.testing.assert_allclose(fresh.phi[2:2500], fiducial.phi[2:2500], rtol=1e-3)


def test_truncated_and_cmb_with_tensors(fiducial):
    short = fiducial.truncated(1000)
    assert short.lmax == 1000
    cmb = fiducial.cmb(lensed=True, r=0.1)
    np.testing.assert_allclose(cmb["BB"], fiducial.lensed["BB"] + 0.1 * fiducial.tensor["BB"])
    with pytest.raises(ValueError, match="lmax must be <= 6000"):
        fiducial.truncated(7000)
    with pytest.raises(ValueError, match="r must be >= 0"):
        fiducial.cmb(r=-1)


def test_spectra_validation_rejects_bad_arrays(fiducial):
    good = {k: np.ones(10) for k in ("TT", "EE", "BB", "TE")}
    tensor = {k: np.ones(10) for k in ("TT", "EE", "BB")}
    Spectra(unlensed=good, lensed=good, phi=np.ones(10), tensor=tensor)
    bad = dict(good, TT=np.r_[np.ones(9), np.nan])
    with pytest.raises(ValueError, match="non-finite"):
        Spectra(unlensed=bad, lensed=good, phi=np.ones(10), tensor=tensor)
    with pytest.raises(ValueError, match="share one length"):
        Spectra(unlensed=good, lensed=good, phi=np.ones(11), tensor=tensor)
    with pytest.raises(ValueError, match="non-negative"):
        Spectra(unlensed=dict(good, EE=-np.ones(10)), lensed=good, phi=np.ones(10), tensor=tensor)
    with pytest.raises(ValueError, match="exactly the keys"):
        Spectra(unlensed={"TT": np.ones(10)}, lensed=good, phi=np.ones(10), tensor=tensor)


def test_corrupted_spectra_file_is_reported(tmp_path):
    path = tmp_path / "broken.txt"
    path.write_text('# parameters: {"columns": ["ell", "x"]}\n0 1\n1 2 3\n')
    with pytest.raises(ValueError, match="unreadable or corrupted|columns"):
        load_spectra_file(path)
    with pytest.raises(ValueError, match="does not exist"):
        load_spectra_file(tmp_path / "missing.txt")
