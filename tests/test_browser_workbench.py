"""The workbench in a real browser: JupyterLab on 127.0.0.1 with a token, driven by headless Debian chromium.

The JupyterLab server runs in a temporary root folder holding a copy of notebooks/workbench.ipynb, with its
own config, settings and runtime folders, and stops when the module's tests end. The tests run in order as
a user would: first a laptop window (1280×800, JupyterLab's file browser open), where the whole chain is
worked through (a small masked patch at nside 32, reconstruction, a cancelled reconstruction, a template,
a tiny suite run and a cancelled one), then a 1920×1080 window. At both sizes every tab is checked: each
figure keeps its aspect ratio (drawn width/height within 5% of the PNG's) and no control is narrower than
60 px. Screenshots (what the window shows) go to test-artifacts/.
"""

import contextlib
import json
import os
import secrets
import shutil
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request

import pytest

import lensrec

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NOTEBOOK = os.path.join(ROOT, "notebooks", "workbench.ipynb")
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]

pytestmark = pytest.mark.browser


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _loopback_opener():
    return urllib.request.build_opener(urllib.request.ProxyHandler({}))  # never route loopback through a proxy


def _request(url: str, token: str, method: str = "GET", timeout: float = 5.0):
    request = urllib.request.Request(url, method=method, headers={"Authorization": f"token {token}"})
    with _loopback_opener().open(request, timeout=timeout) as response:
        body = response.read()
    return json.loads(body) if body else None


class JupyterLab:
    """A JupyterLab server on 127.0.0.1 started for the tests."""

    def __init__(self, folder: str):
        self.folder = folder
        self.root = os.path.join(folder, "root")
        os.makedirs(self.root)
        shutil.copy(NOTEBOOK, self.root)
        self.port = _free_port()
        self.token = secrets.token_hex(24)
        self.url = f"http://127.0.0.1:{self.port}"
        settings = os.path.join(folder, "settings")
        # no news or update checks: the page must not reach outside the machine
        notification = os.path.join(settings, "@jupyterlab", "apputils-extension")
        os.makedirs(notification)
        with open(os.path.join(notification, "notification.jupyterlab-settings"), "w") as handle:
            json.dump({"fetchNews": "false", "checkForUpdates": False}, handle)
        self.env = dict(os.environ)
        self.env.update(
            JUPYTER_CONFIG_DIR=os.path.join(folder, "config"),
            JUPYTER_RUNTIME_DIR=os.path.join(folder, "runtime"),
            JUPYTERLAB_SETTINGS_DIR=settings,
            JUPYTERLAB_WORKSPACES_DIR=os.path.join(folder, "workspaces"),
            IPYTHONDIR=os.path.join(folder, "ipython"),
            LENSREC_NTHREADS="2",
        )
        self.log_path = os.path.join(folder, "jupyterlab.log")
        self.process = None

    def start(self, timeout: float = 90.0) -> None:
        command = [
            sys.executable, "-m", "jupyterlab",
            "--ServerApp.ip=127.0.0.1",
            f"--ServerApp.port={self.port}",
            "--ServerApp.port_retries=0",
            f"--IdentityProvider.token={self.token}",
            f"--ServerApp.root_dir={self.root}",
            "--ServerApp.open_browser=False",
            "--LabApp.expose_app_in_browser=True",
            "--LabApp.news_url=",
        ]  # fmt: skip
        if os.geteuid() == 0:
            command.append("--allow-root")
        self._log = open(self.log_path, "wb")  # noqa: SIM115 (closed in stop)
        self.process = subprocess.Popen(command, cwd=self.root, env=self.env, stdout=self._log,
                                        stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)  # fmt: skip
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"JupyterLab exited with {self.process.returncode}:\n{self.log()}")
            with contextlib.suppress(OSError, urllib.error.URLError, ValueError):
                if _request(f"{self.url}/api/status", self.token) is not None:
                    return
            time.sleep(0.5)
        raise RuntimeError(f"JupyterLab did not answer on {self.url} within {timeout} s:\n{self.log()}")

    def log(self) -> str:
        with open(self.log_path, errors="replace") as handle:
            return handle.read()[-4000:]

    def stop(self) -> None:
        if self.process is None:
            return
        with contextlib.suppress(OSError, urllib.error.URLError, ValueError):
            for kernel in _request(f"{self.url}/api/kernels", self.token) or []:
                _request(f"{self.url}/api/kernels/{kernel['id']}", self.token, method="DELETE", timeout=15)
        self.process.terminate()
        try:
            self.process.wait(20)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait(10)
        self._log.close()


@pytest.fixture(scope="module")
def jupyterlab(tmp_path_factory):
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"{CHROMIUM} is not installed (.ci/run installs Debian's chromium)")
    server = JupyterLab(str(tmp_path_factory.mktemp("jupyterlab")))
    server.start()
    try:
        yield server
    finally:
        server.stop()


@pytest.fixture(scope="module")
def browser(jupyterlab, tmp_path_factory):
    from playwright.sync_api import sync_playwright

    profile = str(tmp_path_factory.mktemp("chromium-profile"))
    with sync_playwright() as playwright:
        context = playwright.chromium.launch_persistent_context(
            profile,
            executable_path=CHROMIUM,
            headless=True,
            args=CHROMIUM_ARGS,
            viewport=LAPTOP,
        )
        try:
            yield context
        finally:
            context.close()


LAPTOP = {"width": 1280, "height": 800}
DESKTOP = {"width": 1920, "height": 1080}
TABS = ["Experiment", "Estimator noise", "Sky", "Reconstruction", "Delensing", "Validation", "Export"]

KERNEL_READY = """async () => {
    const panel = window.jupyterapp.shell.currentWidget;
    if (!panel || !panel.sessionContext) return false;
    await panel.sessionContext.ready;
    const kernel = panel.sessionContext.session && panel.sessionContext.session.kernel;
    return !!kernel && kernel.connectionStatus === 'connected' && kernel.status === 'idle';
}"""


@pytest.fixture(scope="module")
def workbench_page(jupyterlab, browser, artifacts_dir):
    """The workbench notebook opened and run in JupyterLab (file browser left open), with the app rendered."""
    page = browser.pages[0] if browser.pages else browser.new_page()
    page.set_default_timeout(60_000)
    page.goto(f"{jupyterlab.url}/lab/tree/workbench.ipynb?token={jupyterlab.token}")
    try:
        page.wait_for_function("() => window.jupyterapp !== undefined", timeout=90_000)
        page.wait_for_selector(".jp-NotebookPanel .jp-Notebook", timeout=90_000)
        # the notebook's own kernel connected and idle (the toolbar can say idle before that)
        page.wait_for_function(KERNEL_READY, polling=250, timeout=90_000)
        # not awaited: the command's promise settles only when every cell has run
        page.evaluate("() => { window.jupyterapp.commands.execute('notebook:run-all-cells'); }")
        page.wait_for_selector(".lensrec-workbench", timeout=90_000)
        # visible only once drawn: before its first draw the plot is replaced by a note
        page.wait_for_selector("img.lensrec-plot-experiment-spectra[src^='blob:']", state="visible", timeout=60_000)
    except Exception:
        page.screenshot(path=os.path.join(artifacts_dir, "workbench-failed-to-open.png"))
        outputs = page.locator(".jp-OutputArea").all_inner_texts()
        raise AssertionError(f"the workbench did not open; cell outputs: {outputs}\n{jupyterlab.log()}") from None
    if page.locator(".jp-FileBrowser").count() == 0 or not page.locator(".jp-FileBrowser").first.is_visible():
        page.evaluate("() => { window.jupyterapp.commands.execute('filebrowser:activate'); }")
    return page


def _shot(page, artifacts_dir: str, name: str, anchor: str | None = None) -> str:
    """Screenshot the window as the user sees it, scrolled to ``anchor`` (a selector) if given."""
    if anchor is not None:
        page.locator(anchor).first.scroll_into_view_if_needed()
    path = os.path.join(artifacts_dir, name)
    page.screenshot(path=path)
    return path


def _src(page, selector: str) -> str:
    return page.locator(selector).get_attribute("src")


def _wait_src_change(page, selector: str, before: str, timeout: float = 60_000) -> str:
    page.wait_for_function(
        "([selector, before]) => { const e = document.querySelector(selector);"
        " return e && e.src.startsWith('blob:') && e.src !== before; }",
        arg=[selector, before],
        timeout=timeout,
    )
    return _src(page, selector)


def _open_tab(page, title: str) -> None:
    page.locator(".lensrec-tabs .lm-TabBar-tab", has_text=title).first.click()


def _wait_label(page, name: str, prefix: str, timeout: float = 120_000) -> None:
    page.wait_for_function(
        "([name, prefix]) => { const e = document.querySelector('.lensrec-progress-label-' + name);"
        " return e && e.innerText.startsWith(prefix); }",
        arg=[name, prefix],
        timeout=timeout,
    )


def _start_and_cancel(page, name: str, run: str, cancel: str, attempts: int = 3) -> None:
    """Start a run and cancel it; a small run may finish before Cancel arrives, so try a few times."""
    for _ in range(attempts):
        page.locator(run).click()
        with contextlib.suppress(Exception):  # Cancel is enabled only while the run goes
            page.locator(cancel).click(timeout=5_000)
        page.wait_for_function(
            "(name) => { const t = document.querySelector('.lensrec-progress-label-' + name).innerText;"
            " return t.startsWith('done') || t.startsWith('cancelled'); }",
            arg=name,
            timeout=120_000,
        )
        if page.locator(f".lensrec-progress-label-{name}").inner_text().startswith("cancelled"):
            return
    raise AssertionError(f"{name}: every run finished before Cancel reached it")


MEASURE = """() => {
    const shown = (e) => { const r = e.getBoundingClientRect(); return e.offsetParent !== null && r.width > 0; };
    const app = document.querySelector('.lensrec-workbench');
    const figures = [...app.querySelectorAll('img[class*="lensrec-plot-"]')].filter(shown).filter(
        (img) => img.naturalWidth > 0).map((img) => {
            const r = img.getBoundingClientRect();
            return {name: [...img.classList].find((c) => c.startsWith('lensrec-plot-')),
                    drawn: r.width / r.height, png: img.naturalWidth / img.naturalHeight, width: r.width};
        });
    const selectors = ['.widget-text', '.widget-dropdown', '.widget-checkbox', '.widget-hslider',
                       '.widget-slider .slider-container', 'button.jupyter-button', '.widget-toggle-button',
                       '.widget-progress'];
    const controls = [...app.querySelectorAll(selectors.join(','))].filter(shown).map((e) => ({
        what: (e.className + ' ' + (e.innerText || '').slice(0, 30)).trim(), width: e.getBoundingClientRect().width,
        right: e.getBoundingClientRect().right}));
    const box = app.getBoundingClientRect();
    return {figures, controls, right: box.right, width: box.width};
}"""


def _check_layout(page, artifacts_dir: str, size: str) -> dict:
    """At the current window size, every tab: figures keep their aspect ratio, no control is under 60 px."""
    seen = {}
    for tab in TABS:
        _open_tab(page, tab)
        page.wait_for_timeout(150)
        found = page.evaluate(MEASURE)
        for figure in found["figures"]:
            # the PNG is the figure rendered at its own size, so its ratio is the figure's
            assert abs(figure["drawn"] / figure["png"] - 1.0) < 0.05, (size, tab, figure)
        narrow = [c for c in found["controls"] if c["width"] < 60]
        assert not narrow, (size, tab, narrow)
        # nothing sticks out of the workbench on the right (cut-off inputs)
        outside = [c for c in found["controls"] if c["right"] > found["right"] + 1]
        assert not outside, (size, tab, outside)
        seen[tab] = found
        _shot(page, artifacts_dir, f"workbench-{size}-{tab.lower().replace(' ', '-')}.png", ".lensrec-tabs")
    return seen


def test_workbench_opens_and_shows_the_experiment(workbench_page, artifacts_dir):
    page = workbench_page
    tabs = page.locator(".lensrec-tabs .lm-TabBar-tab").all_inner_texts()
    assert [t.strip() for t in tabs] == TABS
    assert page.locator(".lensrec-experiment-picker select").input_value() == "deep_highland"
    _shot(page, artifacts_dir, "workbench-laptop-open.png")


def test_changing_noise_redraws_the_noise_plot(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Experiment")
    selector = "img.lensrec-plot-experiment-spectra"
    before = _src(page, selector)
    field = page.locator(".lensrec-noise-temperature input")
    field.fill("12")
    field.press("Enter")
    _wait_src_change(page, selector, before)
    status = page.locator(".lensrec-status-experiment").inner_text()
    assert "Δ_T = 12" in status and "(modified)" in status  # an edited example is renamed at once
    field.fill("-1")  # refused by the experiment model; the message must appear in the page
    field.press("Enter")
    page.wait_for_function(
        "() => document.querySelector('.lensrec-status-experiment').innerText.includes('noise_temperature must be')"
    )
    _shot(page, artifacts_dir, "workbench-experiment-error.png", ".lensrec-status-experiment")
    page.locator(".lensrec-experiment-picker select").select_option("deep_highland")


def test_noise_change_redraws_the_n0_plot(workbench_page, artifacts_dir):
    page = workbench_page
    selector = "img.lensrec-plot-noise-n0"
    _open_tab(page, "Estimator noise")
    page.wait_for_selector(f"{selector}[src^='blob:']", state="visible", timeout=60_000)
    before = _src(page, selector)
    _open_tab(page, "Experiment")
    field = page.locator(".lensrec-noise-polarization input")
    field.fill("6")
    field.press("Enter")
    _open_tab(page, "Estimator noise")
    _wait_src_change(page, selector, before)
    page.wait_for_function(
        "() => document.querySelector('.lensrec-status-noise').innerText.includes('N0 of')"
    )  # fmt: skip
    assert "MV" in page.locator(".lensrec-snr-table").inner_text()
    _shot(page, artifacts_dir, "workbench-estimator-noise.png", selector)


def _simulate_small_patch(page) -> None:
    _open_tab(page, "Sky")
    page.locator(".lensrec-sky-nside select").select_option(label="32")
    page.wait_for_function("() => document.querySelector('.lensrec-sky-lmax input').value === '64'")
    page.locator(".lensrec-sky-mask select").select_option(label="cap")
    page.locator("button.lensrec-simulate").click()
    _wait_label(page, "sky", "done")
    page.wait_for_selector("img.lensrec-plot-sky-maps[src^='blob:']", state="visible", timeout=120_000)


def test_simulate_a_small_patch_and_view_it(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Sky")
    assert page.locator(".lensrec-note-sky-maps").is_visible()  # says what to do before the first sky
    _simulate_small_patch(page)
    assert "rms deflection" in page.locator(".lensrec-status-sky").inner_text()
    assert not page.locator("button.lensrec-simulate").is_disabled()
    assert page.locator("button.lensrec-cancel-sky").is_disabled()  # only while a simulation runs
    before = _src(page, "img.lensrec-plot-sky-maps")
    page.locator(".lensrec-sky-field button", has_text="κ").click()
    _wait_src_change(page, "img.lensrec-plot-sky-maps", before)
    _shot(page, artifacts_dir, "workbench-sky.png", "img.lensrec-plot-sky-maps")


def test_delensing_forecast_appears(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Delensing")
    page.locator("button.lensrec-forecast").click()
    page.wait_for_selector("img.lensrec-plot-delensing-bb[src^='blob:']", state="visible", timeout=120_000)
    summary = page.locator(".lensrec-delensing-summary").inner_text()
    assert "lens" in summary and "σ(r), delensed" in summary
    _shot(page, artifacts_dir, "workbench-delensing.png", "img.lensrec-plot-delensing-bb")


@pytest.mark.skipif(not hasattr(lensrec, "reconstruct"), reason="this lensrec has no reconstruct()")
def test_reconstruct_the_patch_and_cancel_a_second_run(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Reconstruction")
    # the isotropic filter: quick on this small patch (the optimal filter's own check is elsewhere)
    page.locator(".lensrec-reconstruction-filter select").select_option("isotropic")
    page.locator("button.lensrec-reconstruct").click()
    _wait_label(page, "reconstruction", "done")
    for name in ("reconstruction-maps", "reconstruction-spectra"):
        page.wait_for_selector(f"img.lensrec-plot-{name}[src^='blob:']", state="visible", timeout=120_000)
    assert "Reconstructed MV" in page.locator(".lensrec-status-reconstruction").inner_text()
    _shot(page, artifacts_dir, "workbench-reconstruction.png", "img.lensrec-plot-reconstruction-maps")
    # a second run, cancelled: the first result stays, marked out of date
    _start_and_cancel(page, "reconstruction", "button.lensrec-reconstruct", "button.lensrec-cancel-reconstruction")
    assert "cancelled" in page.locator(".lensrec-status-reconstruction").inner_text()
    assert page.locator(".lensrec-stale-reconstruction-maps").is_visible()
    # the button comes back once the cancelled run has wound up
    page.wait_for_function("() => !document.querySelector('button.lensrec-reconstruct').disabled")
    _shot(page, artifacts_dir, "workbench-reconstruction-cancelled.png", ".lensrec-stale-reconstruction-maps")
    page.locator("button.lensrec-reconstruct").click()  # a finished run clears the mark
    _wait_label(page, "reconstruction", "done")
    page.wait_for_selector(".lensrec-stale-reconstruction-maps", state="hidden")


@pytest.mark.skipif(not hasattr(lensrec, "reconstruct"), reason="this lensrec has no reconstruct()")
def test_build_a_template_from_the_reconstruction(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Delensing")
    page.locator("button.lensrec-build-template").click()
    _wait_label(page, "template", "done")
    page.wait_for_selector("img.lensrec-plot-delensing-template[src^='blob:']", state="visible", timeout=120_000)
    summary = page.locator(".lensrec-template-summary").inner_text()
    assert "measured" in summary and "forecast for this sky" in summary
    _shot(page, artifacts_dir, "workbench-delensing-template.png", "img.lensrec-plot-delensing-template")


def test_run_a_tiny_suite_and_cancel_another(workbench_page, artifacts_dir):
    page = workbench_page
    _open_tab(page, "Validation")
    page.locator("button.lensrec-validation-use-sky").click()  # nside 32 and the patch's mask
    page.wait_for_function(
        "() => document.querySelector('.lensrec-status-validation').innerText.includes('taken from the sky')"
    )  # fmt: skip
    n_sims = page.locator(".lensrec-validation-n-sims input")
    n_sims.fill("4")
    n_sims.press("Enter")
    page.locator("button.lensrec-run-suite").click()
    _wait_label(page, "validation", "done", timeout=240_000)
    page.wait_for_selector("img.lensrec-plot-validation[src^='blob:']", state="visible")
    assert "A_lens" in page.locator(".lensrec-status-validation").inner_text()
    _shot(page, artifacts_dir, "workbench-validation.png", "img.lensrec-plot-validation")
    n_sims.fill("12")
    n_sims.press("Enter")
    page.locator("button.lensrec-run-suite").click()
    _wait_label(page, "validation", "simulations")  # the new simulations are being made
    page.locator("button.lensrec-cancel-suite").click()
    _wait_label(page, "validation", "cancelled")
    assert "resume" in page.locator(".lensrec-status-validation").inner_text()
    assert page.locator(".lensrec-stale-validation").is_visible()
    _shot(page, artifacts_dir, "workbench-validation-cancelled.png", ".lensrec-stale-validation")


def test_layout_holds_on_a_laptop_with_the_file_browser_open(workbench_page, artifacts_dir):
    page = workbench_page
    assert page.locator(".jp-FileBrowser").first.is_visible()
    seen = _check_layout(page, artifacts_dir, "1280")
    # the maps are scaled down to the narrow notebook, not cut or squashed
    sky = [f for f in seen["Sky"]["figures"] if f["name"] == "lensrec-plot-sky-maps"]
    assert sky and sky[0]["width"] < 10.4 * 96


def test_layout_holds_on_a_wide_screen(workbench_page, artifacts_dir):
    page = workbench_page
    page.set_viewport_size(DESKTOP)
    try:
        seen = _check_layout(page, artifacts_dir, "1920")
        sky = [f for f in seen["Sky"]["figures"] if f["name"] == "lensrec-plot-sky-maps"]
        assert sky and abs(sky[0]["width"] - 10.4 * 96) < 2  # room enough: drawn at the figure's own size
    finally:
        page.set_viewport_size(LAPTOP)
