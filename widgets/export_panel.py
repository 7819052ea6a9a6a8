"""Section 7 – Export: the workbench's current results to a folder the user picks.

What can be written (each only when the workbench holds it):

* ``n0.json`` – the N0 table of the Estimator-noise tab, in the layout of ``lensrec forecast`` (the same
  document builder), with its provenance block;
* ``reconstruction_spectra.json``, ``delensing_forecast.json``, ``delensing_template.json`` – the spectra
  behind the plots;
* ``suite_summary.json`` – the bias budget and amplitude fit of the Validation tab's suite;
* every figure on screen as PNG and PDF.

Every file carries (JSON) or is listed with (figures, in ``export.json``) the provenance block of
:func:`lensrec.io.provenance`. Writes are atomic (:mod:`lensrec.io`) and nothing that exists is replaced
unless "overwrite" is ticked: the whole export is refused before anything is written.
"""

from __future__ import annotations

import html
import os

import ipywidgets as widgets
import numpy as np

import lensrec
from lensrec import io as lensrec_io

from .plotting import FigureView
from .section import Section, labelled, row
from .work import guarded

__all__ = ["ExportSection", "ITEMS"]

# key -> (checkbox label, what it needs)
ITEMS = {
    "n0": ("N0 table (n0.json, the layout of lensrec forecast)", "the Estimator noise tab's result"),
    "reconstruction": ("reconstruction spectra (reconstruction_spectra.json)", "a reconstruction"),
    "delensing": (
        "delensing spectra (delensing_forecast.json, delensing_template.json)",
        "a delensing forecast or template",
    ),
    "suite": ("suite summary (suite_summary.json)", "a finished suite on the Validation tab"),
    "figures": ("figures on screen (PNG and PDF)", "at least one figure"),
}
CAUTION = "Results of simulated skies of idealised surveys (lensrec workbench), not survey-ready measurements."


def _floats(values) -> list:
    return np.asarray(values, dtype=float).tolist()


class ExportSection(Section):
    title = "Export"
    name = "export"
    guide = (
        "Write what the other tabs hold to a folder: the N0 table in the layout of <code>lensrec forecast</code>, "
        "the spectra behind the plots, the suite summary and the figures (PNG and PDF). Every file carries the "
        "provenance block (versions, settings, time). Existing files are never replaced unless you tick "
        "<i>overwrite</i>."
    )

    def __init__(self, state, sections: dict):
        super().__init__(state)
        self.sections = sections
        self.folder = labelled(widgets.Text(description="folder", placeholder="e.g. ~/lensrec-results/run-1",
                                            continuous_update=True), "34em")  # fmt: skip
        self.folder.add_class("lensrec-export-folder")
        self.boxes = {
            key: widgets.Checkbox(
                value=True, description=label, indent=False, layout=widgets.Layout(width="34em", min_width="20em")
            )  # fmt: skip
            for key, (label, _) in ITEMS.items()
        }
        self.overwrite = widgets.Checkbox(value=False, description="overwrite existing files", indent=False,
                                          layout=widgets.Layout(width="16em", min_width="12em"))  # fmt: skip
        self.export_button = widgets.Button(description="Export", icon="download", button_style="primary",
                                            layout=widgets.Layout(width="10em", min_width="10em"))  # fmt: skip
        self.export_button.add_class("lensrec-export")
        self.written = widgets.HTML()
        self.written.add_class("lensrec-export-written")
        self.files: list[str] = []
        self.export_button.on_click(guarded(self.status, "Exporting")(lambda _button: self.export()))
        self.layout(
            controls=[row([self.folder]), *self.boxes.values(),
                      row([self.export_button, self.overwrite], align="center")],
            outputs=[self.written],
        )  # fmt: skip

    # ------------------------------------------------------------------------------------ what
    def available(self) -> dict[str, bool]:
        """Which items the workbench holds now."""
        s = self.sections
        return {
            "n0": self.state.noise is not None,
            "reconstruction": getattr(s.get("reconstruction"), "products", None) is not None,
            "delensing": getattr(s.get("delensing"), "forecast", None) is not None
            or getattr(s.get("delensing"), "template", None) is not None,
            "suite": getattr(s.get("validation"), "result", None) is not None,
            "figures": bool(self.figures()),
        }

    def figures(self) -> dict[str, FigureView]:
        """The figures on screen, by file stem (their names, e.g. "reconstruction-maps")."""
        return {
            value.name: value
            for section in self.sections.values()
            for value in vars(section).values()
            if isinstance(value, FigureView) and value.showing_plot
        }

    def _provenance(self, what: str, extra: dict | None = None) -> dict:
        return lensrec_io.provenance(
            "workbench export", arguments={"item": what}, experiment=self.state.experiment,
            extra={"caution": CAUTION, **(extra or {})},
        )  # fmt: skip

    # ---------------------------------------------------------------------------------- documents
    def documents(self, chosen) -> dict[str, dict]:
        """The JSON documents to write, by file name (each with its provenance block)."""
        s, out = self.sections, {}
        if "n0" in chosen:
            from lensrec.commands.forecast import forecast_document

            noise = self.state.noise
            document, result = forecast_document(noise.experiment, noise=noise)
            document["provenance"] = lensrec_io.provenance(
                "workbench export", arguments={"item": "n0", "lmax_L": int(result.L[-1])},
                experiment=noise.experiment, extra={"settings": dict(result.settings), "caution": CAUTION},
            )  # fmt: skip
            out["n0.json"] = document
        if "reconstruction" in chosen:
            section = s["reconstruction"]
            products, result = section.products, section.result
            out["reconstruction_spectra.json"] = {
                "estimator": result.estimator,
                "lmax_L": int(result.lmax_L),
                "L": list(range(result.lmax_L + 1)),
                "cross_over_input": _floats(products["cross_over_input"]),
                "auto_minus_n0": _floats(products["auto_minus_n0"]),
                "n0": _floats(products["n0"]),
                "theory_phi": _floats(products["theory"]),
                "units": "C_L^phiphi (dimensionless); cross_over_input is a ratio",
                "masked": products["mask"] is not None,
                "sky": dict(self.state.sky.settings) if self.state.sky is not None else None,
                "provenance": self._provenance("reconstruction"),
            }
        if "delensing" in chosen:
            section = s["delensing"]
            if section.forecast is not None:
                forecast = section.forecast
                out["delensing_forecast.json"] = {
                    "estimator": section.forecast_label,
                    "ell": forecast.ell.astype(int).tolist(),
                    "lensed_bb": _floats(forecast.lensed_bb),
                    "residual_bb": _floats(forecast.residual_bb),
                    "noise_bb": _floats(forecast.noise_bb),
                    "alens_residual": float(forecast.alens_residual),
                    "sigma_r_lensed": float(forecast.sigma_r_lensed),
                    "sigma_r_delensed": float(forecast.sigma_r_delensed),
                    "ell_min": int(forecast.ell_min),
                    "ell_max": int(forecast.ell_max),
                    "sky_fraction": float(forecast.sky_fraction),
                    "r": float(forecast.r),
                    "notes": list(forecast.notes),
                    "units": "µK² (C_ell)",
                    "provenance": self._provenance("delensing forecast"),
                }
            if getattr(section, "template", None) is not None:
                template, sky_forecast = section.template, section.sky_forecast
                out["delensing_template.json"] = {
                    "estimator": section.template_estimator,
                    "method": template.method,
                    "ell": template.ell.astype(int).tolist(),
                    "observed_bb": _floats(template.observed_bb),
                    "template_bb": _floats(template.template_bb),
                    "residual_bb": _floats(template.residual_bb),
                    "alens_residual_measured": float(template.alens_residual),
                    "alens_residual_forecast_for_this_sky": float(sky_forecast.alens_residual)
                    if sky_forecast is not None else None,
                    "ell_min": int(template.ell_min),
                    "ell_max": int(template.ell_max),
                    "units": "µK² (C_ell)",
                    "provenance": self._provenance("delensing template"),
                }  # fmt: skip
        if "suite" in chosen:
            from lensrec import bandpowers

            section = s["validation"]
            budget = bandpowers.bias_budget(section.result)
            budget["provenance"] = self._provenance(
                "suite summary", {"suite_folder": getattr(section.suite, "directory", None)}
            )
            out["suite_summary.json"] = budget
        return out

    # ------------------------------------------------------------------------------------ export
    def export(self) -> list[str]:
        """Write the chosen items (what the Export button does); returns the paths written."""
        text = self.folder.value.strip()
        if not text:
            raise ValueError("the export folder is empty; type a folder such as ~/lensrec-results/run-1")
        folder = os.path.abspath(os.path.expanduser(text))
        if os.path.exists(folder) and not os.path.isdir(folder):
            raise ValueError(f"{folder!r} is a file, not a folder; choose a folder for the export")
        available = self.available()
        chosen = [key for key, box in self.boxes.items() if box.value and available[key]]
        skipped = [ITEMS[key][1] for key, box in self.boxes.items() if box.value and not available[key]]
        if not chosen:
            raise ValueError("nothing to export yet: " + (f"there is no {', no '.join(skipped)}" if skipped
                                                           else "tick at least one item"))  # fmt: skip
        documents = self.documents(chosen)
        figures = self.figures() if "figures" in chosen else {}
        paths = [os.path.join(folder, name) for name in documents]
        for stem in figures:
            paths += [os.path.join(folder, f"{stem}.png"), os.path.join(folder, f"{stem}.pdf")]
        paths.append(os.path.join(folder, "export.json"))
        force = self.overwrite.value
        try:
            lensrec_io.check_outputs_free(paths, force=force)  # refuse before writing anything
        except lensrec.OutputExistsError as exc:
            raise lensrec.OutputExistsError(
                f"{exc}; tick 'overwrite existing files' or choose another folder"
            ) from None
        os.makedirs(folder, exist_ok=True)
        written = []
        for name, document in documents.items():
            lensrec_io.write_json(os.path.join(folder, name), document, force=force)
            written.append(os.path.join(folder, name))
        for stem, view in figures.items():
            for extension in ("png", "pdf"):
                path = os.path.join(folder, f"{stem}.{extension}")
                with view._lock, lensrec_io.atomic_path(path, force=force, suffix=f".{extension}") as tmp:
                    view.figure.savefig(tmp, format=extension, dpi=150 if extension == "png" else None)
                written.append(path)
        index = {
            "files": [os.path.basename(p) for p in written],
            "figures": {stem: [f"{stem}.png", f"{stem}.pdf"] for stem in figures},
            "provenance": self._provenance("export", {"items": chosen}),
        }
        lensrec_io.write_json(os.path.join(folder, "export.json"), index, force=force)
        written.append(os.path.join(folder, "export.json"))
        self.files = written
        self.written.value = (
            "<div style='color:#515a5a'>Written:<ul style='margin:0.2em 0'>"
            + "".join(f"<li><code>{html.escape(p)}</code></li>" for p in written)
            + "</ul></div>"
        )
        note = f" (not available: {', '.join(skipped)})" if skipped else ""
        self.status.ok(f"Exported {len(written)} files to {folder}{note}.")
        return written
