"""Section 6 – Validation: a small simulation suite, the lensing-spectrum bias budget and A_lens.

The suite (simulate → filter → reconstruct, cached in a folder and resumable) runs in the background with
a progress bar per stage and a Cancel button; the bandpowers, the bias terms (mean field, RDN0, Monte-Carlo
N0, N1, analytic N0), the normalization correction and the amplitude fit all come from lensrec.
"""

from __future__ import annotations

import hashlib
import html
import os
import tempfile

import ipywidgets as widgets
import numpy as np

import lensrec
import lensrec.io
from lensrec import bandpowers
from lensrec.labels import COMPONENTS, ESTIMATORS, SUITE_STAGES

from .plotting import COLORS, PAIR, FigureView, phi_plot_units, set_log_range, style_axes
from .section import Section, column, heading, labelled, row
from .work import Cancelled, LiveUpdate, LongTask, guarded

__all__ = ["ValidationSection", "NEEDS", "amplitude_is_constrained"]

NEEDS = ("lensing_suite_settings", "run_lensing_suite", "lensing_bandpowers")
TERM_STYLE = {  # term → (label, color)
    "rdn0": ("RDN0", "#2874a6"),
    "mc_n0": ("Monte-Carlo N0", "#85c1e9"),
    "analytic_n0": ("analytic N0", COLORS["noise"]),
    "n1": ("N1", "#ca6f1e"),
    "mean_field": ("mean field", "#7d3c98"),
}


# With σ(A_lens) above 0.5 a fit cannot tell the fiducial lensing (A = 1) from none (A = 0) at 2σ: the number
# then says nothing about the reconstruction and is shown with this caution.
MAX_MEANINGFUL_AMPLITUDE_ERROR = 0.5
UNCONSTRAINED_NOTE = (
    "This fit does not constrain A_lens (σ > 0.5: no lensing, A = 0, is within 2σ of the fiducial A = 1): the "
    "suite is too small or its sky too noisy or too small. Use more simulations, a higher band limit or a "
    "larger sky before reading anything into the value."
)


def amplitude_is_constrained(result) -> bool:
    """True when the fitted A_lens has an error small enough to tell lensing (A = 1) from none (A = 0)."""
    return result.amplitude is not None and result.amplitude_error <= MAX_MEANINGFUL_AMPLITUDE_ERROR


def _default_margin() -> int:
    from lensrec import sky

    return int(getattr(sky, "DEFAULT_LMAX_MARGIN", 1000))


class ValidationSection(Section):
    title = "Validation"
    name = "validation"
    guide = (
        "Run a small suite of simulations of the current experiment: one 'data' sky and the chosen number of "
        "simulations, each filtered and reconstructed. The suite debiases the data's lensing spectrum (half-split "
        "mean field, realization-dependent N0, N1 from pairs of simulations sharing φ, the normalization "
        r"correction) and fits $A_\mathrm{lens}$. <i>Use the sky's settings</i> takes the resolution, band limit, "
        "noise and mask of the Sky tab's sky, so biases are validated on the same cut sky. Results are cached in "
        "the folder: Cancel keeps what is finished, Run again resumes."
    )

    def __init__(self, state, nthreads=None):
        super().__init__(state)
        self.nthreads = nthreads
        self.result = None
        self.suite = None
        self.n_sims = labelled(widgets.IntText(value=8, description="simulations"), "16em")
        self.n_sims.add_class("lensrec-validation-n-sims")
        self.executor = labelled(widgets.Dropdown(options=[("serial (in this kernel)", "serial"),
                                                           ("worker processes", "processes")],
                                                  value="serial", description="executor"), "24em")  # fmt: skip
        self.workers = labelled(widgets.IntText(value=2, description="workers"), "16em")
        self.workers.add_class("lensrec-validation-workers")
        self.estimator = labelled(widgets.Dropdown(options=list(ESTIMATORS), value="MV", description="estimator"),
                                  "16em")  # fmt: skip
        self.component = widgets.ToggleButtons(options=list(COMPONENTS), value="gradient")
        self.nside = labelled(widgets.Dropdown(options=[32, 64, 128, 256], value=64, description="nside"), "16em")
        self.lmax = labelled(widgets.IntText(value=128, description=r"band limit $\ell_\mathrm{max}$"), "16em")
        self.lmax_L = labelled(widgets.IntText(value=0, description=r"highest $L$ (0 = $\ell_\mathrm{max}$)"), "16em")
        # lensing B modes at ℓ ≤ lmax are made from E and φ far above lmax: keep the library's margin
        self.lmax_margin = labelled(widgets.IntText(value=_default_margin(), description=r"extra $\ell$ simulated",
                                                    tooltip="extra multipoles of E and φ simulated above the band "
                                                            "limit"), "16em")  # fmt: skip
        self.noise = widgets.Checkbox(value=True, description="add instrument noise", indent=False,
                                      layout=widgets.Layout(width="16em", min_width="12em"))  # fmt: skip
        self.sky_mask = None  # the Sky tab's mask, taken over by "Use the sky's settings"
        self.use_sky_mask = widgets.Checkbox(value=False, description="mask of the Sky tab's sky", indent=False,
                                             disabled=True, layout=widgets.Layout(width="16em", min_width="12em"))  # fmt: skip
        self.use_sky_mask.add_class("lensrec-validation-sky-mask")
        self.use_sky_button = widgets.Button(description="Use the sky's settings", icon="clone",
                                             tooltip="resolution, band limit, seed, noise and mask of the Sky tab's "
                                                     "simulated sky, so biases are validated on the same cut sky",
                                             disabled=True, layout=widgets.Layout(width="16em", min_width="16em"))  # fmt: skip
        self.use_sky_button.add_class("lensrec-validation-use-sky")
        self.seed = labelled(widgets.IntText(value=0, description="seed"), "16em")
        self.n1 = widgets.Checkbox(value=False, description="estimate N1 (two extra reconstructions per simulation)",
                                   indent=False, layout=widgets.Layout(width="30em", min_width="20em"))  # fmt: skip
        self.folder = widgets.Text(value="", placeholder="(a new temporary folder)", description="suite folder",
                                   style={"description_width": "11em"}, layout=widgets.Layout(width="40em", min_width="24em"))  # fmt: skip
        self.replace = widgets.Checkbox(value=False, description="replace a different suite in this folder",
                                        indent=False, layout=widgets.Layout(width="24em", min_width="16em"))  # fmt: skip
        self.run_button = widgets.Button(description="Run suite", icon="play", button_style="primary")
        self.run_button.add_class("lensrec-run-suite")
        self.cancel_button = widgets.Button(description="Cancel", icon="stop", button_style="warning")
        self.cancel_button.add_class("lensrec-cancel-suite")
        self.table = widgets.HTML()
        self.table.add_class("lensrec-bias-table")
        self.view = FigureView(PAIR, name="validation")
        self.task = LongTask(self.run_button, self.status, "Running the simulation suite", "validation",
                             cancel_button=self.cancel_button, views=[self.view])  # fmt: skip
        self.tasks.append(self.task)
        self._build_figure()
        # the gradient/curl switch redraws from the finished suite at once (no new simulations)
        self.redraw = LiveUpdate(self._on_component, self.status, "Analyzing the suite", delay=0.0)
        self.live.append(self.redraw)

        self.nside.observe(lambda change: setattr(self.lmax, "value", 2 * change["new"]), names="value")
        self.executor.observe(lambda change: self._show_workers(), names="value")
        self.component.observe(lambda change: self.redraw.trigger() if self.suite is not None else None,
                               names="value")  # fmt: skip
        self.run_button.on_click(lambda _button: self.run())
        self.use_sky_button.on_click(guarded(self.status, "Taking over the sky's settings")(self.use_sky_settings))
        state.observe(self._on_sky, names="sky")
        self._on_sky({"new": state.sky})
        self._show_workers()
        self.layout(
            controls=[
                row([
                    column([heading("Suite"), self.n_sims, self.executor, self.workers, self.seed]),
                    column([heading("Analysis"), self.estimator, self.nside, self.lmax, self.lmax_L,
                            self.lmax_margin]),
                    column([heading("Sky"), self.use_sky_button, self.noise, self.use_sky_mask]),
                ]),
                self.n1,
                row([self.folder, self.replace], align="center"),
                row([widgets.Label("show", layout=widgets.Layout(width="5em", min_width="5em")), self.component],
                    align="center"),
                row([self.run_button, self.cancel_button, self.task.widget], align="center"),
            ],
            outputs=[self.view.widget, self.table],
        )  # fmt: skip
        self.view.show_note("No suite yet: choose its size and executor above and press <b>Run suite</b>. "
                            "8 simulations at nside 64 take well under a minute.")  # fmt: skip

    # ---------------------------------------------------------------------------------- controls
    def _show_workers(self) -> None:
        self.workers.layout.display = None if self.executor.value != "serial" else "none"

    def _on_sky(self, change) -> None:
        self.use_sky_button.disabled = change["new"] is None

    def use_sky_settings(self, _button=None) -> None:
        """Take over the Sky tab's resolution, band limit, margin, noise and mask (what the button does)."""
        sky = self.state.sky
        if sky is None:
            raise ValueError("no sky yet: simulate one on the Sky tab first")
        if sky.nside not in self.nside.options:
            raise ValueError(f"the sky's nside {sky.nside} is not offered for suites here (choose from "
                             f"{', '.join(map(str, self.nside.options))}); simulate a sky at one of them")  # fmt: skip
        self.nside.value = sky.nside
        self.lmax.value = sky.lmax
        self.lmax_margin.value = int(sky.settings["lmax_margin"])
        self.noise.value = bool(sky.settings["noise"])
        self.sky_mask = None if sky.mask is None else np.array(sky.mask)
        self.use_sky_mask.disabled = self.sky_mask is None
        self.use_sky_mask.value = self.sky_mask is not None
        if self.state.sky_experiment is not None and self.state.sky_experiment != self.state.experiment:
            self.status.warn("Took over the sky's settings, but the experiment has changed since that sky was made; "
                             "the suite uses the current experiment.")  # fmt: skip
            return
        masked = "" if self.sky_mask is None else f" and its mask (f_sky {float(np.mean(self.sky_mask)):.3g})"
        self.status.ok(f"Suite settings taken from the sky: nside {sky.nside}, band limit {sky.lmax}, "
                       f"noise {'on' if self.noise.value else 'off'}{masked}.")  # fmt: skip

    def _mask_file(self, folder: str) -> str | None:
        """The Sky tab's mask as a FITS file in the suite folder (named by its content; written once)."""
        if not (self.use_sky_mask.value and self.sky_mask is not None):
            return None
        digest = hashlib.sha256(np.ascontiguousarray(self.sky_mask, dtype=np.float64).tobytes()).hexdigest()[:16]
        path = os.path.join(folder, f"sky-mask-{digest}.fits")
        if not os.path.exists(path):
            os.makedirs(folder, exist_ok=True)
            lensrec.io.write_maps(path, self.sky_mask, column_names=("MASK",))
        return path

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
            "n1": self.n1.value, "lmax_margin": self.lmax_margin.value, "noise": self.noise.value,
        }  # fmt: skip
        executor, workers = self.executor.value, self.workers.value
        estimator, component, force = self.estimator.value, self.component.value, self.replace.value
        folder = self.suite_folder()

        def work(report, cancel):
            settings = lensrec.lensing_suite_settings(experiment, mask=self._mask_file(folder), **settings_args)

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
            return self.summary_message()

        return self.task.start(work, finish)

    def _on_component(self) -> None:
        """Analyze the finished suite for the component now chosen and redraw (no new simulations)."""
        suite, component = self.suite, self.component.value
        if suite is None or self.task.busy:
            return
        estimator = self.result.estimator if self.result is not None else self.estimator.value
        self.view.mark_stale(f"showing the previous component while analysing the {component}…")
        result = lensrec.lensing_bandpowers(suite, estimator=estimator, component=component)
        if self.component.value != component:
            return  # switched again meanwhile; the pending run draws the latest choice
        self.result = result
        self.state.validation = result
        self._draw()
        self.status.show(*self.summary_message())

    def summary_message(self) -> tuple[str, str]:
        """(kind, text) for the status line: the fit, with a caution when A_lens is not constrained."""
        result = self.result
        if result.amplitude is None:
            return ("ok", f"Curl null test of {result.estimator}: χ² = {result.chi2:.1f} for {result.dof} bandpowers "
                          f"(PTE {result.pte:.2f}).")  # fmt: skip
        text = (f"{result.n_sims} simulations, {result.estimator}: A_lens = {result.amplitude:.3f} ± "
                f"{result.amplitude_error:.3f}; χ² = {result.chi2:.1f} for {result.dof} (PTE {result.pte:.2f}).")  # fmt: skip
        if not amplitude_is_constrained(result):
            return ("warning", text + " " + UNCONSTRAINED_NOTE)
        return ("ok", text)

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
        (self.fit_line,) = self.ax_bands.plot([], [], color=COLORS["phi"], lw=1.0, ls="--",
                                              label=r"$A_\mathrm{lens}$ × fiducial")  # fmt: skip
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
                                     if _drawn(h)], fontsize=7.5, frameon=False, ncol=2)  # fmt: skip
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
        self.ax_bands.legend(handles=[self.bands, *(line for line in (self.theory_line, self.fit_line) if _drawn(line))],
                             fontsize=7.5, frameon=False)  # fmt: skip
        if result.amplitude is None:
            label = "curl null test"
        else:
            label = rf"$A_\mathrm{{lens}}$ = {result.amplitude:.2f} ± {result.amplitude_error:.2f}"
            if not amplitude_is_constrained(result):
                label += " (unconstrained)"
        self.bands_title.set_text(f"{result.estimator} {result.component} bandpowers – {label}")
        self.view.draw()
        self._fill_table()

    def _fill_table(self) -> None:
        budget = bandpowers.bias_budget(self.result)
        # ratios are to the signal, or to the analytic N0 where there is none (curl, Gaussian skies)
        under = "S" if budget["reference_for_ratios"] == "signal" else "N0 (analytic)"
        columns = (("L range", None), ("signal", "signal"), ("raw", "raw"), ("RDN0", "rdn0"), ("MC N0", "mc_n0"),
                   ("N1", "n1"), ("mean field", "mean_field"), ("1/ρ²", "normalization_correction"),
                   ("debiased", "debiased"), ("σ", "error"), (f"RDN0/{under}", "rdn0_over_signal"),
                   (f"N1/{under}", "n1_over_signal"))  # fmt: skip
        cell = "padding:1px 7px;text-align:right"
        head = "".join(f"<th style='{cell}'>{html.escape(name)}</th>" for name, _ in columns)
        rows = []
        for band in budget["bandpowers"]:
            cells = [f"<td style='{cell}'>{band['L_min']}–{band['L_max']}</td>"]
            for _, key in columns[1:]:
                value = band.get(key)
                if key in ("n1", "n1_over_signal") and not self.result.n1_computed:
                    value = None  # not estimated, rather than zero
                text = "n/a" if value is None else (f"{value:.4f}" if key == "normalization_correction"
                                                    else f"{value:.3g}")  # fmt: skip
                cells.append(f"<td style='{cell}'>{text}</td>")
            rows.append("<tr>" + "".join(cells) + "</tr>")
        result = self.result
        amplitude = ("" if result.amplitude is None else
                     f"<b><i>A</i><sub>lens</sub> = {result.amplitude:.3f} ± {result.amplitude_error:.3f}</b> "
                     f"(scatter of {result.n_sims} simulations); ")  # fmt: skip
        caution = ("" if result.amplitude is None or amplitude_is_constrained(result) else
                   f"<div style='color:#9a7d0a'>⚠ {html.escape(UNCONSTRAINED_NOTE)}</div>")  # fmt: skip
        self.table.value = (
            "<div style='font-size:90%'><table style='border-collapse:collapse;margin:0.5em 0'>"
            f"<tr>{head}</tr>{''.join(rows)}</table>"
            f"<div>units [<i>L</i>(<i>L</i>+1)]² <i>C<sub>L</sub></i>/2π; {amplitude}χ² = {result.chi2:.1f} for "
            f"{result.dof} bandpowers (PTE {result.pte:.2f}, {html.escape(result.chi2_method)})"
            + ("" if result.n1_computed else "; N1 not computed")
            + f"</div>{caution}</div>"
        )


def _drawn(line) -> bool:
    """True when a line is visible and has at least one finite point (legends list only drawn curves)."""
    y = np.asarray(line.get_ydata(), dtype=float)
    return bool(line.get_visible() and y.size and np.isfinite(y).any())
