"""Old public names that keep working for one more release, each with a DeprecationWarning.

Helpers for the four kinds of renamed public name: keyword arguments (:func:`renamed_arguments`),
functions and constants (:func:`deprecated_alias`, :func:`module_getattr`), attributes
(:func:`deprecated_property`) and keys of dicts returned or files read back (:class:`RenamedKeys`,
:func:`upgrade_keys`). Every alias is listed in CHANGELOG.md and removed in the release after next.
"""

from __future__ import annotations

import functools
import warnings

__all__ = [
    "REMOVAL",
    "warn_renamed",
    "renamed_arguments",
    "deprecated_alias",
    "module_getattr",
    "deprecated_property",
    "RenamedKeys",
    "upgrade_keys",
]

REMOVAL = "0.2"


def warn_renamed(old: str, new: str, where: str = "", stacklevel: int = 3) -> None:
    """Warn that ``old`` is now called ``new`` (DeprecationWarning)."""
    prefix = f"{where}: " if where else ""
    warnings.warn(
        f"{prefix}{old!r} is deprecated and will be removed in lensrec {REMOVAL}; use {new!r}",
        DeprecationWarning,
        stacklevel=stacklevel,
    )


def renamed_arguments(_name: str | None = None, **renames: str):
    """Decorator: accept the old keyword ``old=...`` for ``new`` (``@renamed_arguments(old="new")``).

    ``_name`` names the callable in the warning (default: the function's name; give the class name when
    wrapping an ``__init__``).
    """

    def decorate(function):
        name = _name or function.__name__

        @functools.wraps(function)
        def wrapper(*args, **kwargs):
            for old, new in renames.items():
                if old in kwargs:
                    if new in kwargs:
                        raise TypeError(f"{name}() got both {old!r} (deprecated) and {new!r}; pass only {new!r}")
                    warn_renamed(old, new, f"{name}()")
                    kwargs[new] = kwargs.pop(old)
            return function(*args, **kwargs)

        return wrapper

    return decorate


def deprecated_alias(function, old: str):
    """A function under its old name ``old`` that warns and calls ``function``."""

    @functools.wraps(function)
    def alias(*args, **kwargs):
        warn_renamed(old, function.__name__)
        return function(*args, **kwargs)

    alias.__name__ = alias.__qualname__ = old
    alias.__doc__ = f"Deprecated alias of :func:`{function.__name__}` (removed in lensrec {REMOVAL})."
    return alias


def module_getattr(module_name: str, renames: dict[str, str], namespace: dict):
    """A module ``__getattr__`` serving old constant names (old -> new name in ``namespace``) with a warning."""

    def __getattr__(name: str):
        if name in renames:
            warn_renamed(f"{module_name}.{name}", f"{module_name}.{renames[name]}")
            return namespace[renames[name]]
        raise AttributeError(f"module {module_name!r} has no attribute {name!r}")

    return __getattr__


def deprecated_property(new: str, old: str):
    """A read-only property ``old`` of a class that returns attribute ``new`` with a warning."""

    def getter(self):
        warn_renamed(f"{type(self).__name__}.{old}", f"{type(self).__name__}.{new}")
        return getattr(self, new)

    return property(getter, doc=f"Deprecated alias of ``{new}`` (removed in lensrec {REMOVAL}).")


class RenamedKeys(dict):
    """A dict that still answers its old key names (with a warning); only the new keys are stored.

    Subclasses set ``RENAMED = {old: new}`` and ``WHERE`` (what the dict is, for the message).
    """

    RENAMED: dict[str, str] = {}
    WHERE = "this result"

    def __missing__(self, key):
        if key in self.RENAMED:
            warn_renamed(key, self.RENAMED[key], self.WHERE)
            return self[self.RENAMED[key]]
        raise KeyError(key)

    def get(self, key, default=None):
        try:
            return self[key]
        except KeyError:
            return default


def upgrade_keys(document: dict, renames: dict[str, str], where: str) -> dict:
    """A copy of ``document`` with old keys (read from an older file) renamed, one warning per old key.

    Raises
    ------
    ValueError
        If a document holds both an old key and its new name.
    """
    out = dict(document)
    for old, new in renames.items():
        if old in out:
            if new in out:
                raise ValueError(f"{where} holds both {old!r} (old name) and {new!r}; keep only {new!r}")
            warn_renamed(old, new, where, stacklevel=4)
            out[new] = out.pop(old)
    return out
