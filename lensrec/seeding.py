"""Reproducible random streams: one SeedSequence per run, one child stream per (simulation, component).

``rng_for(seed, index, component)`` always builds the stream from the same spawn key, so simulation 17 is
reproducible alone, in any order, on any executor, bit for bit.
"""

from __future__ import annotations

import numpy as np

from ._checks import as_int

__all__ = ["COMPONENT_KEYS", "rng_for"]

# Fixed keys; never renumber an existing entry (it would change every stored simulation).
COMPONENT_KEYS = {
    "cmb": 0,
    "phi": 1,
    "noise": 2,
    "curl": 3,
    "cmb_second": 4,
    "tracer": 5,
}


def rng_for(seed: int, index: int, component: str) -> np.random.Generator:
    """The random generator of ``component`` for simulation ``index`` of a run seeded with ``seed``."""
    seed = as_int(seed, "seed", minimum=0)
    index = as_int(index, "index", minimum=0)
    if component not in COMPONENT_KEYS:
        raise ValueError(f"component must be one of {sorted(COMPONENT_KEYS)}, got {component!r}")
    sequence = np.random.SeedSequence(seed, spawn_key=(index, COMPONENT_KEYS[component]))
    return np.random.default_rng(sequence)
