"""Section 4 – Reconstruction: the lensing convergence reconstructed from the simulated sky, against the input.

Maps: the input κ and the Wiener-filtered reconstruction κ^WF (C_L^φφ/(C_L^φφ + N0_L) φ̂), both band-limited
at lmax_L, in Mollweide views on one color scale. Spectra: the cross-spectrum of the reconstruction with the
input divided by the input's auto-spectrum (≈ 1 for a unit-response estimator), and the reconstruction's
auto-spectrum minus the analytic N0 against the theory C_L^φφ, with N0 drawn; on a masked sky the pseudo-
spectra are divided by the mask moments of lensrec.power (⟨w²⟩ for the cross, ⟨w⁴⟩ for the auto).
"""

from __future__ import annotations

import functools

import healpy
import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec import harmonics
from lensrec.filter_choice import FILTERS
from lensrec.labels import ESTIMATORS
from lensrec.reconstruction_check import check_reconstruction

from .plotting import (
    COLORS,
    MAP_CMAP,
    FigureView,
    estimator_color,
    phi_plot_units,
    set_log_range,
    style_axes,
    symmetric_limit,
)
from .section import Section, labelled, row
from .work import Cancelled, LongTask

__all__ = ["ReconstructionSection", "band_edges"]

MAPS_FIGURE = (10.4, 3.4)
SPECTRA_FIGURE = (10.4, 3.8)
MOLLWEIDE_XSIZE = 600
BANDS = 16
# what reconstruct's progress(done, total) steps mean for the quadratic estimator
# One simulated cut sky carries the mask's mean-field and the full-sky normalization, which only a suite of
# simulations measures and removes; its single-sky response is therefore no validation.
CUT_SKY_CAUTION = (
    " Cut sky: this single simulation still holds the mask's mean-field and uses the full-sky normalization, so "
    "the number is indicative only; run a suite on the sky's settings (Validation tab) for the debiased result."
)
RECONSTRUCTION_STEPS = {0: "filtering the maps…", 1: "forming the quadratic estimate…", 2: "normalizing…"}


def band_edges(lmax_L: int, bands: int = BANDS, L_min: int = 2) -> np.ndarray:
    """Logarithmically spaced band edges over [L_min, lmax_L], each band at least two multipoles wide."""
    edges = [L_min]
    for edge in np.geomspace(L_min, lmax_L + 1, bands + 1)[1:].round().astype(int):
        if edge - edges[-1] >= 2:
            edges.append(int(edge))
    edges[-1] = lmax_L + 1
    return np.array(edges)


class ReconstructionSection(Section):
    title = "Reconstruction"
    name = "reconstruction"
    guide = (
        "Reconstruct φ from the sky of the Sky tab with a quadratic estimator, filtered with the experiment the "
        "sky was simulated with, up to the sky's lmax. Left: the input κ; right: the Wiener-filtered "
        "reconstruction on the same color scale. Spectra are band-averaged for display; on a masked sky they are "
        "divided by the mask moments ⟨w²⟩ (cross) and ⟨w⁴⟩ (auto)."
    )

    def __init__(self, state, nthreads=None):
        super().__init__(state)
        self.nthreads = nthreads
        self.result = None
        self.products = None
        self.estimator = labelled(widgets.Dropdown(options=list(ESTIMATORS), value="MV", description="estimator"),
                                  "18em")  # fmt: skip
        self.estimator.add_class("lensrec-reconstruction-estimator")
        self.lmax_L = labelled(widgets.IntText(value=0, description="highest lensing $L$"), "18em")
        self.filter = labelled(widgets.Dropdown(options=list(FILTERS), value="auto", description="filter"), "18em")
        self.filter.add_class("lensrec-reconstruction-filter")
        self.hint = widgets.HTMLMath(
            "<span style='color:#515a5a'>&nbsp;0 = the sky's band limit $\\ell_\\mathrm{max}$</span>"
        )
        self.lensing_iterations = labelled(
            widgets.BoundedIntText(value=0, min=0, max=10, description="lensing iterations"), "18em"
        )
        self.lensing_iterations.add_class("lensrec-lensing-iterations")
        self.iterations_hint = widgets.HTML(
            "<span style='color:#515a5a'>&nbsp;0 = quadratic; ≥ 1: delens E, B and estimate again (EB, full sky)</span>"
        )
        self.run_button = widgets.Button(description="Reconstruct", icon="play", button_style="primary")
        self.run_button.add_class("lensrec-reconstruct")
        self.cancel_button = widgets.Button(description="Cancel", icon="stop", button_style="warning")
        self.cancel_button.add_class("lensrec-cancel-reconstruction")
        self.maps_view = FigureView(MAPS_FIGURE, name="reconstruction-maps")
        self.spectra_view = FigureView(SPECTRA_FIGURE, name="reconstruction-spectra")
        self.task = LongTask(self.run_button, self.status, "Reconstructing the lensing potential", "reconstruction",
                             cancel_button=self.cancel_button, views=[self.maps_view, self.spectra_view])  # fmt: skip
        self.tasks.append(self.task)
        self._build_figures()

        self.run_button.on_click(lambda _button: self.run())
        state.observe(self._on_sky, names="sky")
        self._on_sky({"new": state.sky})
        self.layout(
            controls=[row([self.estimator, self.filter, self.lmax_L, self.hint], align="center"),
                      row([self.lensing_iterations, self.iterations_hint], align="center"),
                      row([self.run_button, self.cancel_button, self.task.widget], align="center")],
            outputs=[self.maps_view.widget, self.spectra_view.widget],
        )  # fmt: skip

    # ------------------------------------------------------------------------------------ inputs
    def _on_sky(self, change) -> None:
        if self.result is not None:
            self.status.warn("The sky has changed; the reconstruction shown before was of the previous one.")
            self.result = self.products = None
            self.state.reconstruction = None
        if change["new"] is None:
            message = "No sky yet: simulate one on the Sky tab, then press <b>Reconstruct</b> here."
        else:
            message = "Press <b>Reconstruct</b> to reconstruct the lensing potential of the current sky."
        for view in (self.maps_view, self.spectra_view):
            view.show_note(message)

    # -------------------------------------------------------------------------------- reconstruct
    def run(self) -> bool:
        """Start the reconstruction in the background (what the Reconstruct button does)."""
        sky, experiment, spectra = self.state.sky, self.state.sky_experiment, self.state.spectra
        if sky is None:
            self.status.error("No sky to reconstruct: simulate one on the Sky tab first.")
            return False
        estimator = self.estimator.value
        lmax_L = self.lmax_L.value or sky.lmax
        nthreads = self.nthreads
        iterations = self.lensing_iterations.value

        choice = self.filter.value

        def work(report, cancel):
            report(0.02, f"filtering the maps and forming the {estimator} estimate…")

            def step(done, total):  # the library's steps mapped onto 2–80% of the bar
                text = (f"step {done} of {total} (quadratic, then iterations)…" if iterations
                        else RECONSTRUCTION_STEPS.get(done, f"step {done} of {total}…"))  # fmt: skip
                report(0.02 + 0.78 * done / total, text)  # raises Cancelled between steps when asked to stop

            def cg_step(iteration, residual):  # the optimal filter's progress; report() raises on Cancel
                report(min(0.6, 0.05 + 0.005 * iteration), f"optimal filter: iteration {iteration}, residual "
                       f"{residual:.1e}")  # fmt: skip

            steps = {"lensing_iterations": iterations, "cancel": cancel} if iterations else {}
            # the sky's maps already carry its mask: maps_masked keeps it from being applied twice
            masking = {"maps_masked": True} if sky.mask is not None and not iterations else {}
            result = lensrec.reconstruct(sky.maps, experiment, spectra, estimator=estimator, lmax_L=lmax_L,
                                         mask=sky.mask, lmax=sky.lmax, nthreads=nthreads, filter=choice,
                                         noise=sky.pixel_noise, cg_progress=cg_step, progress=step, **masking,
                                         **steps)  # fmt: skip
            if cancel.is_set() or result.settings.get("cancelled"):
                raise Cancelled()  # the iterations stopped early: nothing is shown
            report(0.8, "Wiener filter, κ maps and spectra…")
            return result, self._products(result, sky, spectra)

        def finish(outcome):
            result, products = outcome
            self.result, self.products = result, products
            self.state.reconstruction = result
            self._draw()
            mean = products["comparison"].mode_weighted_response(2, result.lmax_L)
            message = (f"Reconstructed {estimator} up to L = {result.lmax_L}; cross/input averaged over L = 2–"
                       f"{result.lmax_L} with weights 2L+1: {mean:.2f} (1 for a unit-response estimator).")  # fmt: skip
            if sky.mask is not None:
                message += CUT_SKY_CAUTION
            return message

        return self.task.start(work, finish)

    def _products(self, result, sky, spectra) -> dict:
        """Maps and spectra to draw, all from lensrec (Wiener filter, κ maps, spectra of a_LM)."""
        lmax_L, nside = result.lmax_L, sky.nside
        phi_input = harmonics.truncate_alm(sky.phi_alm, lmax_L, sky.lmax_unlensed)
        n0 = result.n0["gradient"]
        phi_wf = lensrec.wiener_filter_phi(result.phi_alm, n0, spectra.phi)
        kappa_input = lensrec.kappa_map(phi_input, nside, lmax_L, nthreads=self.nthreads)
        kappa_wf = lensrec.kappa_map(phi_wf, nside, lmax_L, nthreads=self.nthreads)
        # on a masked sky the spectra are divided by the mask moments the fields carry (lensrec.power)
        comparison = lensrec.compare_with_input(result, sky.phi_alm)
        ratio, auto_minus_n0 = comparison.cross_over_input, comparison.auto_minus_n0
        # bands bin the plotted quantity (lensrec.power.bin_spectrum), with Gaussian errors for this sky fraction
        sky_fraction = 1.0 if sky.mask is None else lensrec.sky_fraction_moments(sky.mask)["sky_fraction_spectra"]
        check = check_reconstruction(comparison, spectra.phi, band_edges(lmax_L), sky_fraction=sky_fraction)
        return {
            "comparison": comparison,
            "check": check,
            "kappa_input": kappa_input,
            "kappa_wf": kappa_wf,
            "cross_over_input": ratio,
            "auto_minus_n0": auto_minus_n0,
            "n0": n0,
            "theory": np.asarray(spectra.phi[: lmax_L + 1]),
            "mask": sky.mask,
        }

    # ---------------------------------------------------------------------------------- the plots
    def _build_figures(self) -> None:
        figure = self.maps_view.figure
        grid = figure.add_gridspec(1, 3, width_ratios=[1.0, 1.0, 0.04], left=0.01, right=0.93, bottom=0.04,
                                   top=0.88, wspace=0.06)  # fmt: skip
        blank = np.full((MOLLWEIDE_XSIZE // 2, MOLLWEIDE_XSIZE), np.nan)
        cmap = matplotlib_cmap(MAP_CMAP)
        self.images = {}
        self.map_titles = {}
        for index, key in enumerate(("kappa_input", "kappa_wf")):
            ax = figure.add_subplot(grid[index])
            self.images[key] = ax.imshow(blank, origin="lower", extent=(-2, 2, -1, 1), cmap=cmap,
                                         interpolation="nearest")  # fmt: skip
            ax.set_axis_off()
            ax.set_xlim(-2.02, 2.02)
            ax.set_ylim(-1.02, 1.02)
            self.map_titles[key] = ax.set_title("", fontsize=9.5)
        colorbar = figure.colorbar(self.images["kappa_input"], cax=figure.add_subplot(grid[2]))
        colorbar.set_label("κ (dimensionless)", fontsize=9)
        colorbar.ax.tick_params(labelsize=8)

        figure = self.spectra_view.figure
        figure.subplots_adjust(left=0.07, right=0.98, bottom=0.14, top=0.9, wspace=0.25)
        self.ax_cross, self.ax_auto = figure.subplots(1, 2)
        self.ax_cross.axhline(1.0, color=COLORS["noise"], lw=1.0, ls="--")
        (self.cross_line,) = self.ax_cross.plot([], [], color=COLORS["reconstructed"], lw=0.8, alpha=0.35,
                                                label="per L")  # fmt: skip
        (self.cross_band,) = self.ax_cross.plot([], [], "o", color=COLORS["reconstructed"], ms=4,
                                                label="bands ± 1σ")  # fmt: skip
        self.ax_cross.set_xlabel("lensing multipole L")
        self.ax_cross.set_ylabel(r"$C_L^{\hat\phi\phi} / C_L^{\phi\phi}$ (input)")
        self.ax_cross.set_title("cross-spectrum with the input / input spectrum", fontsize=9.5)
        self.ax_cross.legend(loc="lower left", fontsize=8, frameon=False)
        (self.theory_line,) = self.ax_auto.plot(
            [], [], color=COLORS["signal"], lw=3.0, label=r"theory $C_L^{\phi\phi}$"
        )
        (self.theory_band,) = self.ax_auto.plot([], [], "_", color=COLORS["phi"], ms=9, mew=1.5,
                                                label="theory, binned like the data")  # fmt: skip
        (self.n0_line,) = self.ax_auto.plot([], [], color=estimator_color("MV"), lw=1.2, ls="--", label="N0")
        (self.auto_band,) = self.ax_auto.plot([], [], "o", color=COLORS["reconstructed"], ms=4,
                                              label="auto − N0, bands ± 1σ")  # fmt: skip
        self.error_bars = []
        (self.auto_band_negative,) = self.ax_auto.plot([], [], "o", mfc="none", color=COLORS["reconstructed"], ms=4,
                                                       label="negative bands, |auto − N0|")  # fmt: skip
        self.ax_auto.set_xscale("log")
        self.ax_auto.set_yscale("log")
        self.ax_auto.set_xlabel("lensing multipole L")
        self.ax_auto.set_ylabel(r"$[L(L+1)]^2 C_L / 2\pi$")
        self.auto_title = self.ax_auto.set_title("", fontsize=9.5)
        self.ax_auto.legend(loc="lower left", fontsize=8, frameon=False)
        for ax in (self.ax_cross, self.ax_auto):
            style_axes(ax)

    def plotted(self) -> dict:
        """The drawn data (tests compare it with lensrec's and healpy's results)."""
        return {
            "kappa_input": np.asarray(self.images["kappa_input"].get_array(), dtype=float),
            "kappa_wf": np.asarray(self.images["kappa_wf"].get_array(), dtype=float),
            "clim": (self.images["kappa_input"].get_clim(), self.images["kappa_wf"].get_clim()),
            "cross": (np.asarray(self.cross_line.get_xdata()), np.asarray(self.cross_line.get_ydata())),
            "auto_band": (np.asarray(self.auto_band.get_xdata()), np.asarray(self.auto_band.get_ydata())),
            "n0": (np.asarray(self.n0_line.get_xdata()), np.asarray(self.n0_line.get_ydata())),
            "theory": (np.asarray(self.theory_line.get_xdata()), np.asarray(self.theory_line.get_ydata())),
            "theory_band": (np.asarray(self.theory_band.get_xdata()), np.asarray(self.theory_band.get_ydata())),
            "errors": [
                np.asarray([(seg[1][1] - seg[0][1]) / 2.0 for seg in bars.lines[2][0].get_segments()])
                for bars in self.error_bars
            ],
        }

    def _draw(self) -> None:
        products, result = self.products, self.result
        nside = healpy.npix2nside(products["kappa_input"].size)
        projector = healpy.projector.MollweideProj(xsize=MOLLWEIDE_XSIZE)
        vec2pix = functools.partial(healpy.vec2pix, nside)
        limit = symmetric_limit(products["kappa_input"])
        for key, title in (
            ("kappa_input", "input κ"),
            ("kappa_wf", f"reconstructed κ, Wiener-filtered ({result.estimator})"),
        ):
            values = np.array(products[key], dtype=float)
            if products["mask"] is not None:
                values[np.asarray(products["mask"]) == 0] = np.nan
            image = np.array(projector.projmap(values, vec2pix), dtype=float)
            image[~np.isfinite(image)] = np.nan
            self.images[key].set_data(image)
            self.images[key].set_clim(-limit, limit)  # one color scale for the comparison
            self.map_titles[key].set_text(f"{title}, L ≤ {result.lmax_L}")
        self.maps_view.draw()

        L = np.arange(result.lmax_L + 1)
        shown = L >= 2
        self.cross_line.set_data(L[shown], products["cross_over_input"][shown])
        check = products["check"]
        self.cross_band.set_data(check.L_eff, check.response)
        for bars in self.error_bars:
            bars.remove()
        self.error_bars = [
            self.ax_cross.errorbar(check.L_eff, check.response, yerr=check.response_error, fmt="none",
                                   ecolor=COLORS["reconstructed"], capsize=2),
            self.ax_auto.errorbar(check.L_eff, np.abs(check.auto_minus_bias), yerr=check.auto_error, fmt="none",
                                  ecolor=COLORS["reconstructed"], capsize=2),
        ]  # fmt: skip
        self.theory_band.set_data(check.L_eff, check.theory)
        self.ax_cross.set_xlim(2, result.lmax_L)
        self.ax_cross.set_ylim(-0.5, 2.5)
        units = "phi"
        self.theory_line.set_data(L[shown], phi_plot_units(products["theory"], units)[shown])
        self.n0_line.set_data(L[shown], phi_plot_units(products["n0"], units)[shown])
        centers, means = check.L_eff, check.auto_minus_bias  # binned [L(L+1)]^2 C_L / 2pi, like the theory
        self.auto_band.set_data(centers, np.where(means > 0, means, np.nan))
        self.auto_band_negative.set_data(centers, np.where(means < 0, -means, np.nan))
        set_log_range(self.ax_auto, 2, result.lmax_L)
        top = np.nanmax(phi_plot_units(products["theory"], units)[shown])
        self.ax_auto.set_ylim(top / 300.0, top * 30.0)
        masked = products["mask"] is not None
        self.auto_title.set_text("auto − N0 against theory" + (" (masked: pseudo-spectra ÷ ⟨w⁴⟩)" if masked else ""))
        self.spectra_view.draw()


@functools.lru_cache(maxsize=2)
def matplotlib_cmap(name: str):
    import matplotlib

    return matplotlib.colormaps[name].with_extremes(bad=(0.80, 0.82, 0.83, 0.0))
