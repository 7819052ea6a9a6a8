"""The layout rules of the code base: the library imports no UI code, and a module over about 600 lines
says at its top why it stays in one piece."""

import os
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
UI_MODULES = ("ipywidgets", "widgets", "IPython", "matplotlib.pyplot", "jupyterlab")


def test_importing_lensrec_loads_no_ui_code():
    # a fresh interpreter: what `import lensrec` (with every public name) pulls in
    code = (
        "import sys, lensrec\n"
        "[getattr(lensrec, name) for name in lensrec.__all__]\n"
        f"print('\\n'.join(m for m in sys.modules if m.split('.')[0] in {UI_MODULES!r} or m in {UI_MODULES!r}))"
    )
    loaded = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT)
    assert loaded.stdout.strip() == "", loaded.stdout


def _modules(package):
    folder = os.path.join(ROOT, package)
    for current, _, files in os.walk(folder):
        for name in sorted(files):
            if name.endswith(".py"):
                yield os.path.relpath(os.path.join(current, name), ROOT)


def test_library_modules_do_not_import_the_workbench():
    starts = ("import ipywidgets", "from ipywidgets", "from widgets", "import widgets")
    for path in _modules("lensrec"):
        with open(os.path.join(ROOT, path), encoding="utf-8") as handle:
            bad = [line.strip() for line in handle if line.strip().startswith(starts)]
        assert not bad, (path, bad)


def test_a_long_module_says_why_it_stays_in_one_piece():
    for path in [*_modules("lensrec"), *_modules("widgets")]:
        with open(os.path.join(ROOT, path), encoding="utf-8") as handle:
            lines = handle.read().splitlines()
        if len(lines) > 650:  # "about 600": a reason is due from here
            assert lines[0].startswith("# Over 600 lines: "), f"{path} has {len(lines)} lines and no reason on line 1"
