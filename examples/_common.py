"""What every example needs: the bundled rasters, a safe output folder, one-line errors.

Not an example itself; the scripts beside it import it.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import geosr

#: The open test rasters bundled with geosr (tests/data/SOURCES.md).
DATA = Path(__file__).resolve().parents[1] / "tests" / "data"


def output_folder(out: Path | None, prefix: str) -> Path:
    """A new temporary folder, or ``out`` when it is new or empty.

    An example never replaces a file: a folder that already holds files is
    refused (give a new one), so nothing the user keeps there can be
    overwritten, the inputs included.
    """
    if out is None:
        return Path(tempfile.mkdtemp(prefix=prefix))
    out = Path(out)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise SystemExit(f"error: --out must be a new or empty folder, got {str(out)!r}")
    out.mkdir(parents=True, exist_ok=True)
    return out


def run(main) -> None:
    """Run an example's ``main``; a geosr error is one line and exit status 1."""
    try:
        status = main()
    except geosr.GeosrError as exc:  # bad input or a failed run: one line, no traceback
        print(f"error: {exc}", file=sys.stderr)
        status = 1
    raise SystemExit(status)


def scene_arguments(doc: str) -> argparse.ArgumentParser:
    """The arguments the single-scene examples share: SRC, ``--out`` and ``--scale``."""
    parser = argparse.ArgumentParser(description=doc.splitlines()[0])
    parser.add_argument("src", nargs="?", default=DATA / "rgb-byte-crop.tif", type=Path,
                        help="raster to magnify (default: the bundled 3-band crop)")
    parser.add_argument("--out", type=Path, default=None,
                        help="output folder (default: a new temporary folder)")
    parser.add_argument("--scale", type=int, default=2, help="magnification, 2 to 4 with the shipped models")
    return parser
