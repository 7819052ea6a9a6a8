"""lensrec: a workbench for CMB lensing reconstruction and delensing on the HEALPix sphere.

The public API is the list in ``__all__``; other modules are importable but not promised.
All results describe simulations of idealized surveys, not survey-ready measurements.
"""

from __future__ import annotations

from . import tracers as _tracers_module
from ._version import __version__
from .analytic_n1 import AnalyticN1, analytic_n1
from .bandpowers import LensingBandpowers, lensing_bandpowers
from .delensing import DelensingResult, delens, delens_maps, delensing_spectra
from .estimator_engine import quadratic_estimates
from .estimator_noise import ReconstructionNoise, reconstruction_noise
from .experiment import Experiment, available_experiments, load_experiment
from .filtering import FieldFilter, FilteredFields, IsotropicFilter
from .gradient_spectra import lensed_gradient_spectra
from .io import OutputExistsError
from .iterative_noise import IterativeNoise, iterative_reconstruction_noise
from .labels import COMPONENTS, ESTIMATORS, parse_estimators, uses_b_modes
from .lensed_spectra import delensed_spectra, first_order_lensed_bb, lensed_cmb_spectra
from .lensing_templates import lensing_b_template
from .masks import apodize_binary_mask, cap_mask, latitude_mask, load_mask, sky_fraction_moments
from .mean_field_average import MeanField, mean_field
from .optimal_filter import ConvergenceError, OptimalFilter
from .pixel_noise import PixelNoise, pixel_window
from .power import auto_spectrum, bin_spectrum, binned_cross_spectrum, cross_spectrum, mask_corrected
from .reconstruction import InputComparison, Reconstruction, compare_with_input, reconstruct, reconstruct_filtered
from .remapping import deflection_maps, kappa_map, lens_alm, lens_tqu_alm
from .report_bandpowers import bias_budget_table, plot_bias_budget
from .sky import SimulatedSky, simulate_sky
from .spectra import Spectra, fiducial_spectra, spectra_from_camb
from .suite_settings import lensing_suite_settings
from .suites import LensingSuite, open_lensing_suite, run_lensing_suite
from .tensor_forecast import TensorFisher, delensing_forecast, power_law_foreground_bb, sigma_r, tensor_fisher
from .tracers import *  # noqa: F403 (the tracer model's names, listed once in lensrec.tracers.__all__)
from .wiener_filters import wiener_filter_phi

# the tracer model's public names, as that module lists them (the shipped-tracer helpers stay in lensrec.tracers)
_TRACER_NAMES = tuple(name for name in _tracers_module.__all__ if name not in ("available_tracers", "TRACER_NOTE"))

__all__ = [
    "__version__",
    "ESTIMATORS",
    "COMPONENTS",
    "parse_estimators",
    "uses_b_modes",
    "Experiment",
    "available_experiments",
    "load_experiment",
    "OutputExistsError",
    "SimulatedSky",
    "simulate_sky",
    "lens_alm",
    "lens_tqu_alm",
    "deflection_maps",
    "kappa_map",
    "apodize_binary_mask",
    "cap_mask",
    "latitude_mask",
    "load_mask",
    "sky_fraction_moments",
    "PixelNoise",
    "pixel_window",
    "Spectra",
    "fiducial_spectra",
    "spectra_from_camb",
    "sigma_r",
    "tensor_fisher",
    "TensorFisher",
    "power_law_foreground_bb",
    *_TRACER_NAMES,
    "lensed_cmb_spectra",
    "lensed_gradient_spectra",
    "first_order_lensed_bb",
    "delensed_spectra",
    "delensing_forecast",
    "ReconstructionNoise",
    "reconstruction_noise",
    "IterativeNoise",
    "iterative_reconstruction_noise",
    "AnalyticN1",
    "analytic_n1",
    "DelensingResult",
    "lensing_b_template",
    "delens",
    "delens_maps",
    "delensing_spectra",
    "wiener_filter_phi",
    "FieldFilter",
    "FilteredFields",
    "IsotropicFilter",
    "OptimalFilter",
    "ConvergenceError",
    "Reconstruction",
    "MeanField",
    "reconstruct",
    "reconstruct_filtered",
    "InputComparison",
    "compare_with_input",
    "quadratic_estimates",
    "mean_field",
    "cross_spectrum",
    "auto_spectrum",
    "bin_spectrum",
    "binned_cross_spectrum",
    "mask_corrected",
    "LensingSuite",
    "lensing_suite_settings",
    "run_lensing_suite",
    "open_lensing_suite",
    "LensingBandpowers",
    "lensing_bandpowers",
    "bias_budget_table",
    "plot_bias_budget",
]
