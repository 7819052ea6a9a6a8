"""Section 3 – Sky: simulate one lensed, noisy, masked sky and look at its fields.

The viewer shows one field at a time in an all-sky Mollweide view and a zoomed gnomonic view (healpy's
projector classes give the arrays; matplotlib's imshow draws them), both on one color scale.
T, Q, U are the observed maps (beam, noise, mask); E and B are the lensed signal before beam and noise;
φ, κ and |d| are the input lensing fields.
"""

from __future__ import annotations

import functools
import threading

import healpy
import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec import harmonics
from lensrec.demo_patch import patch_footprint

from .plotting import MAP_CMAP, POSITIVE_CMAP, FigureView, symmetric_limit
from .section import Section, column, heading, labelled, row
from .work import LiveUpdate, LongTask

__all__ = ["SkySection", "FIELDS", "MASKS"]

NSIDES = (16, 32, 64, 128, 256, 512, 1024)
MASKS = {"none": "none", "latitude cut": "latitude", "cap": "cap", "deep patch (Quiet Hollow)": "patch"}
# field key -> (button label, title, unit label, signed)
FIELDS = {
    "T": ("T", "observed T", "µK", True),
    "Q": ("Q", "observed Q", "µK", True),
    "U": ("U", "observed U", "µK", True),
    "E": ("E", "lensed E (signal, before beam and noise)", "µK", True),
    "B": ("B", "lensed B (signal, before beam and noise)", "µK", True),
    "phi": ("φ", "input lensing potential φ", "dimensionless", True),
    "kappa": ("κ", "input convergence κ", "dimensionless", True),
    "deflection": ("|d|", "input deflection |d|", "arcmin", False),
}
MAP_FIGURE = (10.4, 3.9)
# what simulate_sky's progress(done, 6) steps are followed by
SIMULATION_STEPS = {
    0: "drawing the Gaussian CMB and φ…",
    1: "computing the deflection field…",
    2: "lensing T…",
    3: "lensing Q and U…",
    4: "beam and map synthesis…",
    5: "noise and mask…",
    6: "simulated",
}
MOLLWEIDE_XSIZE = 720
GNOMONIC_XSIZE = 360


class SkySection(Section):
    title = "Sky"
    name = "sky"
    guide = (
        "Simulate one observed sky of the current experiment: Gaussian unlensed CMB and φ, exact lensing on "
        r"the sphere, beam, white or 1/f noise, then the mask. The band limit $\ell_\mathrm{max}$ of the maps is at "
        r"most $3\,N_\mathrm{side} - 1$. The same seed always gives the same sky. Then pick a field and move the "
        "zoom window."
    )

    def __init__(self, state, nthreads=None, delay: float = 0.1):
        super().__init__(state)
        self.nthreads = nthreads
        self.sky = None
        self._maps: dict[str, np.ndarray] = {}
        self._maps_lock = threading.Lock()
        self.deflection_rms_arcmin = None

        self.nside = labelled(widgets.Dropdown(options=list(NSIDES), value=128, description="nside"), "18em")
        self.nside.add_class("lensrec-sky-nside")
        self.lmax = labelled(widgets.IntText(value=256, description=r"band limit $\ell_\mathrm{max}$"), "18em")
        self.lmax.add_class("lensrec-sky-lmax")
        self.seed = labelled(widgets.IntText(value=0, description="seed"), "18em")
        self.noise = widgets.Checkbox(value=True, description="add instrument noise", indent=False,
                                      layout=widgets.Layout(width="18em", min_width="12em"))  # fmt: skip
        self.mask = labelled(widgets.Dropdown(options=list(MASKS.items()), value="none", description="mask"), "18em")
        self.mask.add_class("lensrec-sky-mask")
        self.b_min = labelled(widgets.FloatText(value=20.0, description="cut |b| < (deg)"), "18em")
        self.cap_lon = labelled(widgets.FloatText(value=0.0, description="cap center lon (deg)"), "18em")
        self.cap_lat = labelled(widgets.FloatText(value=-60.0, description="cap center lat (deg)"), "18em")
        self.cap_radius = labelled(widgets.FloatText(value=30.0, description="cap radius (deg)"), "18em")
        self.taper = labelled(widgets.FloatText(value=0.0, description="taper width (deg)"), "18em")
        self.simulate_button = widgets.Button(description="Simulate", icon="play", button_style="primary")
        self.simulate_button.add_class("lensrec-simulate")
        self.cancel_button = widgets.Button(description="Cancel", icon="stop", button_style="warning")
        self.cancel_button.add_class("lensrec-cancel-sky")

        self.field = widgets.ToggleButtons(options=[(v[0], k) for k, v in FIELDS.items()], value="T",
                                           style={"button_width": "5em"})  # fmt: skip
        self.field.add_class("lensrec-sky-field")
        self.zoom_lon = labelled(widgets.FloatSlider(value=0.0, min=-180, max=180, step=1, continuous_update=False,
                                                     description="zoom lon (deg)"), "26em")  # fmt: skip
        self.zoom_lat = labelled(widgets.FloatSlider(value=-60.0, min=-90, max=90, step=1, continuous_update=False,
                                                     description="zoom lat (deg)"), "26em")  # fmt: skip
        self.zoom_size = labelled(widgets.FloatSlider(value=20.0, min=1, max=90, step=1, continuous_update=False,
                                                      description="zoom size (deg)"), "26em")  # fmt: skip
        self.view = FigureView(MAP_FIGURE, name="sky-maps")
        self.task = LongTask(self.simulate_button, self.status, "Simulating the sky", "sky",
                             cancel_button=self.cancel_button, views=[self.view])  # fmt: skip
        self.tasks.append(self.task)
        self._build_figure()
        self.viewer = LiveUpdate(self._draw, self.status, "Drawing the maps", delay=delay)
        self.live.append(self.viewer)

        self.nside.observe(self._on_nside, names="value")
        self.mask.observe(lambda change: self._show_mask_controls(), names="value")
        self.simulate_button.on_click(lambda _button: self.simulate())
        for control in (self.field, self.zoom_lon, self.zoom_lat, self.zoom_size):
            control.observe(lambda change: self._view_changed(), names="value")
        state.observe(self._on_experiment, names="experiment")

        self.mask_box = widgets.VBox([self.mask, self.b_min, self.cap_lon, self.cap_lat, self.cap_radius, self.taper])
        self._show_mask_controls()
        self.layout(
            controls=[
                row([
                    column([heading("Resolution and seed"), self.nside, self.lmax, self.seed, self.noise]),
                    column([heading("Mask"), self.mask_box]),
                ]),
                row([self.simulate_button, self.cancel_button, self.task.widget], align="center"),
            ],
            outputs=[
                heading("Map viewer"),
                self.field,
                row([self.zoom_lon, self.zoom_lat, self.zoom_size]),
                self.view.widget,
            ],
        )  # fmt: skip
        self.view.show_note("No sky yet: choose nside, lmax, seed, noise and mask above, then press <b>Simulate</b>.")

    # ------------------------------------------------------------------------------------ controls
    def _on_nside(self, change) -> None:
        self.lmax.value = 2 * change["new"]

    def _show_mask_controls(self) -> None:
        kind = self.mask.value
        for control, wanted in ((self.b_min, "latitude"), (self.cap_lon, "cap"), (self.cap_lat, "cap"),
                                (self.cap_radius, "cap"), (self.taper, ("latitude", "cap"))):  # fmt: skip
            control.layout.display = None if kind in (wanted if isinstance(wanted, tuple) else (wanted,)) else "none"

    def _on_experiment(self, change) -> None:
        if self.sky is not None and self.state.sky_experiment != change["new"]:
            self.status.warn(
                "The experiment has changed since this sky was simulated; press Simulate to make one with the "
                "new settings (reconstruction keeps using the experiment the sky was made with)."
            )

    def settings(self) -> dict:
        """The simulation settings the controls describe (validated by lensrec when used)."""
        return {"nside": self.nside.value, "lmax": self.lmax.value, "seed": self.seed.value,
                "noise": self.noise.value}  # fmt: skip

    def build_mask(self, nside: int):
        """The mask the controls describe, from lensrec's mask helpers (None for no mask)."""
        kind = self.mask.value
        if kind == "latitude":
            return lensrec.latitude_mask(nside, self.b_min.value, width=self.taper.value)
        if kind == "cap":
            return lensrec.cap_mask(nside, self.cap_lon.value, self.cap_lat.value, self.cap_radius.value,
                                    width=self.taper.value)  # fmt: skip
        if kind == "patch":
            return patch_footprint(nside)[0]
        return None

    def build_noise(self, experiment, nside: int):
        """The per-pixel noise of the deep patch (its hit map), or None for the experiment's uniform noise."""
        if self.mask.value != "patch" or not self.noise.value:
            return None
        mask, hits = patch_footprint(nside)
        return lensrec.PixelNoise.from_hits(experiment, hits, mask)

    # ---------------------------------------------------------------------------------- simulate
    def simulate(self) -> bool:
        """Start a simulation in the background (what the Simulate button does)."""
        experiment, spectra = self.state.experiment, self.state.spectra
        settings = self.settings()
        nside, lmax = settings["nside"], settings["lmax"]
        if isinstance(lmax, int) and lmax > 3 * nside - 1:
            # the library would allow it with aliasing; the workbench keeps maps within the HEALPix band limit
            self.status.error(f"Simulating the sky: lmax={lmax} exceeds 3·nside − 1 = {3 * nside - 1} for nside "
                              f"{nside}; lower the band limit to at most {3 * nside - 1} or raise nside.")  # fmt: skip
            return False

        def work(report, cancel):
            report(0.02, "building the mask…")
            mask = self.build_mask(nside)
            pixel_noise = self.build_noise(experiment, nside)

            def step(done, total):  # the library's steps mapped onto 5–85% of the bar; Cancel stops between them
                report(0.05 + 0.8 * done / total, SIMULATION_STEPS.get(done, f"step {done} of {total}…"))

            sky = lensrec.simulate_sky(experiment, spectra, mask=mask, pixel_noise=pixel_noise, nthreads=self.nthreads,
                                       progress=step, **settings)  # fmt: skip
            report(0.85, "preparing the map viewer…")
            maps = self._field_maps(sky, report)
            return sky, maps

        def finish(result):
            sky, maps = result
            with self._maps_lock:
                self.sky, self._maps = sky, maps
            self.deflection_rms_arcmin = float(np.sqrt(np.mean(maps["deflection"] ** 2)))
            self.state.sky_experiment = experiment
            self.state.sky = sky
            self._draw()
            return (f"Simulated nside {sky.nside}, lmax {sky.lmax}, seed {sky.settings['seed']} for "
                    f"{experiment.name}; rms deflection {self.deflection_rms_arcmin:.2f} arcmin.")  # fmt: skip

        return self.task.start(work, finish)

    def _field_maps(self, sky, report=None) -> dict[str, np.ndarray]:
        nside, lmax = sky.nside, sky.lmax
        lensed = sky.lensed_alm
        report = report or (lambda fraction, text: None)
        report(0.87, "deflection and convergence maps…")
        lensing = lensrec.deflection_maps(sky.phi_alm, nside, lmax, nthreads=self.nthreads)
        phi = harmonics.truncate_alm(sky.phi_alm, lmax, sky.lmax_unlensed)
        report(0.93, "E, B and φ maps…")
        maps = {
            "T": sky.maps[0], "Q": sky.maps[1], "U": sky.maps[2],
            "E": harmonics.alm2map(lensed[1], nside, lmax, nthreads=self.nthreads),
            "B": harmonics.alm2map(lensed[2], nside, lmax, nthreads=self.nthreads),
            "phi": harmonics.alm2map(phi, nside, lmax, nthreads=self.nthreads),
            "kappa": lensing.kappa,
            "deflection": lensing.magnitude_arcmin,
        }  # fmt: skip
        return maps

    def field_map(self, key: str) -> np.ndarray:
        """The full-sky map behind the viewer for ``key`` (see FIELDS); unobserved pixels are NaN for T, Q, U."""
        with self._maps_lock:
            sky, maps = self.sky, self._maps
        if sky is None:
            raise ValueError("no sky has been simulated yet; press Simulate")
        values = np.array(maps[key], dtype=float)
        if key in ("T", "Q", "U") and sky.mask is not None:
            values[np.asarray(sky.mask) == 0] = np.nan
        return values

    # ------------------------------------------------------------------------------------ viewer
    def _build_figure(self) -> None:
        figure = self.view.figure
        grid = figure.add_gridspec(1, 3, width_ratios=[2.0, 1.0, 0.05], left=0.01, right=0.93, bottom=0.06,
                                   top=0.88, wspace=0.08)  # fmt: skip
        self.ax_all = figure.add_subplot(grid[0])
        self.ax_zoom = figure.add_subplot(grid[1])
        self.ax_bar = figure.add_subplot(grid[2])
        blank_all = np.full((MOLLWEIDE_XSIZE // 2, MOLLWEIDE_XSIZE), np.nan)
        blank_zoom = np.full((GNOMONIC_XSIZE, GNOMONIC_XSIZE), np.nan)
        cmap = _cmap(MAP_CMAP)
        self.image_all = self.ax_all.imshow(blank_all, origin="lower", extent=(-2, 2, -1, 1), cmap=cmap,
                                            interpolation="nearest")  # fmt: skip
        self.image_zoom = self.ax_zoom.imshow(blank_zoom, origin="lower", cmap=cmap, interpolation="nearest")
        self.shade_all = self.ax_all.imshow(np.zeros(blank_all.shape + (4,)), origin="lower", extent=(-2, 2, -1, 1),
                                            interpolation="nearest")  # fmt: skip
        self.shade_zoom = self.ax_zoom.imshow(
            np.zeros(blank_zoom.shape + (4,)), origin="lower", interpolation="nearest"
        )
        (self.outline,) = self.ax_all.plot([], [], color="#17202a", lw=1.2)
        self.ax_all.set_xlim(-2.02, 2.02)
        self.ax_all.set_ylim(-1.02, 1.02)
        for ax in (self.ax_all, self.ax_zoom):
            ax.set_xticks([])
            ax.set_yticks([])
            for spine in ax.spines.values():
                spine.set_visible(ax is self.ax_zoom)
        self.ax_all.set_aspect("equal")
        self.colorbar = figure.colorbar(self.image_all, cax=self.ax_bar)
        self.colorbar.ax.tick_params(labelsize=8)
        self.title_all = self.ax_all.set_title("", fontsize=9.5)
        self.title_zoom = self.ax_zoom.set_title("", fontsize=9.5)

    def _view_changed(self) -> None:
        if self.sky is not None:
            self.viewer.trigger()

    def projections(self, key: str) -> dict:
        """Projected arrays for field ``key`` at the current zoom settings.

        Returns a dict with ``all_sky`` (Mollweide) and ``zoom`` (gnomonic) arrays (NaN where nothing is
        drawn), ``all_sky_unobserved`` / ``zoom_unobserved`` boolean arrays of masked pixels, the shared color
        ``limits`` and the zoom window's ``outline`` (x, y) in Mollweide coordinates.
        """
        values = self.field_map(key)
        nside = healpy.npix2nside(values.size)
        vec2pix = functools.partial(healpy.vec2pix, nside)
        mollweide = healpy.projector.MollweideProj(xsize=MOLLWEIDE_XSIZE)
        gnomonic = healpy.projector.GnomonicProj(rot=(self.zoom_lon.value, self.zoom_lat.value, 0.0),
                                                 xsize=GNOMONIC_XSIZE, reso=self.zoom_size.value * 60.0 / GNOMONIC_XSIZE)  # fmt: skip
        out = {}
        for name, projector in (("all_sky", mollweide), ("zoom", gnomonic)):
            array = np.array(projector.projmap(values, vec2pix), dtype=float)
            out[f"{name}_unobserved"] = np.isnan(array)  # inside the view but masked; −inf is outside the ellipse
            array[~np.isfinite(array)] = np.nan
            out[name] = array
        if FIELDS[key][3]:
            limit = symmetric_limit(values)
            out["limits"] = (-limit, limit)
        else:
            finite = values[np.isfinite(values)]
            out["limits"] = (0.0, float(np.percentile(finite, 99.5)) if finite.size else 1.0)
        out["outline"] = _outline(gnomonic, mollweide)
        return out

    def _draw(self) -> None:
        if self.sky is None:
            return
        key = self.field.value
        projected = self.projections(key)
        _, title, unit, signed = FIELDS[key]
        cmap = _cmap(MAP_CMAP if signed else POSITIVE_CMAP)
        half = self.zoom_size.value / 2.0
        for image, shade, name in (
            (self.image_all, self.shade_all, "all_sky"),
            (self.image_zoom, self.shade_zoom, "zoom"),
        ):
            image.set_data(projected[name])
            image.set_cmap(cmap)
            image.set_clim(*projected["limits"])
            shade.set_data(_shade(projected[f"{name}_unobserved"]))
        self.image_zoom.set_extent((-half, half, -half, half))
        self.shade_zoom.set_extent((-half, half, -half, half))
        self.outline.set_data(*projected["outline"])
        self.outline.set_color("#17202a" if signed else "#48c9b0")  # visible on both color maps
        self.colorbar.set_label(unit, fontsize=9)
        self.title_all.set_text(f"{title} – nside {self.sky.nside}, lmax {self.sky.lmax}")
        self.title_zoom.set_text(
            f"zoom {self.zoom_size.value:g}° × {self.zoom_size.value:g}° at "
            f"({self.zoom_lon.value:g}°, {self.zoom_lat.value:g}°)"
        )
        self.view.draw()


def _outline(gnomonic, mollweide, points: int = 25):
    """The border of the gnomonic window drawn on the Mollweide view (NaN breaks where it wraps around)."""
    x0, x1, y0, y1 = gnomonic.get_extent()
    t = np.linspace(0.0, 1.0, points)
    xs = np.concatenate([x0 + (x1 - x0) * t, np.full(points, x1), x1 - (x1 - x0) * t, np.full(points, x0)])
    ys = np.concatenate([np.full(points, y0), y0 + (y1 - y0) * t, np.full(points, y1), y1 - (y1 - y0) * t])
    lon, lat = gnomonic.xy2ang(xs, ys, lonlat=True)
    mx, my = mollweide.ang2xy(np.asarray(lon), np.asarray(lat), lonlat=True)
    mx, my = np.asarray(mx, dtype=float), np.asarray(my, dtype=float)
    jumps = np.flatnonzero(np.abs(np.diff(mx)) > 1.0) + 1
    return np.insert(mx, jumps, np.nan), np.insert(my, jumps, np.nan)


def _shade(unobserved: np.ndarray) -> np.ndarray:
    """An RGBA layer: gray over unobserved (masked) pixels, transparent elsewhere."""
    rgba = np.zeros(unobserved.shape + (4,))
    rgba[unobserved] = (0.80, 0.82, 0.83, 1.0)
    return rgba


@functools.lru_cache(maxsize=4)
def _cmap(name: str):
    import matplotlib

    # transparent outside the Mollweide ellipse; masked pixels get a gray layer on top
    return matplotlib.colormaps[name].with_extremes(bad=(1.0, 1.0, 1.0, 0.0))
