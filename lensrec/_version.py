"""The lensrec version, in a module of its own so that any module can read it without importing the package root.

pyproject.toml reads it from here (``[tool.setuptools.dynamic]``).
"""

__version__ = "0.1.0"
