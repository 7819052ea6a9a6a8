"""Progress callbacks of the long library calls: every step is reported in order, the result is unchanged,
and an exception raised by the callback stops the work (how the workbench cancels)."""

import numpy as np
import pytest

import lensrec

SMALL = lensrec.Experiment(name="small progress survey", noise_temperature=2.0, beam_fwhm=30.0, ell_min=2,
                           ell_max_temperature=32, ell_max_polarization=32)  # fmt: skip
SETTINGS = {"nside": 16, "lmax": 32, "lmax_margin": 16, "seed": 3, "nthreads": 1}


class Stop(Exception):
    pass


def test_simulation_reports_its_six_steps_and_keeps_its_result():
    calls = []
    sky = lensrec.simulate_sky(SMALL, progress=lambda done, total: calls.append((done, total)), **SETTINGS)
    assert calls == [(k, 6) for k in range(7)]
    plain = lensrec.simulate_sky(SMALL, **SETTINGS)
    np.testing.assert_array_equal(sky.maps, plain.maps)  # the callback changes nothing


def test_an_exception_from_progress_stops_the_simulation():
    def stop_at_lensing(done, total):
        if done == 2:
            raise Stop

    with pytest.raises(Stop):
        lensrec.simulate_sky(SMALL, progress=stop_at_lensing, **SETTINGS)


def test_reconstruction_reports_its_steps_and_stops_when_asked():
    sky = lensrec.simulate_sky(SMALL, **SETTINGS)
    calls = []
    result = lensrec.reconstruct(sky.maps, SMALL, estimator="TT", lmax_L=24, nthreads=1,
                                 progress=lambda done, total: calls.append((done, total)))  # fmt: skip
    assert calls == [(0, 2), (1, 2), (2, 2)]
    plain = lensrec.reconstruct(sky.maps, SMALL, estimator="TT", lmax_L=24, nthreads=1)
    np.testing.assert_array_equal(result.phi_alm, plain.phi_alm)

    def stop_after_filtering(done, total):
        if done == 1:
            raise Stop

    with pytest.raises(Stop):
        lensrec.reconstruct(sky.maps, SMALL, estimator="TT", lmax_L=24, nthreads=1, progress=stop_after_filtering)
