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
    # bins L = 100–1000 (~10⁶ modes each side of 300): the estimator noise of the cross with the input is
    # ~0.1–0.2% there with 2 simulations, so 0.5% separates a percent-level bias from none; L = 30–100 holds
    # too few modes for 0.5% with 2 simulations and is not asserted
    assert np.all(np.abs(gradient[1:]) < 0.005), gradient
