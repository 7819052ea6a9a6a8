"""Section 6 – Validation: a small simulation suite, the lensing-spectrum bias budget and A_lens.

The suite (simulate → filter → reconstruct, cached in a folder and resumable) runs in the background with
a progress bar per stage and a Cancel button; the bandpowers, the bias terms (mean field, RDN0, Monte-Carlo
N0, N1, analytic N0), the normalization correction and the amplitude fit all come from lensrec.
"""

from __future__ import annotations

import html
import os
import tempfile

import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec import bandpowers
from lensrec.labels import COMPONENTS, ESTIMATORS, SUITE_STAGES

from .plotting import COLORS, PAIR, FigureView, phi_plot_units, set_log_range, style_axes
from .section import Section, heading, labelled
from .work import Cancelled, LongTask

__all__ = ["ValidationSection", "NEEDS"]

NEEDS = ("lensing_suite_settings", "run_lensing_suite", "lensing_bandpowers")
TERM_STYLE = {  # term → (label, color)
    "rdn0": ("RDN0", "#2874a6"),
    "mc_n0": ("Monte-Carlo N0", "#85c1e9"),
    "analytic_n0": ("analytic N0", COLORS["noise"]),
    "n1": ("N1", "#ca6f1e"),
    "mean_field": ("mean field", "#7d3c98"),
}


def _default_margin() -> int:
    from lensrec import sky

    return int(getattr(sky, "DEFAULT_LMAX_MARGIN", 1000))


class ValidationSection(Section):
    title = "Validation"
    name = "validation"
    guide = (
        "Run a small suite of simulations of the current experiment: one 'data' sky and n_sims simulations, each "
        "filtered and reconstructed. The suite debiases the data's lensing spectrum (half-split mean field, "
        "realization-dependent N0, N1 from pairs of simulations sharing φ, the normalization correction) and fits "
        "A_lens. Results are cached in the folder: Cancel keeps what is finished, Run again resumes."
    )

    def __init__(self, state, nthreads=None):
        super().__init__(state)
        self.nthreads = nthreads
        self.result = None
        self.suite = None
        self.n_sims = labelled(widgets.IntText(value=8, description="n_sims"), "16em")
        self.n_sims.add_class("lensrec-validation-n-sims")
        self.executor = labelled(widgets.Dropdown(options=[("serial (in this kernel)", "serial"),
                                                           ("worker processes", "processes")],
                                                  value="serial", description="executor"), "24em")  # fmt: skip
        self.workers = labelled(widgets.IntText(value=2, description="workers"), "16em")
        self.estimator = labelled(widgets.Dropdown(options=list(ESTIMATORS), value="MV", description="estimator"),
                                  "16em")  # fmt: skip
        self.component = widgets.ToggleButtons(options=list(COMPONENTS), value="gradient")
        self.nside = labelled(widgets.Dropdown(options=[32, 64, 128, 256], value=64, description="nside"), "16em")
        self.lmax = labelled(widgets.IntText(value=128, description="lmax"), "16em")
        self.lmax_L = labelled(widgets.IntText(value=0, description="lmax_L (0 = lmax)"), "16em")
        # lensing B modes at ℓ ≤ lmax are made from E and φ far above lmax: keep the library's margin
        self.lmax_margin = labelled(widgets.IntText(value=_default_margin(), description="lmax_margin",
                                                    tooltip="extra multipoles of E and φ simulated above lmax"),
                                    "16em")  # fmt: skip
        self.seed = labelled(widgets.IntText(value=0, description="seed"), "16em")
        self.n1 = widgets.Checkbox(value=False, description="estimate N1 (two extra reconstructions per simulation)",
                                   indent=False, layout=widgets.Layout(width="30em"))  # fmt: skip
        self.folder = widgets.Text(value="", placeholder="(a new temporary folder)", description="suite folder",
                                   style={"description_width": "11em"}, layout=widgets.Layout(width="40em"))  # fmt: skip
        self.replace = widgets.Checkbox(value=False, description="replace a different suite in this folder",
                                        indent=False, layout=widgets.Layout(width="24em"))  # fmt: skip
        self.run_button = widgets.Button(description="Run suite", icon="play", button_style="primary")
        self.run_button.add_class("lensrec-run-suite")
        self.cancel_button = widgets.Button(description="Cancel", icon="stop", button_style="warning")
        self.cancel_button.add_class("lensrec-cancel-suite")
        self.task = LongTask(self.run_button, self.status, "Running the simulation suite", "validation",
                             cancel_button=self.cancel_button)  # fmt: skip
        self.tasks.append(self.task)
        self.table = widgets.HTML()
        self.table.add_class("lensrec-bias-table")
        self.view = FigureView(PAIR, name="validation")
        self._build_figure()

        self.nside.observe(lambda change: setattr(self.lmax, "value", 2 * change["new"]), names="value")
        self.run_button.on_click(lambda _button: self.run())
        self.layout(
            controls=[
                widgets.HBox([
                    widgets.VBox([heading("Suite"), self.n_sims, self.executor, self.workers, self.seed]),
                    widgets.VBox([heading("Analysis"), self.estimator, self.nside, self.lmax, self.lmax_L,
                                  self.lmax_margin]),
                ]),
                self.n1,
                widgets.HBox([self.folder, self.replace]),
                widgets.HBox([widgets.Label("show", layout=widgets.Layout(width="3em")), self.component]),
                widgets.HBox([self.run_button, self.cancel_button, self.task.widget]),
            ],
            outputs=[self.view.widget, self.table],
        )  # fmt: skip
        self.view.show_note("No suite yet: choose its size and executor above and press <b>Run suite</b>. "
                            "8 simulations at nside 64 take well under a minute.")  # fmt: skip

    # -------------------------------------------------------------------------------------- run
    def suite_folder(self) -> str:
        """The suite folder from the control, or a new temporary folder (remembered in the control)."""
        text = self.folder.value.strip()
        if not text:
            text = tempfile.mkdtemp(prefix="lensrec-suite-")
            self.folder.value = text
        return os.path.abspath(os.path.expanduser(text))

    def run(self) -> bool:
        """Start (or resume) the suite in the background (what Run suite does)."""
        experiment = self.state.experiment
        settings_args = {
            "nside": self.nside.value, "lmax": self.lmax.value, "lmax_L": self.lmax_L.value or None,
            "estimators": (self.estimator.value,), "n_sims": self.n_sims.value, "seed": self.seed.value,
            "n1": self.n1.value, "lmax_margin": self.lmax_margin.value,
        }  # fmt: skip
        executor, workers = self.executor.value, self.workers.value
        estimator, component, force = self.estimator.value, self.component.value, self.replace.value
        folder = self.suite_folder()

        def work(report, cancel):
            settings = lensrec.lensing_suite_settings(experiment, **settings_args)

            def progress(done, total, stage):
                fraction = (SUITE_STAGES.index(stage) + (done / total if total else 1.0)) / len(SUITE_STAGES)
                report(0.9 * fraction, f"{stage}: {done}/{total}", check_cancel=False)

            suite = lensrec.run_lensing_suite(settings, folder, executor=executor, workers=workers,
                                              progress=progress, cancel=cancel, force=force)  # fmt: skip
            if cancel.is_set() or not suite.complete:
                raise Cancelled(f"The suite was cancelled; what finished is cached in {folder}. Press Run suite "
                                "again to resume from there.")  # fmt: skip
            report(0.92, "bandpowers and bias budget…")
            return suite, lensrec.lensing_bandpowers(suite, estimator=estimator, component=component)

        def finish(outcome):
            self.suite, self.result = outcome
            self.state.validation = self.result
            self._draw()
            result = self.result
            if result.amplitude is None:
                return (f"Curl null test of {estimator}: χ² = {result.chi2:.1f} for {result.dof} bandpowers "
                        f"(PTE {result.pte:.2f}).")  # fmt: skip
            return (
                f"{result.n_sims} simulations, {estimator}: A_lens = {result.amplitude:.3f} ± "
                f"{result.amplitude_error:.3f}; χ² = {result.chi2:.1f} for {result.dof} (PTE {result.pte:.2f})."
            )

        return self.task.start(work, finish)

    # --------------------------------------------------------------------------------- the plots
    def _build_figure(self) -> None:
        figure = self.view.figure
        figure.subplots_adjust(left=0.08, right=0.98, bottom=0.14, top=0.9, wspace=0.27)
        self.ax_bias, self.ax_bands = figure.subplots(1, 2)
        (self.signal_line,) = self.ax_bias.plot([], [], "o-", color=COLORS["signal"], lw=2.5, ms=4, label="signal")
        (self.raw_line,) = self.ax_bias.plot([], [], "s-", color=COLORS["phi"], lw=1.0, ms=3, label="raw")
        self.term_lines = {}
        for key, (label, color) in TERM_STYLE.items():
            (self.term_lines[key],) = self.ax_bias.plot([], [], "o-", color=color, lw=1.0, ms=3, label=label)
        self.ax_bias.set_xscale("log")
        self.ax_bias.set_yscale("log")
        self.ax_bias.set_xlabel("lensing multipole L (band centers)")
        self.ax_bias.set_ylabel(r"$|{\rm term}|$  in $[L(L+1)]^2 C_L / 2\pi$")
        self.ax_bias.set_title("bias budget per bandpower", fontsize=9.5)
        (self.theory_line,) = self.ax_bands.plot(
            [], [], color=COLORS["signal"], lw=2.5, label=r"fiducial $C_L^{\phi\phi}$"
        )
        (self.fit_line,) = self.ax_bands.plot([], [], color=COLORS["phi"], lw=1.0, ls="--", label="A_lens × fiducial")
        self.bands = None
        self.ax_bands.axhline(0.0, color=COLORS["grid"], lw=0.8)
        self.ax_bands.set_xscale("log")
        self.ax_bands.set_xlabel("lensing multipole L")
        self.ax_bands.set_ylabel(r"$[L(L+1)]^2 C_L / 2\pi$")
        self.bands_title = self.ax_bands.set_title("", fontsize=9.5)
        for ax in (self.ax_bias, self.ax_bands):
            style_axes(ax)

    def plotted(self) -> dict:
        """Drawn data: the bandpowers with errors and every bias term (tests compare with lensrec)."""
        out = {"raw": np.asarray(self.raw_line.get_ydata()), "signal": np.asarray(self.signal_line.get_ydata())}
        for key, line in self.term_lines.items():
            out[key] = np.asarray(line.get_ydata())
        if self.bands is not None:
            segments = self.bands.lines[2][0].get_segments()
            out["bandpowers"] = np.asarray(self.bands.lines[0].get_ydata())
            out["errors"] = np.array([(s[1][1] - s[0][1]) / 2.0 for s in segments])
            out["L_eff"] = np.asarray(self.bands.lines[0].get_xdata())
        return out

    def _draw(self) -> None:
        result = self.result
        L_eff = np.asarray(result.L_eff)
        self.signal_line.set_data(L_eff, np.where(result.theory > 0, result.theory, np.nan))
        self.raw_line.set_data(L_eff, np.abs(result.raw))
        for key, line in self.term_lines.items():
            values = np.abs(np.asarray(result.terms[key], dtype=float))
            line.set_data(L_eff, np.where(values > 0, values, np.nan))
            line.set_visible(key != "n1" or result.n1_computed)
        self.ax_bias.legend(handles=[h for h in [self.signal_line, self.raw_line, *self.term_lines.values()]
                                     if h.get_visible()], fontsize=7.5, frameon=False, ncol=2)  # fmt: skip
        edges = result.binning.edges
        set_log_range(self.ax_bias, edges[0], edges[-1])
        self.ax_bias.relim()
        self.ax_bias.autoscale_view(scalex=False)

        if self.bands is not None:
            self.bands.remove()
        self.bands = self.ax_bands.errorbar(L_eff, result.debiased, yerr=result.errors, fmt="o",
                                            color=COLORS["reconstructed"], ms=4, capsize=2,
                                            label="debiased data ± 1σ")  # fmt: skip
        L = np.arange(int(edges[0]), int(edges[-1]))
        theory = phi_plot_units(self.state.spectra.phi[: int(edges[-1])], "phi")[L]
        if result.amplitude is not None:
            self.theory_line.set_data(L, theory)
            self.fit_line.set_data(L, result.amplitude * theory)
        else:
            self.theory_line.set_data([], [])
            self.fit_line.set_data([], [])
        set_log_range(self.ax_bands, edges[0], edges[-1])
        self.ax_bands.relim()
        self.ax_bands.autoscale_view(scalex=False)
        self.ax_bands.legend(fontsize=7.5, frameon=False)
        label = (f"A_lens = {result.amplitude:.2f} ± {result.amplitude_error:.2f}" if result.amplitude is not None
                 else "curl null test")  # fmt: skip
        self.bands_title.set_text(f"{result.estimator} {result.component} bandpowers – {label}")
        self.view.draw()
        self._fill_table()

    def _fill_table(self) -> None:
        budget = bandpowers.bias_budget(self.result)
        columns = (("L range", None), ("signal", "signal"), ("raw", "raw"), ("RDN0", "rdn0"), ("MC N0", "mc_n0"),
                   ("N1", "n1"), ("mean field", "mean_field"), ("1/ρ²", "normalization_correction"),
                   ("debiased", "debiased"), ("σ", "error"), ("RDN0/S", "rdn0_over_signal"),
                   ("N1/S", "n1_over_signal"))  # fmt: skip
        cell = "padding:1px 7px;text-align:right"
        head = "".join(f"<th style='{cell}'>{html.escape(name)}</th>" for name, _ in columns)
        rows = []
        for row in budget["bandpowers"]:
            cells = [f"<td style='{cell}'>{row['L_min']}–{row['L_max']}</td>"]
            for _, key in columns[1:]:
                value = row.get(key)
                if key in ("n1", "n1_over_signal") and not self.result.n1_computed:
                    value = None  # not estimated, rather than zero
                text = "n/a" if value is None else (f"{value:.4f}" if key == "normalization_correction"
                                                    else f"{value:.3g}")  # fmt: skip
                cells.append(f"<td style='{cell}'>{text}</td>")
            rows.append("<tr>" + "".join(cells) + "</tr>")
        result = self.result
        amplitude = ("" if result.amplitude is None else
                     f"<b>A_lens = {result.amplitude:.3f} ± {result.amplitude_error:.3f}</b> (scatter of "
                     f"{result.n_sims} simulations); ")  # fmt: skip
        self.table.value = (
            "<div style='font-size:90%'><table style='border-collapse:collapse;margin:0.5em 0'>"
            f"<tr>{head}</tr>{''.join(rows)}</table>"
            f"<div>units [L(L+1)]² C_L/2π; {amplitude}χ² = {result.chi2:.1f} for {result.dof} bandpowers "
            f"(PTE {result.pte:.2f}, {html.escape(result.chi2_method)})"
            + ("" if result.n1_computed else "; N1 not computed")
            + "</div></div>"
        )
