"""Estimator labels and the rules attached to them, in one place.

Every module, command and workbench panel takes its estimator labels, components and suite stages from
here. Adding an estimator means one entry in one of the tables below plus its weights (in
:mod:`lensrec.estimator_weights` for a new field pair):

- :data:`ESTIMATOR_FIELDS`: the quadratic estimators built on one pair of fields (Okamoto & Hu 2003, PRD 67,
  083002), label -> (first field, second field). :data:`PAIR_ESTIMATORS` lists them in display order.
- :data:`COMBINED_ESTIMATORS`: a label -> the pair estimators it combines, each normalized, with weights
  from the inverse of their N0 covariance (Okamoto & Hu 2003, §III). "MV" combines all five; "TT+TE+EE"
  combines the three that read no B modes, so that delensing the same maps' B modes with it carries no
  B-mode reuse bias (Namikawa 2017, PRD 95, 103514; Baleato Lizancos, Challinor & Carron 2021, JCAP 03, 016).
- :data:`JOINT_ESTIMATORS`: a label -> the pair estimators whose weights are derived jointly from the full
  T, E, B covariance rather than combined after normalization. "GMV", the joint ("generalized")
  minimum-variance estimator (Maniyar et al. 2021, PRD 103, 083524), spans all five pairs.

:data:`ESTIMATORS` is every label, in display order (pairs, then combinations, then joint estimators).
The rules (which fields a label reads, whether it uses B modes, whether its two legs are interchangeable)
follow from the tables.

Examples
--------
>>> from lensrec.labels import parse_estimators, uses_b_modes
>>> parse_estimators("TT,EB")
('TT', 'EB')
>>> uses_b_modes("MV"), uses_b_modes("TE")
(True, False)
"""

from __future__ import annotations

import difflib
from types import MappingProxyType

__all__ = [
    "ESTIMATOR_FIELDS",
    "PAIR_ESTIMATORS",
    "COMBINED_ESTIMATORS",
    "JOINT_ESTIMATORS",
    "ESTIMATORS",
    "ITERATIVE_ESTIMATORS",
    "COMPONENTS",
    "SUITE_STAGES",
    "FIELDS",
    "estimator_pairs",
    "estimator_fields",
    "uses_b_modes",
    "is_symmetric",
    "parse_estimator",
    "parse_estimators",
    "parse_component",
    "parse_components",
]

FIELDS = ("T", "E", "B")

# label -> (first field, second field): the quadratic estimators on one pair of fields (Okamoto & Hu 2003).
ESTIMATOR_FIELDS = MappingProxyType(
    {"TT": ("T", "T"), "TE": ("T", "E"), "EE": ("E", "E"), "TB": ("T", "B"), "EB": ("E", "B")}
)
PAIR_ESTIMATORS = tuple(ESTIMATOR_FIELDS)

# label -> pair estimators combined with inverse-N0-covariance weights after normalization.
COMBINED_ESTIMATORS = MappingProxyType({"MV": PAIR_ESTIMATORS, "TT+TE+EE": ("TT", "TE", "EE")})

# label -> pair estimators whose weights are derived jointly from the full T, E, B covariance.
JOINT_ESTIMATORS = MappingProxyType({"GMV": PAIR_ESTIMATORS})

ESTIMATORS = PAIR_ESTIMATORS + tuple(COMBINED_ESTIMATORS) + tuple(JOINT_ESTIMATORS)

# Estimators with an iterative form (delens with the current estimate, estimate again): EB, where lensing B
# dominates the filtered B modes at depth (Smith et al. 2012, JCAP 06, 014), and the combinations holding it.
ITERATIVE_ESTIMATORS = ("EB", "MV")

# Lensing components: the gradient (phi) and the curl (Omega) of the deflection.
COMPONENTS = ("gradient", "curl")

# The stages of a lensing suite, in the order they run; a suite's progress callback names one of them.
SUITE_STAGES = ("data", "simulations", "pairs")


# --------------------------------------------------------------------------------------------- rules
def estimator_pairs(label: str) -> tuple[str, ...]:
    """The pair estimators a label is built from (the label itself for a pair estimator).

    >>> estimator_pairs("MV")
    ('TT', 'TE', 'EE', 'TB', 'EB')
    """
    label = parse_estimator(label)
    if label in ESTIMATOR_FIELDS:
        return (label,)
    if label in COMBINED_ESTIMATORS:
        return tuple(COMBINED_ESTIMATORS[label])
    return tuple(JOINT_ESTIMATORS[label])


def estimator_fields(label: str) -> tuple[str, ...]:
    """The fields (of "T", "E", "B", in that order) a label's reconstruction reads.

    >>> estimator_fields("TB"), estimator_fields("MV")
    (('T', 'B'), ('T', 'E', 'B'))
    """
    used = {field for pair in estimator_pairs(label) for field in ESTIMATOR_FIELDS[pair]}
    return tuple(field for field in FIELDS if field in used)


def uses_b_modes(label: str) -> bool:
    """True if the label's reconstruction reads B modes (then delensing the same maps' B is biased low)."""
    return "B" in estimator_fields(label)


def is_symmetric(label: str) -> bool:
    """True for a pair estimator whose two legs are the same field (estimate[a, b] = estimate[b, a])."""
    label = parse_estimator(label, allowed=PAIR_ESTIMATORS)
    first, second = ESTIMATOR_FIELDS[label]
    return first == second


# -------------------------------------------------------------------------------------------- parsing
def _unknown(kind: str, value: str, allowed) -> ValueError:
    close = difflib.get_close_matches(value.upper(), allowed, n=1, cutoff=0.4)
    if not close:
        close = difflib.get_close_matches(value.lower(), allowed, n=1, cutoff=0.4)
    hint = f"; did you mean {close[0]!r}?" if close else "."
    return ValueError(f"unknown {kind} {value!r}{hint} Allowed: {', '.join(allowed)}")


def parse_estimator(value, allowed=ESTIMATORS) -> str:
    """Check one estimator label against ``allowed`` (default: every label) and return it.

    Raises
    ------
    TypeError
        If ``value`` is not a string.
    ValueError
        If it is not one of ``allowed``; the message suggests the nearest label.
    """
    allowed = tuple(allowed)
    if not isinstance(value, str):
        raise TypeError(f"estimator must be a string from {', '.join(allowed)}, got {value!r}")
    if value not in allowed:
        raise _unknown("estimator", value, allowed)
    return value


def parse_estimators(values, allowed=ESTIMATORS) -> tuple[str, ...]:
    """Check a sequence of estimator labels (or a comma-separated string) and return them as a tuple.

    Raises
    ------
    TypeError
        If ``values`` is not a string or a sequence of strings.
    ValueError
        If it is empty, names an unknown label (with the nearest one) or names a label twice.
    """
    allowed = tuple(allowed)
    if isinstance(values, str):
        values = [part.strip() for part in values.split(",") if part.strip()]
    try:
        labels = list(values)
    except TypeError:
        raise TypeError(f"estimators must be a sequence of labels from {', '.join(allowed)}, got {values!r}") from None
    if not labels:
        raise ValueError(f"estimators must name at least one of {', '.join(allowed)}, got none")
    out = []
    for label in labels:
        label = parse_estimator(label, allowed)
        if label in out:
            raise ValueError(f"estimators must be distinct labels: {label!r} is listed twice in {labels}")
        out.append(label)
    return tuple(out)


def parse_component(value) -> str:
    """Check one lensing component ("gradient" or "curl") and return it."""
    if not isinstance(value, str):
        raise TypeError(f"component must be one of {', '.join(COMPONENTS)}, got {value!r}")
    if value not in COMPONENTS:
        raise _unknown("component", value, COMPONENTS)
    return value


def parse_components(values) -> tuple[str, ...]:
    """Check one component or a sequence of distinct components and return them as a tuple."""
    if isinstance(values, str):
        values = (values,)
    try:
        out = tuple(values)
    except TypeError:
        raise TypeError(f"components must be a sequence from {', '.join(COMPONENTS)}, got {values!r}") from None
    if not out:
        raise ValueError(f"components must name at least one of {', '.join(COMPONENTS)}, got none")
    out = tuple(parse_component(c) for c in out)
    if len(set(out)) != len(out):
        raise ValueError(f"components must be distinct entries of {COMPONENTS}, got {values!r}")
    return out
