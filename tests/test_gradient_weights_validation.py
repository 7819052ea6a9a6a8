"""Normalization of the TT estimator with lensed-gradient weights on noise-free simulations (``make validate``).

Lewis, Challinor & Hanson 2011 (JCAP 03, 018): with lensed-gradient spectra in the weights the estimator's
normalization is unbiased at high ℓ_max, where lensed-C weights leave a bias of order a percent. Measured
figures: docs/validation.md, section "Lensed-gradient weights".
"""

import importlib.util
import pathlib

import numpy as np
import pytest

SCRIPT = pathlib.Path(__file__).resolve().parent.parent / "benchmarks" / "gradient_weights_bias.py"


def _measure(**kwargs):
    spec = importlib.util.spec_from_file_location("gradient_weights_bias", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.measure(progress=None, **kwargs)


@pytest.mark.validate
@pytest.mark.slow
def test_gradient_weights_normalization_is_unbiased_at_lmax_3000():
    ratios = _measure(lmax=3000, margin=1000, sims=2, seed=7, nthreads=2)
    gradient = ratios["gradient"].mean(axis=0) - 1.0
    lensed = ratios["lensed"].mean(axis=0) - 1.0
    # bins (30, 100, 300, 600, 1000); measured scatter of one simulation's cross/input: 0.25% at L = 300–1000,
    # 0.7% at L = 100–300, 1% at L = 30–100 (6 simulations, docs/validation.md), so with 2 simulations only
    # L = 300–1000 resolve 0.5% (2-simulation error 0.18%, 0.5% is 2.7 sigma)
    assert np.all(np.abs(gradient[2:]) < 0.005), gradient
    # the bias the gradient weights remove: lensed weights read 1.1–1.4% low there (from memory: Lewis, Challinor &
    # Hanson 2011 find a percent-level bias of lensed weights at high l_max); -0.7% keeps the check sensitive
    assert np.all(lensed[2:] < -0.007), lensed
