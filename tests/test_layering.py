"""Layering rules: lensrec imports no UI code, and no module writes its own estimator label list."""

from __future__ import annotations

import ast
import pathlib
import subprocess
import sys

import lensrec
from lensrec.labels import COMPONENTS, ESTIMATORS, SUITE_STAGES

ROOT = pathlib.Path(lensrec.__file__).resolve().parent.parent
UI_MODULES = ("ipywidgets", "widgets", "IPython", "ipykernel", "jupyterlab", "traitlets")


def test_importing_lensrec_and_its_modules_loads_no_ui_code():
    modules = sorted(
        "lensrec." + ".".join(path.relative_to(ROOT / "lensrec").with_suffix("").parts)
        for path in (ROOT / "lensrec").rglob("*.py")
        if path.name != "__init__.py" and "data" not in path.relative_to(ROOT / "lensrec").parts
    )
    script = (
        "import importlib, sys\n"
        "import lensrec\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        f"loaded = sorted(m for m in sys.modules if m.split('.')[0] in {UI_MODULES!r})\n"
        "print(','.join(loaded))\n"
    )
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "", f"lensrec imports UI code: {result.stdout.strip()}"


def _label_lists(path: pathlib.Path):
    """Tuples, lists and sets of >= 3 string literals that are all estimator labels, components or stages."""
    vocabulary = set(ESTIMATORS) | set(COMPONENTS) | set(SUITE_STAGES)
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
            strings = [e.value for e in node.elts if isinstance(e, ast.Constant) and isinstance(e.value, str)]
            if (
                len(strings) == len(node.elts) >= 2
                and set(strings) <= vocabulary
                and (len(strings) >= 3 or set(strings) == set(COMPONENTS))
            ):
                yield node.lineno, strings


def test_no_module_writes_its_own_estimator_label_list():
    offenders = []
    for folder in ("lensrec", "widgets"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            if path == ROOT / "lensrec" / "labels.py":
                continue
            offenders += [f"{path.relative_to(ROOT)}:{line}: {strings}" for line, strings in _label_lists(path)]
    assert not offenders, "take labels from lensrec.labels instead:\n" + "\n".join(offenders)


def test_the_label_scan_finds_a_written_list(tmp_path):
    # the scan must fail on the error it guards against
    module = tmp_path / "module.py"
    module.write_text('LABELS = ("TT", "EE", "MV")\nPARTS = ["gradient", "curl"]\nOTHER = ("TT", "x", "EE")\n')
    assert [line for line, _ in _label_lists(module)] == [1, 2]
