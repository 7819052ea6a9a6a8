"""The workbench app: one shared state object and seven sections in tabs."""

from __future__ import annotations

import html

import ipywidgets as widgets

import lensrec

from .delensing_panel import DelensingSection
from .experiment_panel import ExperimentSection
from .export_panel import ExportSection
from .noise_panel import EstimatorNoiseSection
from .reconstruction_panel import ReconstructionSection
from .section import Section
from .sky_panel import SkySection
from .state import WorkbenchState
from .validation_panel import NEEDS as VALIDATION_NEEDS
from .validation_panel import ValidationSection

__all__ = ["Workbench", "library_function"]


def library_function(name: str):
    """The lensrec function ``name`` if this installation has it, else None."""
    return getattr(lensrec, name, None)


PURPOSES = {
    "reconstruction": "Reconstruct the lensing convergence from the simulated sky with a chosen estimator and compare "
    "it with the input, as maps and as spectra.",
    "validation": "Run a small suite of simulations and reconstructions to measure the biases of the lensing "
    "spectrum (mean field, N0, N1), the bandpowers against the input and the lensing amplitude.",
}


class MissingLibrarySection(Section):
    """Stands in for a section whose lensrec functions are not in this installation."""

    def __init__(self, state, title: str, name: str, needs: tuple[str, ...], purpose: str = ""):
        self.title, self.name = title, name
        super().__init__(state)
        missing = [n for n in needs if library_function(n) is None] or list(needs)
        names = ", ".join(f"<code>lensrec.{html.escape(n)}</code>" for n in missing)
        self.note = widgets.HTML(
            f"<p>{html.escape(purpose)}</p><p>This section needs {names}, which this lensrec installation does not "
            "provide yet. Update lensrec (<code>make install</code> in the repository) and restart the kernel to "
            "use it. The other sections work without it.</p>"
        )
        self.layout(controls=[self.note])
        self.status.warn(f"{title} is unavailable: lensrec lacks {', '.join(missing)}.")


class Workbench(widgets.VBox):
    """The lensrec workbench: Experiment, Estimator noise, Sky, Reconstruction, Delensing, Validation, Export.

    Parameters
    ----------
    experiment : str, path or lensrec.Experiment, optional
        Starting experiment (a shipped name such as ``"deep_highland"``, a TOML path, or an Experiment);
        default ``"deep_highland"``.
    spectra : lensrec.Spectra, optional
        Theory spectra; default the embedded fiducial cosmology.
    delay : float
        Quiet time in seconds before live plots recompute after a change (default 0.3).
    nthreads : int, optional
        Threads for lensrec's transforms and sums (default: ``LENSREC_NTHREADS`` or all cores).

    Attributes
    ----------
    state : WorkbenchState
        The shared data every section reads and writes.
    sections : dict of str to Section
        ``"experiment"``, ``"noise"``, ``"sky"``, ``"reconstruction"``, ``"delensing"``, ``"validation"``,
        ``"export"``.

    Examples
    --------
    >>> from widgets import Workbench
    >>> app = Workbench()
    >>> list(app.sections)[0]
    'experiment'
    """

    def __init__(self, experiment="deep_highland", spectra=None, delay: float = 0.3, nthreads=None):
        self.state = WorkbenchState(experiment=experiment, spectra=spectra)
        self.sections = {"experiment": ExperimentSection(self.state)}
        plan = (
            ("noise", "Estimator noise", ("reconstruction_noise",),
             lambda: EstimatorNoiseSection(self.state, delay=delay, nthreads=nthreads)),
            ("sky", "Sky", ("simulate_sky", "deflection_maps", "latitude_mask", "cap_mask"),
             lambda: SkySection(self.state, nthreads=nthreads)),
            ("reconstruction", "Reconstruction", ("reconstruct", "wiener_filter_phi", "kappa_map"),
             lambda: ReconstructionSection(self.state, nthreads=nthreads)),
            ("delensing", "Delensing", ("delensing_forecast",),
             lambda: DelensingSection(self.state, nthreads=nthreads)),
            ("validation", "Validation", VALIDATION_NEEDS, lambda: ValidationSection(self.state, nthreads=nthreads)),
        )  # fmt: skip
        for name, title, needs, build in plan:
            available = build is not None and all(library_function(n) is not None for n in needs)
            if available:
                self.sections[name] = build()
            else:
                self.sections[name] = MissingLibrarySection(self.state, title, name, needs, PURPOSES.get(name, ""))
        self.sections["export"] = ExportSection(self.state, self.sections)
        self.tabs = widgets.Tab(
            children=[s.panel for s in self.sections.values()], titles=[s.title for s in self.sections.values()]
        )
        self.tabs.add_class("lensrec-tabs")
        header = widgets.HTML(
            f"<div style='font-size:120%;font-weight:600'>lensrec workbench "
            f"<span style='font-weight:400;color:#7f8c8d;font-size:80%'>v{html.escape(lensrec.__version__)} · "
            "simulated skies of idealized surveys</span></div>"
        )
        super().__init__([header, self.tabs])
        self.add_class("lensrec-workbench")

    def __getitem__(self, name: str) -> Section:
        return self.sections[name]

    def wait(self, timeout: float = 120.0) -> bool:
        """Wait for all background work in every section (test hook); True when everything finished."""
        return all([section.wait(timeout) for section in self.sections.values()])
