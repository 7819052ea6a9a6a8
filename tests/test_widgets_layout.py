"""Headless tests of how the workbench lays itself out and labels things, for every section at once.

A browser decides the final pixels (tests/test_browser_workbench.py measures them); here we check the layout
rules that make narrow windows work: figures scale with their container and keep their aspect ratio, rows
of controls wrap instead of squeezing, no control is given a width under 60 px, and no label is a code name.
"""

import re

import ipywidgets as widgets
import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from widgets import Workbench
from widgets.plotting import FigureView, labelled_ticks, set_log_range

EM_PX = 13  # JupyterLab's default interface font size: 1em = 13 px (--jp-ui-font-size1 of its default theme)
CONTROLS = (widgets.Text, widgets.IntText, widgets.FloatText, widgets.Dropdown, widgets.Checkbox, widgets.Button,
            widgets.FloatSlider, widgets.IntSlider, widgets.ToggleButtons)  # fmt: skip


@pytest.fixture(scope="module")
def app():
    workbench = Workbench(delay=0.0, nthreads=2)
    assert workbench.wait(60)
    return workbench


def _walk(widget):
    yield widget
    for child in getattr(widget, "children", ()):
        yield from _walk(child)


def _pixels(size: str | None) -> float | None:
    if not size:
        return None
    found = re.fullmatch(r"([\d.]+)(px|em)", size.strip())
    if not found:
        return None
    value, unit = float(found.group(1)), found.group(2)
    return value * (EM_PX if unit == "em" else 1.0)


def test_figures_scale_with_their_container_and_keep_their_aspect_ratio(app):
    views = [v for section in app.sections.values() for v in vars(section).values() if isinstance(v, FigureView)]
    assert len(views) >= 8
    for view in views:
        width, height = view.size_px
        # the image takes the container's width up to the figure's and derives its height from the PNG
        assert view.image.layout.width == "100%" and view.image.layout.height == "auto"
        assert view.widget.layout.width == f"{width}px" and view.widget.layout.max_width == "100%"
        assert view.widget.layout.display == "block"  # not a flex row, which would stretch the image
        assert (width, height) == tuple(int(round(s * 96)) for s in view.figure.get_size_inches())


def test_rows_wrap_and_no_control_is_narrower_than_60_px(app):
    for name, section in app.sections.items():
        for widget in _walk(section.panel):
            if isinstance(widget, widgets.HBox) and not isinstance(widget, widgets.VBox):
                assert widget.layout.flex_flow == "row wrap", f"{name}: a row that does not wrap: {widget}"
            if isinstance(widget, widgets.ToggleButtons) and widget.style.button_width:
                assert _pixels(widget.style.button_width) >= 60, f"{name}: buttons of {widget.options}"
            if isinstance(widget, CONTROLS):
                width = _pixels(widget.layout.width)
                if width is not None:
                    assert width >= 60, f"{name}: {widget.description!r} is {widget.layout.width} wide"
                    # a control with a width keeps most of it; narrow windows wrap the row instead of squeezing it
                    least = _pixels(widget.layout.min_width)
                    assert least is not None and 60 <= least <= width, f"{name}: {widget.description!r}"


CODE_NAME = re.compile(r"\b[a-z]+_[a-z_]+\b")  # snake_case identifiers such as lmax_L, ell_min_b, first_order


def test_labels_are_words_and_math_not_code_names(app):
    for name, section in app.sections.items():
        for widget in _walk(section.panel):
            texts = [getattr(widget, "description", "") or ""]
            named_files = (app["experiment"].picker, getattr(app["delensing"], "tracer", None))
            if isinstance(widget, widgets.ToggleButtons | widgets.Dropdown) and widget not in named_files:
                texts += [str(label) for label in widget._options_labels]  # (shipped names are file names)
            for text in texts:
                outside_math = re.sub(r"\$[^$]*\$|\S+\.(json|png|pdf|toml|ipynb)", "", text)  # math, file names
                assert not CODE_NAME.search(outside_math), f"{name}: label {text!r} shows a code name"
                assert "^" not in outside_math, f"{name}: label {text!r} writes a power with a plain caret"


def test_workers_show_only_for_parallel_runs(app):
    section = app["validation"]
    section.executor.value = "serial"
    assert section.workers.layout.display == "none"
    section.executor.value = "processes"
    assert section.workers.layout.display is None
    section.executor.value = "serial"


@pytest.mark.parametrize(("low", "high"), [(2, 64), (2, 20), (30, 1000), (2, 5), (8, 128)])
def test_short_log_axes_label_at_least_two_ticks(low, high):
    figure = Figure()
    FigureCanvasAgg(figure)
    ax = figure.add_subplot()
    ax.set_xscale("log")
    ax.plot([low, high], [1, 2])
    set_log_range(ax, low, high)
    assert len(labelled_ticks(ax)) >= 2, labelled_ticks(ax)


def test_a_view_marks_and_clears_an_out_of_date_plot():
    view = FigureView((2.0, 1.0), name="t")
    view.mark_stale("old")
    assert not view.stale  # nothing drawn yet: nothing to mark
    view.figure.add_subplot().plot([0, 1], [0, 1])
    view.draw()
    view.mark_stale("out of date: <b>x</b>")
    assert view.stale and "&lt;b&gt;" in view.banner.value  # escaped, shown above the plot
    view.draw()
    assert not view.stale
    assert np.isclose(view.size_px[0] / view.size_px[1], 2.0)
