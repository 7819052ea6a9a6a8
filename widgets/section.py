"""What every workbench section has: a title, a short guide, a status area and a panel widget."""

from __future__ import annotations

import html

import ipywidgets as widgets

from .work import StatusArea

__all__ = ["Section", "labelled", "DESCRIPTION_STYLE", "heading", "row", "column"]

DESCRIPTION_STYLE = {"description_width": "11em"}


def labelled(widget, width: str = "20em"):
    """Give a control our description width and a fixed width so columns line up.

    The width is also the control's minimum: in a narrow window a row of controls wraps (see :func:`row`)
    rather than squeezing its inputs or sliders to nothing.
    """
    widget.style = DESCRIPTION_STYLE
    widget.layout.width = width
    widget.layout.min_width = width
    widget.layout.flex = "0 0 auto"
    return widget


def row(children, align: str = "flex-start", **layout) -> widgets.HBox:
    """A row of widgets that wraps onto the next line when the window is too narrow for all of them."""
    return widgets.HBox(
        list(children), layout=widgets.Layout(flex_flow="row wrap", align_items=align, max_width="100%", **layout)
    )


def column(children, **layout) -> widgets.VBox:
    """A column of widgets that keeps its natural width in a wrapping row (a block of controls)."""
    return widgets.VBox(list(children), layout=widgets.Layout(flex="0 0 auto", margin="0 1.5em 0 0", **layout))


def heading(text: str) -> widgets.HTML:
    return widgets.HTML(f"<b style='font-size:105%'>{html.escape(text)}</b>")


class Section:
    """Base of the workbench sections.

    Subclasses build ``self.panel`` children, register their long tasks in ``self.tasks`` and live
    updates in ``self.live``, and implement only reading widgets, calling lensrec and drawing.
    """

    title = "Section"
    name = "section"
    guide = ""

    def __init__(self, state):
        self.state = state
        self.status = StatusArea(self.name)
        self.tasks = []
        self.live = []
        self.panel = widgets.VBox(layout=widgets.Layout(padding="0.4em 0.6em"))
        self.panel.add_class(f"lensrec-section-{self.name}")

    def layout(self, controls=(), outputs=()) -> None:
        """Guide on top, then the controls, the status area, and the plots and tables below it."""
        guide = (
            widgets.HTMLMath(f"<div style='color:#515a5a;max-width:60em;line-height:1.45'>{self.guide}</div>")
            if self.guide
            else None
        )
        children = [guide, *controls, self.status.widget, *outputs]
        self.panel.children = tuple(c for c in children if c is not None)

    def wait(self, timeout: float = 120.0) -> bool:
        """Wait for this section's background work (test hook); True when all of it has finished."""
        done = True
        for live in self.live:
            done &= live.join(timeout)
        for task in self.tasks:
            done &= task.join(timeout)
        return done
