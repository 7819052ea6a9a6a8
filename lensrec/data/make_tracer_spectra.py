"""Generate the spectra of the invented demo tracers in ``lensrec/data/tracers/``.

Run from the repository root::

    python lensrec/data/make_tracer_spectra.py

Two made-up tracers of the lensing potential, in arbitrary units scaled so that each responds to φ with
unit weight, built from independent Gaussian components so that every covariance is positive
semidefinite by construction:

    glow  = φ + s_shared + s_glow  + n_glow
    motes = φ + s_shared + s_motes + n_motes

``diffuse_glow`` is a smooth, infrared-background-like glow: its correlation with φ rises to ≈ 0.8 at
L ≈ 200–800 and falls at high L, where emission unrelated to the lensing mass dominates (the behavior
described for such tracers by Sherwin & Schmittfull 2015, PRD 92, 043005). ``scattered_motes`` is a
galaxy-count-like tracer, ≈ 0.5 correlated at low L with shot noise at high L. s_shared is the part of the
two tracers correlated with each other but not with φ. The spectra of s and n are simple analytic shapes in
units of the fiducial C_L^φφ; they describe no survey. Columns: L, auto (signal), cross with φ, noise.
"""

from __future__ import annotations

import os

import numpy as np

LMAX_L = 4000


def components(phi: np.ndarray) -> dict:
    L = np.arange(phi.size, dtype=np.float64)
    shape = np.maximum(L, 1.0)
    return {
        "shared": 0.15 * phi * (1.0 + (shape / 1500.0) ** 2),
        "glow": phi * (0.33 + (shape / 1800.0) ** 2.5 + 40.0 / shape**1.2),
        "glow_noise": phi * 0.02 * (shape / 1000.0) ** 4,
        "motes": phi * (1.5 + (shape / 900.0) ** 2),
        "motes_noise": phi * 0.6 * (shape / 600.0) ** 4,
    }


def main(folder=None) -> None:
    import lensrec

    folder = folder or os.path.join(os.path.dirname(os.path.abspath(__file__)), "tracers")
    phi = np.array(lensrec.fiducial_spectra().phi[: LMAX_L + 1])
    phi[:2] = 0.0
    parts = components(phi)
    L = np.arange(LMAX_L + 1)
    glow_auto = phi + parts["shared"] + parts["glow"]
    motes_auto = phi + parts["shared"] + parts["motes"]
    header = "L auto cross_phi noise (arbitrary tracer units; made-up tracer, see make_tracer_spectra.py)"
    for name, auto, noise in (
        ("diffuse_glow", glow_auto, parts["glow_noise"]),
        ("scattered_motes", motes_auto, parts["motes_noise"]),
    ):
        table = np.column_stack([L, auto, phi, noise])
        table[:2, 1:] = 0.0
        np.savetxt(os.path.join(folder, f"{name}.txt"), table, fmt=["%d", "%.8e", "%.8e", "%.8e"], header=header)
    cross = phi + parts["shared"]
    cross[:2] = 0.0
    np.savetxt(
        os.path.join(folder, "diffuse_glow_x_scattered_motes.txt"),
        np.column_stack([L, cross]),
        fmt=["%d", "%.8e"],
        header="L cross (signal cross-spectrum of the two made-up tracers)",
    )


if __name__ == "__main__":
    main()
