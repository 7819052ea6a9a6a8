"""Generate ``fiducial_spectra.txt.gz``, the embedded default cosmology of lensrec.

Run from the repository root with camb installed::

    python lensrec/data/make_fiducial_spectra.py [--out lensrec/data/fiducial_spectra.txt.gz]

The cosmology is flat ΛCDM with the base-ΛCDM parameters of Planck Collaboration 2020 (A&A 641, A6,
Table 2), rounded as in the Particle Data Group's review of cosmological parameters (Workman et al.
2022, PTEP 2022, 083C01); see ``FIDUCIAL_PARAMETERS`` below and docs/conventions.md. The output is a
plain-text table (gzip-compressed) whose header records the camb version and every parameter, as a
JSON line starting with ``# parameters:``. Spectra are raw C_ℓ in µK² (C_L^φφ dimensionless),
indexed by ℓ = 0 … 6000.
"""

from __future__ import annotations

import argparse
import gzip
import io
import json
import os
import tempfile

import numpy as np

LMAX = 6000
# Tensor spectra are negligible (< 1e-6 of their peak) far above ℓ ≈ 1000; camb computes them to this ℓ
# and the file holds zeros above it.
LMAX_TENSOR = 3000

FIDUCIAL_PARAMETERS = {
    "H0": 67.4,
    "ombh2": 0.0224,
    "omch2": 0.120,
    "tau": 0.054,
    "ns": 0.965,
    "As": 2.1e-9,
    "mnu": 0.06,
    "num_massive_neutrinos": 1,
    "omk": 0.0,
    "TCMB": 2.7255,
}

COLUMNS = (
    "ell",
    "unlensed_TT",
    "unlensed_EE",
    "unlensed_BB",
    "unlensed_TE",
    "lensed_TT",
    "lensed_EE",
    "lensed_BB",
    "lensed_TE",
    "phi_phi",
    "tensor_TT",
    "tensor_EE",
    "tensor_BB",
)


def compute_columns(parameters: dict, lmax: int = LMAX, lmax_tensor: int = LMAX_TENSOR):
    """Return (table, metadata) for the given camb parameters. Requires camb."""
    import camb

    scalar = camb.set_params(lmax=lmax, lens_potential_accuracy=1, r=0, WantTensors=False, **parameters)
    results = camb.get_results(scalar)
    powers = results.get_cmb_power_spectra(scalar, CMB_unit="muK", raw_cl=True, lmax=lmax)
    unlensed = powers["unlensed_scalar"]  # columns TT, EE, BB, TE
    lensed = powers["lensed_scalar"]
    phi = results.get_lens_potential_cls(lmax=lmax, raw_cl=True)[:, 0]

    tensor_params = camb.set_params(
        lmax=lmax_tensor, r=1.0, WantTensors=True, WantScalars=False, max_l_tensor=lmax_tensor, **parameters
    )
    tensor_results = camb.get_results(tensor_params)
    tensor = tensor_results.get_tensor_cls(lmax=lmax_tensor, CMB_unit="muK", raw_cl=True)
    tensor_full = np.zeros((lmax + 1, 4))
    tensor_full[: lmax_tensor + 1] = tensor[: lmax_tensor + 1]
    # camb's tensor auto-spectra dip a few 1e-9 µK² below zero at high ℓ (numerical noise, far below any
    # signal); auto-spectra must be non-negative, so those entries are set to zero and counted in the header.
    auto = tensor_full[:, :3]
    clipped = int(np.count_nonzero(auto < 0))
    auto[auto < 0] = 0.0

    ell = np.arange(lmax + 1, dtype=float)
    table = np.column_stack(
        [
            ell,
            unlensed[: lmax + 1, 0],
            unlensed[: lmax + 1, 1],
            unlensed[: lmax + 1, 2],
            unlensed[: lmax + 1, 3],
            lensed[: lmax + 1, 0],
            lensed[: lmax + 1, 1],
            lensed[: lmax + 1, 2],
            lensed[: lmax + 1, 3],
            phi[: lmax + 1],
            tensor_full[:, 0],
            tensor_full[:, 1],
            tensor_full[:, 2],
        ]
    )
    table[:2, 1:] = 0.0
    metadata = {
        "generator": "lensrec/data/make_fiducial_spectra.py",
        "camb_version": camb.__version__,
        "camb_settings": {
            "lmax": lmax,
            "lens_potential_accuracy": 1,
            "lmax_tensor": lmax_tensor,
            "CMB_unit": "muK",
            "raw_cl": True,
        },
        "parameters": parameters,
        "tensor_to_scalar_ratio_of_tensor_columns": 1.0,
        "tensor_negative_entries_set_to_zero": clipped,
        "units": "raw C_ell in muK^2; phi_phi dimensionless",
        "columns": list(COLUMNS),
    }
    return table, metadata


def write_table(path: str, table: np.ndarray, metadata: dict) -> None:
    """Write the table with a commented header, atomically."""
    text = io.StringIO()
    text.write("# lensrec fiducial spectra (raw C_ell; muK^2, phi_phi dimensionless)\n")
    text.write(f"# camb_version: {metadata['camb_version']}\n")
    text.write("# parameters: " + json.dumps(metadata, sort_keys=True) + "\n")
    text.write("# " + " ".join(COLUMNS) + "\n")
    fmt = ["%d"] + ["%.9e"] * (table.shape[1] - 1)
    np.savetxt(text, table, fmt=fmt)
    directory = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=directory, prefix=".tmp-", suffix=".gz")
    try:
        with os.fdopen(fd, "wb") as raw, gzip.GzipFile(fileobj=raw, mode="wb", mtime=0) as handle:
            handle.write(text.getvalue().encode())
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=os.path.join(os.path.dirname(__file__), "fiducial_spectra.txt.gz"))
    args = parser.parse_args()
    table, metadata = compute_columns(FIDUCIAL_PARAMETERS)
    write_table(args.out, table, metadata)
    print(f"wrote {args.out} with camb {metadata['camb_version']}")


if __name__ == "__main__":
    main()
