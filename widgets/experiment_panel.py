"""Section 1 – Experiment: noise, beam, multipole cuts and 1/f; shipped examples; TOML load and save.

The plot shows the lensed CMB spectra and the beam-deconvolved noise spectra of the current experiment as
D_ℓ = ℓ(ℓ+1)C_ℓ/2π in µK² on log axes. Noise curves stop where a field's multipole cuts exclude it.
"""

from __future__ import annotations

import contextlib
import math
import os

import ipywidgets as widgets
import numpy as np

import lensrec

from .plotting import COLORS, WIDE, FigureView, d_ell, finite_or_nan, style_axes
from .section import Section, column, heading, labelled, row
from .work import LiveUpdate, guarded

__all__ = ["ExperimentSection"]

CUSTOM = ""
PLOT_LMAX = 5000
# field name -> (widget kind, label); labels are words and rendered math, with units
CONTROLS = {
    "noise_temperature": ("float", r"$\Delta_T$ (µK-arcmin)"),
    "noise_polarization": ("float", r"$\Delta_P$ (µK-arcmin)"),
    "beam_fwhm": ("float", "beam FWHM (arcmin)"),
    "ell_min": ("int", r"lowest $\ell$"),
    "ell_max_temperature": ("int", r"highest $\ell$ of T"),
    "ell_max_polarization": ("int", r"highest $\ell$ of E, B"),
    "ell_knee_temperature": ("float", r"$\ell_\mathrm{knee}$ of T (0 = off)"),
    "alpha_knee_temperature": ("float", r"$\alpha_\mathrm{knee}$ of T (< 0)"),
    "ell_knee_polarization": ("float", r"$\ell_\mathrm{knee}$ of E, B (0 = off)"),
    "alpha_knee_polarization": ("float", r"$\alpha_\mathrm{knee}$ of E, B (< 0)"),
    "sky_fraction": ("float", r"sky fraction $f_\mathrm{sky}$"),
}


class ExperimentSection(Section):
    title = "Experiment"
    name = "experiment"
    guide = (
        "Pick a shipped example or set the survey by hand. Noise levels are white-noise depths in "
        r"µK-arcmin; the optional 1/f term multiplies the noise power by $1 + (\ell/\ell_\mathrm{knee})^{\alpha}$. "
        "Each change is checked at once: an invalid setting is reported below and the previous experiment is "
        "kept. Editing an example renames it (“… (modified)”) so titles never show a survey that was changed."
    )

    def __init__(self, state, delay: float = 0.05):
        super().__init__(state)
        self._suspended = False
        self._example = None
        names = lensrec.available_experiments()
        self.picker = labelled(
            widgets.Dropdown(
                options=[("custom settings", CUSTOM)] + [(n, n) for n in names], value=CUSTOM, description="example"
            ),
            "24em",
        )
        self.picker.add_class("lensrec-experiment-picker")
        self.name_box = labelled(widgets.Text(description="name", continuous_update=False), "24em")
        self.controls = {}
        for key, (kind, label) in CONTROLS.items():
            box = widgets.IntText if kind == "int" else widgets.FloatText
            control = labelled(box(description=label, continuous_update=False), "18em")
            control.add_class(f"lensrec-{key.replace('_', '-')}")
            self.controls[key] = control
        self.sqrt2 = widgets.Checkbox(description=r"$\Delta_P = \sqrt{2}\,\Delta_T$", indent=False,
                                      layout=widgets.Layout(width="10em", min_width="10em"))  # fmt: skip
        self.path_box = widgets.Text(
            description="TOML file",
            placeholder="my_survey.toml",
            style={"description_width": "6em"},
            layout=widgets.Layout(width="26em", min_width="26em"),
        )
        self.load_button = widgets.Button(description="Load", icon="folder-open",
                                          layout=widgets.Layout(width="7em", min_width="7em"))  # fmt: skip
        self.save_button = widgets.Button(description="Save", icon="save",
                                          layout=widgets.Layout(width="7em", min_width="7em"))  # fmt: skip
        self.overwrite = widgets.Checkbox(description="overwrite", indent=False,
                                          layout=widgets.Layout(width="8em", min_width="8em"))  # fmt: skip

        self.view = FigureView(WIDE, name="experiment-spectra")
        self._build_figure()
        self.plot_update = LiveUpdate(self._redraw, self.status, "Drawing the noise spectra", delay=delay)
        self.live.append(self.plot_update)

        self._show_experiment(state.experiment)
        for control in (*self.controls.values(), self.sqrt2, self.name_box):
            control.observe(self._on_control, names="value")
        self.picker.observe(self._on_pick, names="value")
        self.load_button.on_click(guarded(self.status, "Loading the TOML file")(self._on_load))
        self.save_button.on_click(guarded(self.status, "Saving the TOML file")(self._on_save))
        state.observe(self._on_experiment, names="experiment")

        c = self.controls
        temperature = column(
            [
                heading("Temperature"),
                c["noise_temperature"],
                c["ell_max_temperature"],
                c["ell_knee_temperature"],
                c["alpha_knee_temperature"],
            ]
        )
        polarization = column(
            [
                heading("Polarization"),
                row([c["noise_polarization"], self.sqrt2], align="center"),
                c["ell_max_polarization"],
                c["ell_knee_polarization"],
                c["alpha_knee_polarization"],
            ]
        )
        common = column([heading("Beam, range, sky"), c["beam_fwhm"], c["ell_min"], c["sky_fraction"]])
        self.layout(
            controls=[
                row([self.picker, self.name_box]),
                row([temperature, polarization, common]),
                row([self.path_box, self.load_button, self.save_button, self.overwrite], align="center"),
            ],
            outputs=[self.view.widget],
        )
        self.plot_update.trigger()

    # ------------------------------------------------------------------------------ widgets → state
    def read_experiment(self) -> lensrec.Experiment:
        """The experiment described by the controls (raises lensrec's ValueError/TypeError if invalid)."""
        values = {key: control.value for key, control in self.controls.items()}
        if self.sqrt2.value:
            values["noise_polarization"] = None
        return lensrec.Experiment(name=self.name_box.value.strip() or "custom", **values)

    def _on_control(self, change) -> None:
        if self._suspended:
            return
        self.controls["noise_polarization"].disabled = self.sqrt2.value
        try:
            experiment = self.read_experiment()
        except (ValueError, TypeError) as exc:
            self.status.error(f"Experiment not updated: {' '.join(str(exc).split())}")
            return
        if change["owner"] is not self.name_box:
            experiment = self._renamed_if_modified(experiment)
        self.state.experiment = experiment
        self.status.ok(f"Experiment updated: {_summary(experiment)}.")

    def _renamed_if_modified(self, experiment: lensrec.Experiment) -> lensrec.Experiment:
        """A shipped example whose settings were edited gets " (modified)" added to its name (shown at once)."""
        example = self._example
        if example is None or experiment.name != example.name or experiment == example:
            return experiment
        renamed = experiment.replace(name=f"{example.name} (modified)")
        with self._suspend():
            self.name_box.value = renamed.name
        return renamed

    def _on_pick(self, change) -> None:
        if self._suspended or not change["new"]:
            return
        try:
            experiment = lensrec.load_experiment(change["new"])
        except (ValueError, TypeError) as exc:
            self.status.error(f"Could not load the example {change['new']!r}: {exc}")
            return
        self._show_experiment(experiment)
        self.state.experiment = experiment
        self.status.ok(f"Loaded the example {change['new']!r}: {_summary(experiment)}.")

    def _on_load(self, _button) -> None:
        path = self._path()
        experiment = lensrec.Experiment.from_toml(path)
        self.state.experiment = experiment
        self._show_experiment(experiment)
        self.status.ok(f"Loaded {path}: {_summary(experiment)}.")

    def _on_save(self, _button) -> None:
        path = self._path()
        try:
            self.state.experiment.to_toml(path, force=self.overwrite.value)
        except lensrec.OutputExistsError:
            self.status.error(f"{path} already exists; tick 'overwrite' to replace it, or choose another file name.")
            return
        self.status.ok(f"Saved the experiment to {path}.")

    def _path(self) -> str:
        text = self.path_box.value.strip()
        if not text:
            raise ValueError("the TOML file name is empty; type a path such as my_survey.toml")
        return os.path.abspath(os.path.expanduser(text))

    # ------------------------------------------------------------------------------ state → widgets
    @contextlib.contextmanager
    def _suspend(self):
        previous, self._suspended = self._suspended, True
        try:
            yield
        finally:
            self._suspended = previous

    def _show_experiment(self, experiment: lensrec.Experiment) -> None:
        with self._suspend():
            self.picker.value = _shipped_name(experiment)
            if self.picker.value != CUSTOM:
                self._example = experiment  # edits to it are renamed, so titles never show a changed example
            self.name_box.value = experiment.name
            for key, control in self.controls.items():
                control.value = getattr(experiment, key)
            derived = math.isclose(
                experiment.noise_polarization, math.sqrt(2.0) * experiment.noise_temperature, rel_tol=1e-9
            )
            self.sqrt2.value = derived
            self.controls["noise_polarization"].disabled = derived

    def _on_experiment(self, change) -> None:
        self._show_experiment(change["new"])
        self.plot_update.trigger()

    # ------------------------------------------------------------------------------------- the plot
    def _build_figure(self) -> None:
        figure = self.view.figure
        figure.subplots_adjust(left=0.1, right=0.97, bottom=0.13, top=0.9)
        ax = self.ax = figure.add_subplot()
        ell = np.arange(PLOT_LMAX + 1)
        self.lines = {}
        for key in ("TT", "EE", "BB"):
            (self.lines[key],) = ax.plot(
                ell, np.full(ell.size, np.nan), color=COLORS[key], lw=1.6, label=f"lensed {key}"
            )
        for key, label in (("T", "noise T"), ("P", "noise E, B")):
            color = COLORS["TT"] if key == "T" else COLORS["EE"]
            (self.lines[f"noise {key}"],) = ax.plot(
                ell, np.full(ell.size, np.nan), color=color, lw=1.3, ls="--", label=label
            )
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlim(2, PLOT_LMAX)
        ax.set_ylim(1e-5, 1e5)
        ax.set_xlabel("multipole ℓ")
        ax.set_ylabel(r"$D_\ell = \ell(\ell+1)C_\ell/2\pi$  [µK²]")
        self.plot_title = ax.set_title("", fontsize=10)
        ax.legend(loc="upper center", fontsize=8, ncol=5, frameon=False)
        style_axes(ax)

    def plotted(self) -> dict[str, np.ndarray]:
        """The y data of every curve, by legend key (tests compare it with the library's spectra)."""
        return {key: np.asarray(line.get_ydata(), dtype=float) for key, line in self.lines.items()}

    def _redraw(self) -> None:
        experiment, spectra = self.state.experiment, self.state.spectra
        lensed = spectra.cmb(lensed=True)
        top = min(PLOT_LMAX, spectra.lmax)
        for key in ("TT", "EE", "BB"):
            y = np.full(PLOT_LMAX + 1, np.nan)
            y[2 : top + 1] = d_ell(lensed[key][: top + 1])[2:]
            self.lines[key].set_ydata(y)
        for key, field in (("T", "T"), ("P", "E")):
            y = d_ell(finite_or_nan(experiment.noise_spectrum(field, PLOT_LMAX)))
            y[:2] = np.nan
            self.lines[f"noise {key}"].set_ydata(y)
        self.plot_title.set_text(_summary(experiment))
        self.view.draw()


def _shipped_name(experiment: lensrec.Experiment) -> str:
    """The shipped example equal to ``experiment``, or CUSTOM."""
    for name in lensrec.available_experiments():
        if lensrec.load_experiment(name) == experiment:
            return name
    return CUSTOM


def _summary(experiment: lensrec.Experiment) -> str:
    return (
        f"{experiment.name}: Δ_T = {experiment.noise_temperature:.3g}, Δ_P = {experiment.noise_polarization:.3g} "
        f"µK-arcmin, beam {experiment.beam_fwhm:.3g}′, ℓ {experiment.ell_min}–"
        f"{max(experiment.ell_max_temperature, experiment.ell_max_polarization)}, "
        f"sky fraction {experiment.sky_fraction:.2g}"
    )
