"""Section 5 – Delensing: how much lensing B-mode power a lensing reconstruction can remove.

The forecast part uses the reconstruction noise of the Estimator-noise section (``state.noise``) and
``lensrec.delensing_forecast``: lensed and residual BB, noise, the delensing efficiency per ℓ,
A_lens^res and σ(r) with and without delensing. Building a B-mode template from the reconstructed map
appears here when this lensrec installation provides it (``lensrec.lensing_b_template``).
"""

from __future__ import annotations

import html

import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec import delensing, harmonics
from lensrec.labels import ESTIMATORS, uses_b_modes

from .plotting import COLORS, PAIR, FigureView, d_ell, finite_or_nan, set_log_range, style_axes
from .section import Section, heading, labelled, row
from .work import LongTask

__all__ = ["DelensingSection", "delensing_with_source", "sky_forecast"]


def delensing_with_source(sky, reconstruction, experiment, spectra, lmax, method, source, tracer_name, nthreads,
                          report):  # fmt: skip
    """Delens the sky's B modes with φ from ``source`` (internal, tracer, combined, exact) through lensrec's
    recipes; for an internal reconstruction that reused the B modes, also the residual of one made without the
    delensed B modes (ℓ ≤ lmax/2, at most 500). Returns (result, bias-free result or None, label)."""
    from lensrec.delensing_bias import bias_treatment_note, exclude_delensed_b

    common = {"lmax": lmax, "method": method, "mask": sky.mask, "nthreads": nthreads}
    if source == "exact":
        phi = harmonics.truncate_alm(np.array(sky.phi_alm), min(sky.lmax_unlensed, 3 * lmax), sky.lmax_unlensed)
        return delensing.delens_maps(sky.maps, phi, experiment, spectra, phi_filtered=True, progress=report,
                                     notes=("phi source: the sky's exact phi",), **common), None, "exact φ"  # fmt: skip
    if source in ("tracer", "combined"):
        tracers = lensrec.load_tracers(tracer_name)
        lmax_L = min(tracers.lmax_L, reconstruction.lmax_L if reconstruction is not None else lmax, lmax)
        tracers = tracers.truncated(lmax_L)
        report(0.02, f"simulating the tracer {tracer_name} correlated with the sky's φ")
        tracer_alm = lensrec.simulate_tracers(tracers, np.array(sky.phi_alm), seed=int(sky.settings["seed"]))
        internal = source == "combined"
        if internal and reconstruction is None:
            raise ValueError("the combined source needs a reconstruction: run the Reconstruction tab first")
        n0 = np.array(reconstruction.n0["gradient"])[: lmax_L + 1] if internal else None
        combination = lensrec.combine_tracers(tracers, n0=n0)
        phi = lensrec.combined_phi(combination, tracer_alm, reconstruction.phi_alm if internal else None)
        label = f"{tracer_name}" + (f" + {reconstruction.estimator}" if internal else "")
        return delensing.delens_maps(sky.maps, phi, experiment, spectra, phi_filtered=True, progress=report,
                                     notes=(f"phi source: {label} (optimal combination)",), **common), None, label  # fmt: skip
    if reconstruction is None:
        raise ValueError("no reconstruction: run the Reconstruction tab first")
    label = reconstruction.estimator
    result = delensing.delens_maps(sky.maps, reconstruction, experiment, spectra, progress=report, **common)
    if label not in lensrec.labels.ESTIMATORS or not uses_b_modes(label):
        return result, None, label
    ell_delensed = min(lmax // 2, 500)
    report(0.6, f"reconstructing {label} again without the B modes at ℓ ≤ {ell_delensed}")
    free_rec = lensrec.reconstruct(sky.maps, exclude_delensed_b(experiment, ell_delensed), spectra, estimator=label,
                                   lmax=lmax, lmax_L=reconstruction.lmax_L, mask=sky.mask, nthreads=nthreads)  # fmt: skip
    note = bias_treatment_note(label, "exclude_delensed_b", ell_delensed)
    free = delensing.delens_maps(sky.maps, free_rec, experiment, spectra, ell_max=ell_delensed, notes=(note,),
                                 **common)  # fmt: skip
    return result, free, label


TEMPLATE_NEEDS = ("reconstruct", "delens_maps")
# template methods of lensrec.lensing_templates, by their names on screen
METHOD_NAMES = {"remap": "exact remapping", "first_order": "first order", "remap_delensed_e": "remapping of delensed E"}
ALENS_RES = "<i>A</i><sub>lens</sub><sup>res</sup>"


def sky_forecast(experiment, spectra, reconstruction, lmax: int, nthreads=None):
    """The delensing forecast for what one simulated sky can do: its band limit and its reconstruction's N0.

    The same recipe as ``lensrec demo``: the experiment's multipole ranges capped at the sky's band limit,
    N0 of the reconstruction (infinite above its lmax_L) and B modes up to min(lmax, 1000).
    """
    n0 = np.full(spectra.lmax + 1, np.inf)
    n0[: reconstruction.lmax_L + 1] = reconstruction.n0["gradient"]
    limited = experiment.replace(
        ell_max_temperature=min(experiment.ell_max_temperature, lmax),
        ell_max_polarization=min(experiment.ell_max_polarization, lmax),
    )
    return lensrec.delensing_forecast(limited, spectra, n0=n0, lmax=min(lmax, 1000), nthreads=nthreads)


class DelensingSection(Section):
    title = "Delensing"
    name = "delensing"
    guide = (
        "Forecast: the lensing B modes left after subtracting a template built from the lensing reconstruction "
        "of the chosen estimator (its N0 from the Estimator noise tab) and the experiment's E modes. "
        r"Efficiency $= 1 - C_\ell^\mathrm{res} / C_\ell^\mathrm{lens}$. $\sigma(r)$ is a BB-only Fisher forecast at "
        r"the experiment's sky fraction $f_\mathrm{sky}$."
    )

    def __init__(self, state, nthreads=None):
        super().__init__(state)
        self.nthreads = nthreads
        self.forecast = None
        self.forecast_noise = None
        self.estimator = labelled(widgets.Dropdown(options=["MV"], value="MV", description="N0 of estimator"), "18em")
        self.lmax = labelled(widgets.IntText(value=0, description=r"highest B-mode $\ell$"), "18em")
        self.ell_min_b = labelled(widgets.IntText(value=0, description=r"lowest B-mode $\ell$"), "18em")
        self.r = labelled(widgets.FloatText(value=0.0, description="fiducial $r$"), "18em")
        self.hint = widgets.HTMLMath(
            "<span style='color:#515a5a'>0 means the default: the highest $\\ell$ is the smaller of the "
            "experiment's highest polarization $\\ell$ and 1000; the lowest is the experiment's lowest $\\ell$."
            "</span>"
        )
        self.forecast_button = widgets.Button(description="Forecast", icon="play", button_style="primary")
        self.forecast_button.add_class("lensrec-forecast")
        self.summary = widgets.HTML()
        self.summary.add_class("lensrec-delensing-summary")
        self.view = FigureView(PAIR, name="delensing-bb")
        self.task = LongTask(self.forecast_button, self.status, "Forecasting the delensed B modes", "delensing",
                             views=[self.view])  # fmt: skip
        self.tasks.append(self.task)
        self._build_figure()
        self.template_area = self._template_area()

        self.forecast_button.on_click(lambda _button: self.run_forecast())
        state.observe(self._on_noise, names="noise")
        self._on_noise({"new": state.noise})
        self.layout(
            controls=[
                heading("Forecast from the reconstruction noise"),
                row([self.estimator, self.lmax, self.ell_min_b, self.r]),
                self.hint,
                row([self.forecast_button, self.task.widget], align="center"),
            ],
            outputs=[row([self.view.widget, self.summary]), self.template_area],
        )

    def _template_area(self):
        missing = [name for name in TEMPLATE_NEEDS if getattr(lensrec, name, None) is None]
        if missing:
            names = " and ".join(f"<code>lensrec.{name}</code>" for name in missing)
            self.template_ready = False
            return widgets.HTML(
                "<p style='color:#515a5a;line-height:1.45'><b>B-mode template from the reconstructed map</b>: this "
                f"lensrec installation does not provide {names} yet; update lensrec and restart the kernel to "
                "build templates from a simulated sky.</p>"
            )
        self.template_ready = True
        self.template = None
        self.bias_free = None
        self.sky_forecast = None
        self.method = widgets.ToggleButtons(options=[("first order", "first_order"), ("exact remapping", "remap"),
                                                     ("remapping of delensed E", "remap_delensed_e")],
                                            value=delensing.DEFAULT_TEMPLATE_METHOD,
                                            style={"button_width": "14em"})  # fmt: skip
        self.method.add_class("lensrec-template-method")
        self.phi_source = widgets.ToggleButtons(
            options=[("internal φ̂", "internal"), ("tracer", "tracer"), ("combined", "combined"), ("exact φ", "exact")],
            value="internal", description="φ source", style={"button_width": "9em"})  # fmt: skip
        self.phi_source.add_class("lensrec-phi-source")
        tracers = lensrec.tracers.available_tracers()
        self.tracer = labelled(widgets.Dropdown(options=tracers, value=tracers[0] if tracers else None,
                                                description="tracer"), "18em")  # fmt: skip
        self.build_button = widgets.Button(description="Build template", icon="play", button_style="primary")
        self.build_button.add_class("lensrec-build-template")
        self.template_cancel = widgets.Button(description="Cancel", icon="stop", button_style="warning")
        self.template_cancel.add_class("lensrec-cancel-template")
        self.template_summary = widgets.HTML()
        self.template_summary.add_class("lensrec-template-summary")
        self.template_view = FigureView(PAIR, name="delensing-template")
        self.template_task = LongTask(self.build_button, self.status, "Building the B-mode template", "template",
                                      cancel_button=self.template_cancel, views=[self.template_view])  # fmt: skip
        self.tasks.append(self.template_task)
        self._build_template_figure()
        self.build_button.on_click(lambda _button: self.build_template())
        self.state.observe(self._on_reconstruction, names="reconstruction")
        self._on_reconstruction({"new": self.state.reconstruction})
        return widgets.VBox([
            heading("Template from the reconstructed map"),
            widgets.HTML("<div style='color:#515a5a;max-width:60em;line-height:1.45'>The Wiener-filtered E modes of "
                         "the simulated maps, lensed by the Wiener-filtered reconstruction of the Reconstruction tab, "
                         "give a B-mode template; it is subtracted from the observed (beam-deconvolved) B modes.</div>"),
            self.method,
            row([self.phi_source, self.tracer], align="center"),
            widgets.HTML("<div style='color:#515a5a;max-width:60em;line-height:1.45'>internal: the reconstruction "
                         "(with B modes reused, its residual is shown beside one from a reconstruction without the "
                         "delensed B modes); tracer: a simulated invented tracer correlated with the sky's φ; "
                         "combined: tracer and reconstruction combined optimally; exact φ: the sky's own φ "
                         "(the perfect-knowledge bound).</div>"),
            row([self.build_button, self.template_cancel, self.template_task.widget], align="center"),
            row([self.template_view.widget, self.template_summary]),
        ])  # fmt: skip

    def _on_reconstruction(self, change) -> None:
        if self.template is not None:
            self.status.warn("The reconstruction has changed; the template shown before belonged to the previous one.")
            self.template = None
            self.template_summary.value = ""
            self.sky_forecast = None
        if change["new"] is None:
            self.template_view.show_note("No reconstruction yet: simulate a sky (Sky tab) and reconstruct it "
                                         "(Reconstruction tab), then press <b>Build template</b>.")  # fmt: skip
        else:
            self.template_view.show_note("Press <b>Build template</b> to delens the simulated B modes.")

    # ------------------------------------------------------------------------------------ inputs
    def _on_noise(self, change) -> None:
        noise = change["new"]
        if noise is None:
            self.forecast_button.disabled = self.task.busy
            self.view.show_note("No reconstruction noise yet: the Estimator noise tab computes it for the current "
                                "experiment; then press <b>Forecast</b>.")  # fmt: skip
            return
        labels = [label for label in reversed(ESTIMATORS) if label in noise.n0]  # combinations first
        current = self.estimator.value
        self.estimator.options = labels
        self.estimator.value = current if current in labels else labels[0]
        if self.forecast is None:
            self.view.show_note("Press <b>Forecast</b> to see the delensed B modes for the current experiment.")
        elif self.forecast_noise is not noise:
            self.status.warn("The reconstruction noise has changed since this forecast; press Forecast to update it.")
            self.view.mark_stale("out of date: the reconstruction noise has changed since this forecast")

    # ---------------------------------------------------------------------------------- forecast
    def run_forecast(self) -> bool:
        """Start the forecast in the background (what the Forecast button does)."""
        noise = self.state.noise
        if noise is None:
            self.status.error("No reconstruction noise yet: open the Estimator noise tab and let it finish, "
                              "or fix the error shown there.")  # fmt: skip
            return False
        label = self.estimator.value
        arguments = {
            "n0": noise.n0[label]["gradient"],
            "lmax": self.lmax.value or None,
            "ell_min_b": self.ell_min_b.value or None,
            "r": self.r.value,
            "nthreads": self.nthreads,
        }
        experiment, spectra = noise.experiment, self.state.spectra

        def work(report, cancel):
            report(0.1, f"lensing with the residual potential of {label}…")
            return lensrec.delensing_forecast(experiment, spectra, **arguments)

        def finish(forecast):
            self.forecast, self.forecast_noise, self.forecast_label = forecast, noise, label
            self._draw()
            return (f"Delensing with {label}: A_lens^res = {forecast.alens_residual:.3f}, σ(r) improves "
                    f"{forecast.improvement:.2f}× ({experiment.name}).")  # fmt: skip

        return self.task.start(work, finish)

    # ---------------------------------------------------------------------------------- template
    def build_template(self) -> bool:
        """Start building the template and delensing the sky's B modes (what Build template does)."""
        sky, reconstruction = self.state.sky, self.state.reconstruction
        experiment, spectra = self.state.sky_experiment, self.state.spectra
        if sky is None or reconstruction is None:
            self.status.error("No reconstruction to build a template from: simulate a sky on the Sky tab and "
                              "reconstruct it on the Reconstruction tab first.")  # fmt: skip
            return False
        method, nthreads, source = self.method.value, self.nthreads, self.phi_source.value
        tracer_name = self.tracer.value
        lmax = min(sky.lmax, experiment.ell_max_polarization)
        if source in ("tracer", "combined") and not tracer_name:
            self.status.error("No tracer file is shipped with this lensrec: choose another φ source.")
            return False

        def work(report, cancel):
            results = delensing_with_source(sky, reconstruction, experiment, spectra, lmax, method, source, tracer_name,
                                            nthreads, report)  # fmt: skip
            forecast = None
            if source == "internal":  # the forecast for this sky's band limit and its reconstruction's N0
                report(0.9, "forecast for this sky's band limit and reconstruction noise…")
                forecast = sky_forecast(experiment, spectra, reconstruction, lmax, nthreads)
            return results, forecast

        def finish(outcome):
            (result, bias_free, label), forecast = outcome
            self.template, self.template_estimator, self.bias_free = result, label, bias_free
            self.sky_forecast = forecast
            self._draw_template()
            beside = "" if forecast is None else f"; forecast for this sky's settings {forecast.alens_residual:.2f}"
            return (f"Template ({METHOD_NAMES.get(method, method)}) from {label}: measured A_lens^res = "
                    f"{result.alens_residual:.2f} over ℓ {result.ell_min}–{result.ell_max}{beside}.")  # fmt: skip

        return self.template_task.start(work, finish)

    def _build_template_figure(self) -> None:
        figure = self.template_view.figure
        figure.subplots_adjust(left=0.08, right=0.98, bottom=0.14, top=0.9, wspace=0.28)
        self.ax_tbb, self.ax_teff = figure.subplots(1, 2, gridspec_kw={"width_ratios": [1.5, 1.0]})
        self.template_lines = {}
        for key, label, color, style in (
            ("observed", "observed B (lensing + noise)", COLORS["lensed"], "-"),
            ("template", "template", COLORS["template"], "-"),
            ("residual", "residual = observed − template", COLORS["residual"], "-"),
            ("bias_free", "residual, φ̂ without the delensed B", COLORS["delensed"], "-."),
            ("noise", "B noise", COLORS["noise"], "--"),
            ("lensed", "lensing BB (theory)", COLORS["phi"], ":"),
        ):
            (self.template_lines[key],) = self.ax_tbb.plot([], [], color=color, ls=style, lw=1.4, label=label)
        self.ax_tbb.set_xscale("log")
        self.ax_tbb.set_yscale("log")
        self.ax_tbb.set_xlabel("multipole ℓ")
        self.ax_tbb.set_ylabel(r"$D_\ell^{BB}$  [µK²]")
        self.ax_tbb.legend(loc="upper left", fontsize=7.5, frameon=False)
        (self.template_lines["efficiency"],) = self.ax_teff.plot([], [], color=COLORS["delensed"], lw=1.0)
        self.ax_teff.axhline(0.0, color=COLORS["noise"], lw=0.8)
        self.ax_teff.set_xscale("log")
        self.ax_teff.set_ylim(-0.5, 1.0)
        self.ax_teff.set_xlabel("multipole ℓ")
        self.ax_teff.set_ylabel("efficiency per ℓ (noise subtracted)")
        self.template_title = self.ax_tbb.set_title("", fontsize=9.5)
        self.ax_teff.set_title("delensing efficiency of this sky", fontsize=9.5)
        for ax in (self.ax_tbb, self.ax_teff):
            style_axes(ax)

    def template_plotted(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        return {key: (np.asarray(line.get_xdata()), np.asarray(line.get_ydata()))
                for key, line in self.template_lines.items()}  # fmt: skip

    def _draw_template(self) -> None:
        result = self.template
        ell = np.arange(result.ell.size)
        used = (ell >= max(2, result.ell_min)) & (ell <= result.ell_max)
        for key, values in (("observed", result.observed_bb), ("template", result.template_bb),
                            ("residual", result.residual_bb), ("noise", finite_or_nan(result.noise_bb)),
                            ("lensed", result.lensed_bb)):  # fmt: skip
            self.template_lines[key].set_data(ell[used], d_ell(values)[used])
        self.template_lines["efficiency"].set_data(ell[used], result.efficiency[used])
        free = self.bias_free
        if free is not None:
            part = (ell >= max(2, free.ell_min)) & (ell <= free.ell_max)
            self.template_lines["bias_free"].set_data(ell[part], d_ell(free.residual_bb)[part])
        else:
            self.template_lines["bias_free"].set_data([], [])
        for ax in (self.ax_tbb, self.ax_teff):
            set_log_range(ax, max(2, result.ell_min), result.ell_max)
        values = np.concatenate([d_ell(result.lensed_bb)[used], d_ell(result.template_bb)[used]])
        values = values[np.isfinite(values) & (values > 0)]
        top = values.max() * 30.0
        self.ax_tbb.set_ylim(max(values.min() / 3.0, top * 1e-6), top)  # a weak template stays in view
        self.template_title.set_text(
            f"B modes of the simulated sky – {METHOD_NAMES.get(result.method, result.method)} template, "
            f"{self.template_estimator}"
        )
        self.template_view.draw()
        bias = self.template_estimator in lensrec.labels.ESTIMATORS and uses_b_modes(self.template_estimator)
        forecast = self.sky_forecast
        rows = [(f"{ALENS_RES}, measured", f"<b>{result.alens_residual:.3f}</b>")]
        if forecast is not None:
            rows.append((f"{ALENS_RES}, forecast for this sky", f"<b>{forecast.alens_residual:.3f}</b>"))
        rows += [("ℓ range (measured)", f"{result.ell_min}–{result.ell_max}")]
        if forecast is not None:
            rows.append(("ℓ range (forecast)", f"{forecast.ell_min}–{forecast.ell_max}"))
        rows.append(("template", html.escape(METHOD_NAMES.get(result.method, result.method))))
        if free is not None:
            reused = delensing.measured_alens_residual(result.residual_bb, result.lensed_bb, result.noise_bb,
                                                       free.ell_min, free.ell_max)  # fmt: skip
            rows += [(f"{ALENS_RES}, B reused (ℓ {free.ell_min}–{free.ell_max})", f"{reused:.3f}"),
                     (f"{ALENS_RES}, bias-free (same ℓ)", f"<b>{free.alens_residual:.3f}</b>")]  # fmt: skip
        self.template_summary.value = (
            "<table style='margin:1.5em 1em;border-collapse:collapse;white-space:nowrap'>"
            + "".join(f"<tr><td style='padding:2px 8px'>{name}</td><td>{value}</td></tr>" for name, value in rows)
            + "</table>"
            + ("" if forecast is None else
               "<div style='margin:0 1em;max-width:22em;color:#515a5a;font-size:90%'>The forecast uses this sky's "
               "band limit and its reconstruction's N0, so it is comparable with the measured value (one simulated "
               "sky scatters around it).</div>")
            + ("<div style='margin:0.5em 1em;max-width:22em;color:#9a7d0a;font-size:90%'>⚠ φ was reconstructed with "
               f"{html.escape(self.template_estimator)}, which uses these B modes: the residual is biased low "
               "(delensing bias); the bias-free residual beside it comes from a reconstruction without the "
               "delensed B modes.</div>" if bias else "")
        )  # fmt: skip

    # ---------------------------------------------------------------------------------- the plot
    def _build_figure(self) -> None:
        figure = self.view.figure
        figure.subplots_adjust(left=0.08, right=0.98, bottom=0.14, top=0.9, wspace=0.28)
        self.ax_bb, self.ax_eff = figure.subplots(1, 2, gridspec_kw={"width_ratios": [1.5, 1.0]})
        self.lines = {}
        for key, label, color, style in (
            ("lensed", "lensing BB", COLORS["lensed"], "-"),
            ("residual", "residual after delensing", COLORS["residual"], "-"),
            ("noise", "B noise", COLORS["noise"], "--"),
        ):
            (self.lines[key],) = self.ax_bb.plot([], [], color=color, ls=style, lw=1.6, label=label)
        self.ax_bb.set_xscale("log")
        self.ax_bb.set_yscale("log")
        self.ax_bb.set_xlabel("multipole ℓ")
        self.ax_bb.set_ylabel(r"$D_\ell^{BB} = \ell(\ell+1)C_\ell^{BB}/2\pi$  [µK²]")
        self.ax_bb.legend(loc="lower right", fontsize=8, frameon=False)
        (self.lines["efficiency"],) = self.ax_eff.plot([], [], color=COLORS["delensed"], lw=1.6)
        self.ax_eff.set_xscale("log")
        self.ax_eff.set_ylim(0, 1)
        self.ax_eff.set_xlabel("multipole ℓ")
        self.ax_eff.set_ylabel(r"efficiency $1 - C_\ell^{res}/C_\ell^{lens}$")
        self.title_bb = self.ax_bb.set_title("", fontsize=9.5)
        self.title_eff = self.ax_eff.set_title("delensing efficiency", fontsize=9.5)
        for ax in (self.ax_bb, self.ax_eff):
            style_axes(ax)

    def plotted(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        return {key: (np.asarray(line.get_xdata()), np.asarray(line.get_ydata())) for key, line in self.lines.items()}

    def _draw(self) -> None:
        forecast = self.forecast
        ell = np.arange(forecast.ell.size)
        used = (ell >= forecast.ell_min) & (ell <= forecast.ell_max)
        self.lines["lensed"].set_data(ell[used], d_ell(forecast.lensed_bb)[used])
        self.lines["residual"].set_data(ell[used], d_ell(forecast.residual_bb)[used])
        self.lines["noise"].set_data(ell[used], d_ell(finite_or_nan(forecast.noise_bb))[used])
        self.lines["efficiency"].set_data(ell[used], forecast.efficiency[used])
        for ax in (self.ax_bb, self.ax_eff):
            set_log_range(ax, max(2, forecast.ell_min), forecast.ell_max)
        values = np.concatenate([d_ell(forecast.lensed_bb)[used], d_ell(forecast.residual_bb)[used]])
        values = values[np.isfinite(values) & (values > 0)]
        self.ax_bb.set_ylim(values.min() / 3.0, values.max() * 5.0)
        self.title_bb.set_text(f"B modes – {self.forecast_noise.experiment.name}, {self.forecast_label} N0")
        self.view.draw()
        bias = uses_b_modes(self.forecast_label)
        self.summary.value = (
            "<table style='margin:1.5em 1em;border-collapse:collapse;white-space:nowrap'>"
            f"<tr><td style='padding:2px 8px'>A_lens^res</td><td><b>{forecast.alens_residual:.3f}</b></td></tr>"
            f"<tr><td style='padding:2px 8px'>σ(r), lensed</td><td>{forecast.sigma_r_lensed:.3g}</td></tr>"
            f"<tr><td style='padding:2px 8px'>σ(r), delensed (A_lens fixed)</td><td><b>{forecast.sigma_r_delensed:.3g}</b></td></tr>"
            "<tr><td style='padding:2px 8px'>σ(r), delensed (A_lens marginalized)</td>"
            f"<td><b>{forecast.sigma_r_delensed_marginalized:.3g}</b></td></tr>"
            f"<tr><td style='padding:2px 8px'>improvement</td><td>{forecast.improvement:.2f}×</td></tr>"
            f"<tr><td style='padding:2px 8px'>ℓ range</td><td>{forecast.ell_min}–{forecast.ell_max}</td></tr>"
            f"<tr><td style='padding:2px 8px'>sky fraction, r</td><td>{forecast.sky_fraction:g}, {forecast.r:g}</td></tr>"
            "</table>"
            + (
                "<div style='margin:0 1em;max-width:18em;color:#9a7d0a;font-size:90%'>⚠ "
                f"{html.escape(self.forecast_label)} uses B modes: delensing the same B modes is biased "
                "(the forecast assumes independent ones).</div>"
                if bias
                else ""
            )
        )
