"""The mean-field of quadratic-estimator reconstructions: the average ⟨φ̂⟩ (and ⟨Ω̂⟩) of simulations.

Subtract it from a reconstruction with ``reconstruct(..., mean_field=...)`` (:mod:`lensrec.reconstruction`).
References: Hanson, Challinor & Lewis 2010, GRG 42, 2197; Namikawa, Hanson & Takahashi 2013, MNRAS 431, 609.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .estimator_engine import _readonly
from .estimator_weights import COMPONENTS

__all__ = ["MeanField", "mean_field"]


@dataclass(frozen=True, eq=False)
class MeanField:
    """The average of normalized reconstructions of simulations: the estimate's mean-field ⟨φ̂⟩.

    Attributes
    ----------
    phi_alm, curl_alm : complex ndarray, shape (nalm(lmax_L),)
    estimator : str
    lmax_L : int
    count : int
        Number of simulations averaged; the mean-field estimate carries noise N0/count per mode.
    """

    phi_alm: np.ndarray
    curl_alm: np.ndarray
    estimator: str
    lmax_L: int
    count: int

    def alm(self, component: str = "gradient") -> np.ndarray:
        if component not in COMPONENTS:
            raise ValueError(f"component must be one of {COMPONENTS}, got {component!r}")
        return self.phi_alm if component == "gradient" else self.curl_alm


def _check_mean_field(mean_field, estimator: str, lmax_L: int):
    if mean_field is None:
        return None
    if not isinstance(mean_field, MeanField):
        raise TypeError(f"mean_field must be a MeanField (from lensrec.mean_field), got {type(mean_field).__name__}")
    if mean_field.estimator != estimator or mean_field.lmax_L != lmax_L:
        raise ValueError(
            f"mean_field is for estimator {mean_field.estimator!r} to lmax_L={mean_field.lmax_L}, but "
            f"this reconstruction uses {estimator!r} to lmax_L={lmax_L}"
        )
    return mean_field


def mean_field(reconstructions) -> MeanField:
    """The mean-field ⟨φ̂⟩ (and ⟨Ω̂⟩): the average of normalized reconstructions of simulations.

    A mask, inhomogeneous noise or any other statistical anisotropy makes the quadratic estimate non-zero
    on average even without lensing; subtract it with ``reconstruct(..., mean_field=...)``. Simulations
    must share the data's estimator, lmax_L, mask, filter and noise; reuse of the same simulations for the
    mean-field and for the estimate biases the result, so keep them apart. The average of N simulations
    carries noise N0/N per mode.

    Parameters
    ----------
    reconstructions : iterable of Reconstruction
        Reconstructions (without mean-field subtraction) of one estimator and lmax_L.

    Returns
    -------
    MeanField

    Raises
    ------
    TypeError, ValueError
        Empty input, objects that are not Reconstruction, mixed estimators or lmax_L, inputs that already
        had a mean-field subtracted.

    References
    ----------
    Hanson, Challinor & Lewis 2010, GRG 42, 2197 (mean-field of masked skies); Namikawa, Hanson & Takahashi
    2013, MNRAS 431, 609.
    """
    from .reconstruction import Reconstruction

    items = list(reconstructions)
    if not items:
        raise ValueError("mean_field needs at least one reconstruction, got none")
    phi = None
    for k, item in enumerate(items):
        if not isinstance(item, Reconstruction):
            raise TypeError(f"reconstructions[{k}] must be a Reconstruction, got {type(item).__name__}")
        if item.mean_field_subtracted:
            raise ValueError(f"reconstructions[{k}] already had a mean-field subtracted; average raw reconstructions")
        if item.estimator != items[0].estimator or item.lmax_L != items[0].lmax_L:
            raise ValueError(
                f"reconstructions[{k}] is {item.estimator} to lmax_L={item.lmax_L}, but the first is "
                f"{items[0].estimator} to lmax_L={items[0].lmax_L}"
            )
        if phi is None:
            phi = np.array(item.phi_alm, dtype=np.complex128)
            curl = np.array(item.curl_alm, dtype=np.complex128)
        else:
            phi += item.phi_alm
            curl += item.curl_alm
    count = len(items)
    return MeanField(
        phi_alm=_readonly(phi / count),
        curl_alm=_readonly(curl / count),
        estimator=items[0].estimator,
        lmax_L=items[0].lmax_L,
        count=count,
    )
