"""Headless tests of the workbench frame: shared state, status areas, long work, live updates."""

import threading

import ipywidgets as widgets
import pytest

import lensrec
from widgets import Workbench, WorkbenchState
from widgets.work import LiveUpdate, LongTask, StatusArea, guarded

SECTIONS = ["experiment", "noise", "sky", "reconstruction", "delensing", "validation", "export"]


@pytest.fixture
def app():
    workbench = Workbench()
    assert workbench.wait(30)
    return workbench


def test_workbench_has_its_sections_in_order(app):
    assert list(app.sections) == SECTIONS
    assert list(app.tabs.titles) == [app[name].title for name in SECTIONS]
    assert len(set(app.tabs.titles)) == len(SECTIONS)
    assert "lensrec-workbench" in app._dom_classes


def test_state_starts_from_the_named_shipped_experiment(app):
    assert app.state.experiment == lensrec.load_experiment("deep_highland")
    assert app.state.spectra is lensrec.fiducial_spectra()
    assert app.state.sky is None and app.state.reconstruction is None


def test_state_refuses_the_wrong_kind_of_experiment():
    state = WorkbenchState()
    with pytest.raises(Exception, match="experiment"):
        state.experiment = "deep_highland"  # a name is not an Experiment; sections must load it first


def test_workbench_reports_an_unknown_experiment_name():
    with pytest.raises(ValueError, match="did you mean 'deep_highland'"):
        Workbench(experiment="deep_higland")


# ---------------------------------------------------------------------------------------- status area
def test_status_area_shows_input_errors_without_traceback():
    status = StatusArea("t")
    status.report_exception(ValueError("nside must be a power of two, got 100"), "Simulating")
    assert status.kind == "error"
    assert "nside must be a power of two" in status.message
    assert status.details_box.layout.display == "none"


def test_status_area_shows_internal_errors_with_traceback():
    status = StatusArea("t")
    try:
        raise ZeroDivisionError("boom")
    except ZeroDivisionError as exc:
        status.report_exception(exc, "Reconstructing")
    assert status.kind == "error"
    assert "internal error (ZeroDivisionError: boom)" in status.message
    assert status.details_box.layout.display is None
    assert "ZeroDivisionError" in status.details.outputs[0]["text"]


def test_status_area_escapes_html():
    status = StatusArea("t")
    status.error("bad <script> value")
    assert "<script>" not in status.line.value and "&lt;script&gt;" in status.line.value


def test_guarded_callback_routes_click_errors_to_status():
    status = StatusArea("t")
    button = widgets.Button()

    def fails(_):
        raise ValueError("lmax_L=10 must be >= 30")

    button.on_click(guarded(status, "Computing N0")(fails))
    button.click()  # ipywidgets would only log this exception; the status must show it
    assert status.kind == "error" and status.message == "Computing N0: lmax_L=10 must be >= 30"


# ------------------------------------------------------------------------------------------ long task
def test_long_task_disables_button_while_running_and_reports_success():
    status, button = StatusArea("t"), widgets.Button()
    task = LongTask(button, status, "Working", "t")
    release, results = threading.Event(), []

    def work(report, cancel):
        report(0.5, "half way")
        assert release.wait(10)
        return 42

    assert task.start(work, lambda value: results.append(value) or "stored 42")
    assert button.disabled and task.busy
    assert not task.start(work, results.append)  # a second start while busy is refused, visibly
    assert status.kind == "warning" and "already running" in status.message
    release.set()
    assert task.join(10)
    assert results == [42]
    assert not button.disabled
    assert status.kind == "ok" and status.message == "stored 42"
    assert task.progress.value == 1.0 and task.progress.bar_style == "success"


def test_long_task_re_enables_button_after_an_error():
    status, button = StatusArea("t"), widgets.Button()
    task = LongTask(button, status, "Simulating", "t")

    def work(report, cancel):
        raise ValueError("nside must be a power of two, got 100 (nearest allowed: 64 or 128)")

    task.start(work, lambda result: None)
    assert task.join(10)
    assert not button.disabled
    assert status.kind == "error" and "nearest allowed: 64 or 128" in status.message
    assert task.progress.bar_style == "danger" and task.label.value == "failed"


def test_long_task_cancel_keeps_previous_results():
    status, button, cancel = StatusArea("t"), widgets.Button(), widgets.Button()
    task = LongTask(button, status, "Running the suite", "t", cancel_button=cancel)
    started, results = threading.Event(), []

    def work(report, cancel_event):
        started.set()
        for step in range(1000):
            report(step / 1000)  # raises Cancelled once the event is set
            cancel_event.wait(0.01)
        return "finished"

    assert cancel.disabled
    task.start(work, results.append)
    assert started.wait(10) and not cancel.disabled
    cancel.click()
    assert task.join(10)
    assert results == []
    assert status.kind == "warning" and "cancelled" in status.message
    assert not button.disabled and cancel.disabled
    # the same bar and label are reused by the next run
    task.start(lambda report, event: "again", results.append)
    assert task.join(10) and results == ["again"] and task.label.value.startswith("done")


# ---------------------------------------------------------------------------------------- live update
def test_live_update_coalesces_triggers_and_ends_on_latest_inputs():
    status = StatusArea("t")
    inputs, seen = {"value": 0}, []
    live = LiveUpdate(lambda: seen.append(inputs["value"]), status, "Updating", delay=0.05)
    for value in range(1, 6):
        inputs["value"] = value
        live.trigger()
    assert live.join(10)
    assert seen[-1] == 5
    assert len(seen) < 5  # quick triggers share runs


def test_live_update_shows_errors():
    status = StatusArea("t")

    def fails():
        raise ValueError("ell_max_temperature=20 must be greater than ell_min=30")

    live = LiveUpdate(fails, status, "Computing N0", delay=0.0)
    live.trigger()
    assert live.join(10)
    assert status.kind == "error" and "ell_min=30" in status.message


def test_sections_whose_library_part_is_missing_say_what_they_need(monkeypatch):
    monkeypatch.delattr(lensrec, "reconstruct", raising=False)
    workbench = Workbench(experiment="deep_highland")
    assert workbench.wait(60)
    section = workbench["reconstruction"]
    assert section.status.kind == "warning" and "lensrec lacks reconstruct" in section.status.message
    assert "<code>lensrec.reconstruct</code>" in section.note.value
    assert "Update lensrec" in section.note.value
