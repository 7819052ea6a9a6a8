"""``lensrec inspect PATH``: print the provenance of any lensrec output file or folder."""

from __future__ import annotations

import json
import os

HELP = "print the provenance (versions, commit, arguments, seeds, timings) of an output file or folder"
EXAMPLES = """examples:
  lensrec inspect sky/            # the run.json of a folder
  lensrec inspect n0.json         # the provenance block of a JSON output
  lensrec inspect sky/maps.fits   # the run.json beside a FITS output"""


def add_arguments(parser) -> None:
    parser.add_argument("path", help="an output file or folder written by lensrec")


def find_provenance(path: str) -> tuple[str, dict]:
    """Locate and return (source file, provenance dict) for a lensrec output."""
    from ..io import read_json

    path = os.fspath(path)
    if not os.path.exists(path):
        raise ValueError(f"{path!r} does not exist")
    candidates = []
    if os.path.isdir(path):
        candidates = [os.path.join(path, name) for name in ("run.json", "summary.json", "manifest.json")]
    elif path.endswith(".json"):
        candidates = [path]
    candidates.append(os.path.join(os.path.dirname(os.path.abspath(path)), "run.json"))
    for candidate in candidates:
        if os.path.isfile(candidate):
            document = read_json(candidate)
            record = document.get("provenance", document) if isinstance(document, dict) else None
            if isinstance(record, dict) and "lensrec_version" in record:
                return candidate, record
    raise ValueError(f"no lensrec provenance found for {path!r} (looked in {', '.join(candidates)})")


def run(args) -> int:
    source, record = find_provenance(args.path)
    print(f"provenance from {source}")
    for key, value in record.items():
        text = json.dumps(value) if isinstance(value, (dict, list)) else str(value)
        print(f"  {key:18s} {text}")
    return 0
