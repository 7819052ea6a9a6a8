"""The workbench's plumbing for visible errors and long work that never freezes the page.

* :class:`StatusArea` – each section's status line; every error lands here with a message a user can act on
  (ipywidgets' click dispatch only logs exceptions, so callbacks route them here themselves).
* :func:`guarded` – wraps a UI callback so any exception goes to a status area instead of vanishing.
* :class:`LongTask` – one action button, one progress bar with a label (reused between runs), work in a
  background thread, cancellation through a :class:`threading.Event`, the button re-enabled in ``finally``.
* :class:`LiveUpdate` – debounced recomputation that always ends showing the latest inputs.
"""

from __future__ import annotations

import functools
import html
import threading
import time
import traceback

import ipywidgets as widgets

from lensrec import OutputExistsError

__all__ = ["StatusArea", "guarded", "LongTask", "LiveUpdate", "Cancelled"]

# Exceptions whose message already says what was wrong and how to fix it (lensrec validates its inputs).
USER_ERRORS = (ValueError, TypeError, FileNotFoundError, OutputExistsError, ImportError)
_STYLES = {
    "idle": ("#515a5a", ""),
    "info": ("#1b4f72", "ℹ"),
    "ok": ("#1e8449", "✔"),
    "warning": ("#9a7d0a", "⚠"),
    "error": ("#a93226", "✖"),
}


class Cancelled(Exception):
    """Raised inside long work when its cancel event is set."""


class StatusArea:
    """A section's status line plus a collapsible traceback for internal errors.

    Attributes
    ----------
    kind : str
        ``"idle"``, ``"info"``, ``"ok"``, ``"warning"`` or ``"error"`` — the last message's kind.
    message : str
        The last message as plain text.
    history : list of (kind, message)
        Every message shown, oldest first (tests read it).
    """

    def __init__(self, name: str):
        self.line = widgets.HTML(layout=widgets.Layout(min_height="1.6em"))
        self.line.add_class(f"lensrec-status-{name}")
        self.details = widgets.Output(layout=widgets.Layout(max_height="14em", overflow="auto"))
        self.details_box = widgets.Accordion(
            [self.details], titles=("Details (traceback)",), layout=widgets.Layout(display="none")
        )
        self.widget = widgets.VBox([self.line, self.details_box])
        self.kind = "idle"
        self.message = ""
        self.history: list[tuple[str, str]] = []
        self._lock = threading.Lock()
        self.show("idle", "")

    def show(self, kind: str, message: str, details: str | None = None) -> None:
        color, mark = _STYLES[kind]
        with self._lock:
            self.kind, self.message = kind, message
            if message:
                self.history.append((kind, message))
            self.line.value = (
                f"<div style='color:{color};line-height:1.45;padding:2px 0'>{mark} {html.escape(message)}</div>"
                if message
                else ""
            )
            self.details.outputs = ()
            if details:
                self.details.append_stdout(details)
                self.details_box.layout.display = None
            else:
                self.details_box.layout.display = "none"

    def info(self, message: str) -> None:
        self.show("info", message)

    def ok(self, message: str) -> None:
        self.show("ok", message)

    def warn(self, message: str) -> None:
        self.show("warning", message)

    def error(self, message: str, details: str | None = None) -> None:
        self.show("error", message, details)

    def report_exception(self, exc: BaseException, doing: str) -> None:
        """Show ``exc``: its own message for input errors, the traceback under Details for internal ones."""
        text = " ".join(str(exc).split())
        if isinstance(exc, USER_ERRORS):
            self.error(f"{doing}: {text}")
        else:
            details = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
            self.error(
                f"{doing} stopped on an internal error ({type(exc).__name__}: {text}). "
                "The traceback is under Details; please report it with the settings you used.",
                details,
            )


def guarded(status: StatusArea, doing: str):
    """Decorate a widget callback so that any exception it raises is shown in ``status``."""

    def decorate(function):
        @functools.wraps(function)
        def wrapper(*args, **kwargs):
            try:
                return function(*args, **kwargs)
            except Exception as exc:  # click and observe dispatch would only log it
                status.report_exception(exc, doing)
                return None

        return wrapper

    return decorate


class LongTask:
    """One heavy action: its button, progress bar and label, a worker thread and a cancel event.

    Parameters
    ----------
    button : ipywidgets.Button
        The action button; disabled while the work runs and re-enabled in ``finally``.
    status : StatusArea
        Where progress messages and errors go.
    doing : str
        What the work is, for messages ("Simulating the sky").
    name : str
        CSS class suffix for the progress widgets (``lensrec-progress-<name>``).
    cancel_button : ipywidgets.Button, optional
        Enabled only while the work runs; sets :attr:`cancel_event`.
    views : sequence of FigureView, optional
        Plots showing this work's last result: while a run goes, and after a cancelled or failed one, they
        carry an out-of-date mark (a successful run redraws them, which removes it).

    Notes
    -----
    ``start(work, finish)`` runs ``work(report, cancel_event)`` in a daemon thread; ``report(fraction, text)``
    moves the bar. ``finish(result)`` (also in the thread) stores and draws the result and may return a
    message for the status line, or a ``(kind, message)`` pair such as ``("warning", text)``. Tests call :meth:`join` to wait for the thread.
    """

    def __init__(self, button, status: StatusArea, doing: str, name: str, cancel_button=None, views=()):
        self.button = button
        self.views = list(views)
        self.status = status
        self.doing = doing
        self.cancel_button = cancel_button
        self.cancel_event = threading.Event()
        self.progress = widgets.FloatProgress(
            value=0.0, min=0.0, max=1.0, layout=widgets.Layout(width="240px", min_width="120px")
        )
        self.label = widgets.Label("", layout=widgets.Layout(min_width="18em"))
        self.progress.add_class(f"lensrec-progress-{name}")
        self.label.add_class(f"lensrec-progress-label-{name}")
        self.widget = widgets.HBox(
            [self.progress, self.label], layout=widgets.Layout(flex_flow="row wrap", align_items="center")
        )
        self.runs = 0
        self._thread: threading.Thread | None = None
        if cancel_button is not None:
            cancel_button.disabled = True
            cancel_button.on_click(lambda _button: self.request_cancel())

    @property
    def busy(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def request_cancel(self) -> None:
        if self.busy:
            self.cancel_event.set()
            self.label.value = "cancelling…"

    def report(self, fraction: float, text: str | None = None, check_cancel: bool = True) -> None:
        """Move the bar to ``fraction`` (0…1) and optionally change the label.

        Raises Cancelled if asked to stop, unless ``check_cancel`` is False (for progress callbacks called
        from inside lensrec, which watches the same cancel event and stops cleanly by itself).
        """
        self.progress.value = min(1.0, max(0.0, float(fraction)))
        if text is not None:
            self.label.value = text
        if check_cancel and self.cancel_event.is_set():
            raise Cancelled()

    def start(self, work, finish) -> bool:
        """Start ``work`` in the background unless a run is already going; returns whether it started."""
        if self.busy:
            self.status.warn(f"{self.doing} is already running; wait for it to finish or cancel it.")
            return False
        self.button.disabled = True
        started = False
        try:
            self.cancel_event.clear()
            self.progress.bar_style = ""
            self.progress.value = 0.0
            self.label.value = "starting…"
            self.status.info(f"{self.doing}…")
            self._mark_views(f"previous result, shown while {self.doing[0].lower() + self.doing[1:]}…")
            if self.cancel_button is not None:
                self.cancel_button.disabled = False
            self._thread = threading.Thread(
                target=self._run, args=(work, finish), daemon=True, name=f"lensrec-{self.doing}"
            )
            self._thread.start()
            started = True
        finally:
            if not started:
                self.button.disabled = False
                if self.cancel_button is not None:
                    self.cancel_button.disabled = True
        return True

    def _run(self, work, finish) -> None:
        began = time.perf_counter()
        try:
            result = work(self.report, self.cancel_event)
            if self.cancel_event.is_set():
                raise Cancelled()
            message = finish(result)
            seconds = time.perf_counter() - began
            self.progress.value = 1.0
            self.progress.bar_style = "success"
            self.label.value = f"done in {seconds:.1f} s"
            if isinstance(message, tuple):  # (kind, text): a finished run whose result needs a caution
                self.status.show(*message)
            else:
                self.status.ok(message or f"{self.doing}: done in {seconds:.1f} s.")
        except Cancelled as exc:
            self.progress.bar_style = "warning"
            self.label.value = "cancelled"
            self.status.warn(str(exc) or f"{self.doing} was cancelled; the previous results are unchanged.")
            self._mark_views("out of date: from before the cancelled run")
        except Exception as exc:
            self.progress.bar_style = "danger"
            self.label.value = "failed"
            self._mark_views("out of date: from before the failed run")
            self.status.report_exception(exc, self.doing)
        finally:
            self.runs += 1
            self.button.disabled = False
            if self.cancel_button is not None:
                self.cancel_button.disabled = True

    def _mark_views(self, text: str) -> None:
        for view in self.views:
            view.mark_stale(text)

    def join(self, timeout: float = 120.0) -> bool:
        """Wait for the current run (test hook); returns True when no run is left going."""
        thread = self._thread
        if thread is not None:
            thread.join(timeout)
        return not self.busy


class LiveUpdate:
    """Debounced recomputation: many quick triggers lead to one run, and the last run sees the latest inputs.

    Parameters
    ----------
    run : callable
        ``run()`` reads the current inputs, computes and draws; called in a worker thread.
    status : StatusArea
        Where its errors go.
    doing : str
        What it computes, for messages.
    delay : float
        Seconds of quiet before a run starts (0 runs at once, still off the calling thread).
    """

    def __init__(self, run, status: StatusArea, doing: str, delay: float = 0.3):
        self._run_once = run
        self.status = status
        self.doing = doing
        self.delay = float(delay)
        self.runs = 0
        self._lock = threading.Lock()
        self._timer: threading.Timer | None = None
        self._worker: threading.Thread | None = None
        self._pending = False

    def trigger(self) -> None:
        with self._lock:
            if self._timer is not None:
                self._timer.cancel()
            self._timer = threading.Timer(self.delay, self._fire)
            self._timer.daemon = True
            self._timer.start()

    def _fire(self) -> None:
        with self._lock:
            if self._worker is not None and self._worker.is_alive():
                self._pending = True
                return
            self._worker = threading.Thread(target=self._loop, daemon=True, name=f"lensrec-{self.doing}")
            self._worker.start()

    def _loop(self) -> None:
        while True:
            try:
                self._run_once()
            except Exception as exc:
                self.status.report_exception(exc, self.doing)
            finally:
                self.runs += 1
            with self._lock:
                if not self._pending:
                    return
                self._pending = False

    def join(self, timeout: float = 60.0) -> bool:
        """Wait until no timer or run is left (test hook); returns True when idle."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                timer, worker = self._timer, self._worker
            if timer is not None and timer.is_alive():
                timer.join(max(0.0, deadline - time.monotonic()))
                continue
            if worker is not None and worker.is_alive():
                worker.join(max(0.0, deadline - time.monotonic()))
                continue
            with self._lock:
                # a timer that fired may just have started a worker; look once more under the lock
                if (self._timer is None or not self._timer.is_alive()) and (
                    self._worker is None or not self._worker.is_alive()
                ):
                    return True
        return False
