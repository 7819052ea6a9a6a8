"""Section 2 – Estimator noise: N0 of the quadratic estimators against C_L^φφ, and the lensing S/N.

Recomputes (debounced) whenever the experiment, the estimator choice or lmax_L changes; switching units or
the gradient/curl component only redraws the last result.
"""

from __future__ import annotations

import html
import time

import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec.labels import COMPONENTS, ESTIMATORS, ITERATIVE_ESTIMATORS, PAIR_ESTIMATORS

from .plotting import (
    COLORS,
    WIDE,
    FigureView,
    estimator_color,
    finite_or_nan,
    phi_plot_units,
    set_log_range,
    style_axes,
)
from .section import Section, labelled, row
from .work import LiveUpdate

__all__ = ["EstimatorNoiseSection", "ESTIMATORS", "UNIT_LABELS"]

UNIT_LABELS = {
    "phi": r"$[L(L+1)]^2 C_L / 2\pi$",
    "kappa": r"$C_L^{\kappa\kappa} = [L(L+1)]^2 C_L^{\phi\phi} / 4$",
}
Y_LIMITS = (1e-10, 1e-5)
# coarse grid of the analytic N1 (interpolated in between): a few seconds per estimator set
N1_POINTS = 12
N1_GRID_SIZE = 96


class EstimatorNoiseSection(Section):
    title = "Estimator noise"
    name = "noise"
    guide = (
        "Gaussian reconstruction noise N0 of each quadratic estimator (full sky, normalized to unit response) "
        r"against the lensing signal. The curl component is a null test: its signal is zero, $C_L^{\phi\phi}$ is "
        "drawn only for scale. Lensing S/N: "
        r"$\sqrt{\sum_{L\geq 2} f_\mathrm{sky}\,\frac{2L+1}{2}\left[C_L^{\phi\phi}/(C_L^{\phi\phi}+N^{(0)}_L)\right]^2}$"
        r" (gradient; $f_\mathrm{sky}$: sky fraction). 'quadratic + iterative' adds the converged noise of the "
        "iterative estimator (EB, MV; dashed): the fixed point of delensing with the residual lensing power and "
        "estimating again (Smith et al. 2012). 'N0 + N1' adds the analytic N1 bias (dash-dot; Kesden, Cooray & "
        "Kamionkowski 2003), computed on the flat sky on a coarse L grid and interpolated: the total noise of the "
        "reconstructed power spectrum."
    )

    def __init__(self, state, delay: float = 0.3, nthreads=None):
        super().__init__(state)
        self.nthreads = nthreads
        self.result = None
        self.result_inputs = None
        self.snr: dict[str, float] = {}
        self.compute_seconds = None
        self.estimator_boxes = {
            label: widgets.Checkbox(
                value=True, description=label, indent=False, layout=widgets.Layout(width="6em", min_width="6em")
            )  # fmt: skip
            for label in ESTIMATORS
        }
        for label, box in self.estimator_boxes.items():
            box.add_class(f"lensrec-estimator-{label}")
        self.lmax_L = labelled(widgets.IntText(value=0, description="highest lensing $L$"), "18em")
        self.lmax_L_hint = widgets.HTMLMath(
            "<span style='color:#515a5a'>&nbsp;0 = up to the experiment's highest $\\ell$</span>"
        )
        self.units = widgets.ToggleButtons(
            options=[("φ: lensing potential", "phi"), ("κ: convergence", "kappa")],
            value="phi",
            style={"button_width": "12em"},
        )
        self.component = widgets.ToggleButtons(options=list(COMPONENTS), value="gradient")
        self.curves = widgets.ToggleButtons(
            options=[("quadratic", "quadratic"), ("quadratic + iterative", "iterative")],
            value="quadratic",
            style={"button_width": "12em"},
        )
        self.iterative = None
        self.iterative_inputs = None
        self.with_n1 = widgets.Checkbox(value=False, description="N0 + N1 (analytic)", indent=False)
        self.n1 = None
        self.n1_inputs = None
        self.table = widgets.HTML()
        self.table.add_class("lensrec-snr-table")
        self.view = FigureView(WIDE, name="noise-n0")
        self._build_figure()
        self.update = LiveUpdate(self._run, self.status, "Computing N0", delay=delay)
        self.live.append(self.update)

        for control in (
            *self.estimator_boxes.values(), self.lmax_L, self.units, self.component, self.curves, self.with_n1
        ):  # fmt: skip
            control.observe(lambda change: self.update.trigger(), names="value")
        state.observe(lambda change: self.update.trigger(), names=["experiment", "spectra"])

        self.layout(
            controls=[
                row(
                    [
                        widgets.Label("estimators", layout=widgets.Layout(width="6em", min_width="6em")),
                        *self.estimator_boxes.values(),
                    ],
                    align="center",
                ),  # fmt: skip
                row([self.lmax_L, self.lmax_L_hint], align="center"),
                self.component,
                self.units,
                row([self.curves, self.with_n1], align="center"),
            ],
            outputs=[row([self.view.widget, self.table])],
        )
        self.update.trigger()

    # ------------------------------------------------------------------------------------ inputs
    def chosen_estimators(self) -> tuple[str, ...]:
        return tuple(label for label, box in self.estimator_boxes.items() if box.value)

    def _inputs(self):
        lmax_L = self.lmax_L.value
        return (self.state.experiment, self.state.spectra, self.chosen_estimators(), None if lmax_L == 0 else lmax_L)

    # ---------------------------------------------------------------------------------- the work
    def _run(self) -> None:
        inputs = self._inputs()
        experiment, spectra, estimators, lmax_L = inputs
        if not estimators:
            self.view.show_note("Tick at least one estimator to compute its N0.")
            self.table.value = ""  # no S/N for estimators that are not chosen
            self.status.warn("No estimator selected.")
            return
        if self.result_inputs is None or not _same_inputs(self.result_inputs, inputs):
            self.status.info(f"Computing N0 for {', '.join(estimators)}…")
            began = time.perf_counter()
            try:
                result = lensrec.reconstruction_noise(experiment, spectra, estimators=estimators, lmax_L=lmax_L,
                                                      nthreads=self.nthreads)  # fmt: skip
            except Exception:
                self.result, self.result_inputs, self.snr = None, None, {}
                self.state.noise = None
                self.table.value = ""
                self.view.show_note("No N0 for the current settings; the message above says why.")
                raise
            self.compute_seconds = time.perf_counter() - began
            if not _same_inputs(self._inputs(), inputs):
                return  # settings moved on while computing; the pending run will show the new ones
            self.result, self.result_inputs = result, inputs
            self.snr = result.lensing_snr()
            self.state.noise = result
        self.status.ok(
            f"N0 of {', '.join(estimators)} for {experiment.name}, L ≤ {int(self.result.L[-1])}, "
            f"in {self.compute_seconds:.2f} s."
        )
        self._run_iterative(inputs)
        self._run_n1(inputs)
        self._draw()

    def _run_n1(self, inputs) -> None:
        """The analytic N1 of the ticked estimators (both components), when the checkbox asks for it."""
        if not self.with_n1.value:
            return
        if self.n1_inputs is not None and _same_inputs(self.n1_inputs, inputs):
            return
        experiment, spectra, estimators, _ = inputs
        self.status.info(f"Computing the analytic N1 of {', '.join(estimators)}…")
        began = time.perf_counter()
        lmax_L = int(self.result.L[-1])
        self.n1 = lensrec.analytic_n1(
            experiment, spectra, estimators=estimators, lmax_L=lmax_L, noise=self.result,
            L_grid=np.unique(np.round(np.geomspace(2, lmax_L, N1_POINTS)).astype(int)), grid_size=N1_GRID_SIZE,
            nthreads=self.nthreads,
        )  # fmt: skip
        self.n1_inputs = inputs
        self.status.ok(f"Analytic N1 of {', '.join(estimators)} in {time.perf_counter() - began:.1f} s.")

    def _run_iterative(self, inputs) -> None:
        """The iterative forecast for the ticked iterative estimators, when the toggle asks for it."""
        experiment, spectra, estimators, lmax_L = inputs
        labels = tuple(label for label in estimators if label in ITERATIVE_ESTIMATORS)
        if self.curves.value != "iterative" or not labels:
            if self.curves.value == "iterative":
                self.status.warn(f"Tick {' or '.join(ITERATIVE_ESTIMATORS)} for an iterative curve.")
            return
        wanted = (experiment, spectra, labels, lmax_L)
        if self.iterative_inputs is not None and _same_inputs(self.iterative_inputs, wanted):
            return
        self.status.info(f"Iterating the noise of {', '.join(labels)} to its fixed point…")
        began = time.perf_counter()
        result = lensrec.iterative_reconstruction_noise(
            experiment, spectra, estimators=labels, lmax_L=lmax_L, nthreads=self.nthreads
        )
        self.iterative, self.iterative_inputs = result, wanted
        steps = ", ".join(f"{label} {count}" for label, count in result.lensing_iterations.items())
        self.status.ok(f"Iterative N0 of {', '.join(labels)} in {time.perf_counter() - began:.1f} s (steps: {steps}).")

    # ---------------------------------------------------------------------------------- the plot
    def _build_figure(self) -> None:
        figure = self.view.figure
        figure.subplots_adjust(left=0.11, right=0.97, bottom=0.13, top=0.9)
        self.ax = figure.add_subplot()
        (self.signal_line,) = self.ax.plot([], [], color=COLORS["signal"], lw=3.0, label="signal")
        self.lines = {}
        for label in ESTIMATORS:
            style = {"lw": 2.0} if label not in PAIR_ESTIMATORS else {"lw": 1.3, "alpha": 0.9}
            (self.lines[label],) = self.ax.plot([], [], color=estimator_color(label), label=f"$N^{{(0)}}$ {label}",
                                                **style)  # fmt: skip
        self.n1_lines = {}
        for label in ESTIMATORS:
            (self.n1_lines[label],) = self.ax.plot(
                [], [], color=estimator_color(label), lw=1.6, ls="-.", label=f"$N^{{(0)}}+N^{{(1)}}$ {label}"
            )
        self.iterative_lines = {}
        for label in ITERATIVE_ESTIMATORS:
            (self.iterative_lines[label],) = self.ax.plot(
                [], [], color=estimator_color(label), lw=2.0, ls="--", label=f"$N^{{(0)}}$ {label} iterative"
            )
        self.ax.set_xscale("log")
        self.ax.set_yscale("log")
        self.ax.set_xlabel("lensing multipole L")
        self.plot_title = self.ax.set_title("", fontsize=10)
        style_axes(self.ax)

    def plotted(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """(x, y) of every visible curve: ``"signal"`` and the estimator labels (tests compare with lensrec)."""
        out = {"signal": (np.asarray(self.signal_line.get_xdata()), np.asarray(self.signal_line.get_ydata()))}
        for label, line in self.lines.items():
            if line.get_visible():
                out[label] = (np.asarray(line.get_xdata()), np.asarray(line.get_ydata()))
        for label, line in self.iterative_lines.items():
            if line.get_visible():
                out[f"{label} iterative"] = (np.asarray(line.get_xdata()), np.asarray(line.get_ydata()))
        for label, line in self.n1_lines.items():
            if line.get_visible():
                out[f"{label} N0+N1"] = (np.asarray(line.get_xdata()), np.asarray(line.get_ydata()))
        return out

    def _draw(self) -> None:
        result, units, component = self.result, self.units.value, self.component.value
        L = np.arange(result.L.size)
        shown = L >= 2
        self.signal_line.set_data(L[shown], phi_plot_units(result.phi_spectrum, units)[shown])
        self.signal_line.set_linestyle("-" if component == "gradient" else ":")
        symbol = r"$C_L^{\phi\phi}$" if units == "phi" else r"$C_L^{\kappa\kappa}$"
        self.signal_line.set_label(f"signal {symbol}" if component == "gradient"
                                   else f"{symbol} (scale only: curl signal is 0)")  # fmt: skip
        for label, line in self.lines.items():
            if label in result.n0:
                n0 = finite_or_nan(result.n0[label][component])
                line.set_data(L[shown], phi_plot_units(n0, units)[shown])
                line.set_visible(True)
            else:
                line.set_data([], [])
                line.set_visible(False)
        n1 = self.n1 if self.with_n1.value else None
        for label, line in self.n1_lines.items():
            if n1 is not None and label in n1.n1 and label in result.n0:
                total = finite_or_nan(result.n0[label][component] + n1.n1[label][component])
                line.set_data(L[shown], phi_plot_units(total, units)[shown])
                line.set_visible(True)
            else:
                line.set_data([], [])
                line.set_visible(False)
        iterative = self.iterative if self.curves.value == "iterative" else None
        for label, line in self.iterative_lines.items():
            if iterative is not None and label in iterative.n0 and label in result.n0:
                n0 = finite_or_nan(iterative.n0[label][component])
                line.set_data(L[shown], phi_plot_units(n0, units)[shown])
                line.set_visible(True)
            else:
                line.set_data([], [])
                line.set_visible(False)
        set_log_range(self.ax, 2, max(3, int(L[-1])))
        self.ax.set_ylim(*Y_LIMITS)
        self.ax.set_ylabel(UNIT_LABELS[units] + ("" if units == "kappa" else "   (φ units)"))
        handles = [self.signal_line] + [
            line
            for line in (*self.lines.values(), *self.n1_lines.values(), *self.iterative_lines.values())
            if line.get_visible()
        ]
        self.ax.legend(handles=handles, loc="lower left", fontsize=8, ncol=4, frameon=False)
        self.plot_title.set_text(f"N0 ({component}) – {result.experiment.name}")
        self.view.draw()
        self._fill_table()

    def _fill_table(self) -> None:
        result = self.result
        rows = "".join(
            f"<tr><td style='padding:2px 10px;color:{estimator_color(label)}'><b>{label}</b></td>"
            f"<td style='padding:2px 10px;text-align:right'>{self.snr[label]:.1f}</td></tr>"
            for label in ESTIMATORS
            if label in self.snr
        )
        self.table.value = (
            "<table style='border-collapse:collapse;margin:2em 1em'>"
            "<tr><th style='padding:2px 10px;text-align:left'>estimator</th>"
            "<th style='padding:2px 10px;text-align:right'>lensing S/N</th></tr>"
            f"{rows}</table><div style='margin:0 1em;color:#515a5a;font-size:90%'>gradient, "
            f"L = 2–{int(result.L[-1])},<br>sky fraction = {result.experiment.sky_fraction:g} "
            f"({html.escape(result.experiment.name)})</div>"
        )


def _same_inputs(a, b) -> bool:
    return a[0] == b[0] and a[1] is b[1] and a[2] == b[2] and a[3] == b[3]
