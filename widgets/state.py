"""The one object through which workbench sections share data.

Sections never read one another's widgets. A section writes its result into the state; others observe the
traits they depend on (traitlets ``observe``) and redraw or mark their own results as out of date.
"""

from __future__ import annotations

import traitlets

import lensrec

__all__ = ["WorkbenchState"]


class WorkbenchState(traitlets.HasTraits):
    """Shared workbench data.

    Attributes
    ----------
    spectra : lensrec.Spectra
        Theory spectra every section uses (the embedded fiducial cosmology by default).
    experiment : lensrec.Experiment
        The experiment as last validated by the Experiment section.
    noise : object or None
        The latest reconstruction-noise result (from ``lensrec.reconstruction_noise``) for ``experiment``.
    sky : object or None
        The latest simulated sky (from ``lensrec.simulate_sky``).
    sky_experiment : lensrec.Experiment or None
        The experiment the sky was simulated with; reconstruction filters use this one so they match the maps.
    reconstruction : object or None
        The latest lensing reconstruction of ``sky``.
    delensing : object or None
        The latest delensing products (template, spectra, forecast).
    validation : object or None
        The latest simulation-suite summary.
    """

    spectra = traitlets.Instance(lensrec.Spectra)
    experiment = traitlets.Instance(lensrec.Experiment)
    noise = traitlets.Any(None, allow_none=True)
    sky = traitlets.Any(None, allow_none=True)
    sky_experiment = traitlets.Instance(lensrec.Experiment, allow_none=True)
    reconstruction = traitlets.Any(None, allow_none=True)
    delensing = traitlets.Any(None, allow_none=True)
    validation = traitlets.Any(None, allow_none=True)

    def __init__(self, experiment=None, spectra=None):
        experiment = lensrec.load_experiment(experiment) if experiment is not None else lensrec.Experiment()
        super().__init__(spectra=spectra if spectra is not None else lensrec.fiducial_spectra(), experiment=experiment)
