import os

import numpy as np
import pytest

os.environ.setdefault("LENSREC_NTHREADS", "2")
os.environ.setdefault("MPLBACKEND", "Agg")

ARTIFACTS = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "test-artifacts")


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def fiducial():
    import lensrec

    return lensrec.fiducial_spectra()


@pytest.fixture(scope="session")
def artifacts_dir():
    os.makedirs(ARTIFACTS, exist_ok=True)
    return ARTIFACTS
