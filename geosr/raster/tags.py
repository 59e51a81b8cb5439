"""Provenance tags and the caution every magnified raster carries.

Written in the default tag domain of the output:

``GEOSR_SYNTHESIZED``  ``yes``: fine detail is synthesized, not measured
``GEOSR_METHOD``       ``sparse`` or ``anchored``
``GEOSR_SCALE``        the integer magnification
``GEOSR_MODEL_SHA256`` checksum of the model arrays; with per-band models a
                       comma-separated list in band order (each band also
                       carries its own in its band tags)
``GEOSR_VERSION``      the geosr version
``GEOSR_CREATED``      ISO 8601 time in UTC
``GEOSR_SOURCE``       the source's file name
``GEOSR_SOURCE_SHA256`` sha256 of the source file's bytes (absent when the
                       source is not a local file, e.g. ``/vsis3/...``)
``GEOSR_OPTIONS``      the options that change the output's pixels or layout,
                       as canonical JSON (:func:`options_json`)
``TIFFTAG_IMAGEDESCRIPTION`` the caution in words
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os

from .._version import __version__
from ..cautions import CAUTION

__all__ = [
    "utc_now",
    "image_description",
    "provenance_tags",
    "carried_tags",
    "carried_band_tags",
    "file_sha256",
    "options_json",
]


def utc_now():
    """The current time in UTC as ISO 8601, to the second: ``2024-05-01T12:00:00Z``."""
    now = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0)
    return now.isoformat().replace("+00:00", "Z")


def file_sha256(path, block_size=1 << 20):
    """The hex sha256 of a local file's bytes, read in blocks; None for other paths.

    Streaming keeps memory flat; about 0.1 s per 100 MB on one core.
    GDAL paths such as ``/vsis3/...`` are not local files and give None.
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        return None
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(block_size), b""):
            h.update(chunk)
    return h.hexdigest()


def options_json(options):
    """Options as canonical JSON: sorted keys, no spaces, non-JSON values as text."""
    return json.dumps(options, sort_keys=True, separators=(",", ":"), default=str)


def image_description(scale, method, source_name):
    """The ``TIFFTAG_IMAGEDESCRIPTION`` text: what was done, then the caution."""
    return (
        f"Magnified x{scale} from {source_name} by geosr {__version__} ({method} method). "
        f"Fine detail is synthesized, not measured. {CAUTION}"
    )


def provenance_tags(*, scale, method, model_sha256, source_name, created=None,
                    consistency=False, ensemble=False, spectral_guard=False,
                    source_sha256=None, options=None):
    """The dataset-level ``GEOSR_*`` tags and the image description.

    Parameters
    ----------
    scale : int
    method : str
    model_sha256 : str or sequence of str
        One checksum, or one per magnified band.
    source_name : str
    created : str, optional
        ISO 8601 UTC time; now by default.
    consistency, ensemble : bool
    spectral_guard : bool
        Whether the cross-band spectral guard was applied.
    source_sha256 : str, optional
        Recorded as ``GEOSR_SOURCE_SHA256`` when given.
    options : str, optional
        Canonical JSON of the run's options (:func:`options_json`), recorded
        as ``GEOSR_OPTIONS`` when given.

    Returns
    -------
    dict of str
    """
    if not isinstance(model_sha256, str):
        shas = list(model_sha256)
        model_sha256 = shas[0] if len(set(shas)) == 1 else ",".join(shas)
    tags = {
        "GEOSR_SYNTHESIZED": "yes",
        "GEOSR_METHOD": str(method),
        "GEOSR_SCALE": str(int(scale)),
        "GEOSR_MODEL_SHA256": str(model_sha256),
        "GEOSR_VERSION": __version__,
        "GEOSR_CREATED": created or utc_now(),
        "GEOSR_SOURCE": str(source_name),
        "GEOSR_CONSISTENCY": "yes" if consistency else "no",
        "GEOSR_ENSEMBLE": "yes" if ensemble else "no",
        "GEOSR_SPECTRAL_GUARD": "yes" if spectral_guard else "no",
        "TIFFTAG_IMAGEDESCRIPTION": image_description(scale, method, source_name),
        "TIFFTAG_SOFTWARE": f"geosr {__version__}",
    }
    if source_sha256:
        tags["GEOSR_SOURCE_SHA256"] = str(source_sha256)
    if options is not None:
        tags["GEOSR_OPTIONS"] = str(options)
    return tags


def carried_tags(tags):
    """Source dataset tags worth keeping (AREA_OR_POINT, acquisition metadata).

    TIFF baseline tags describe the file, not the scene, and earlier
    ``GEOSR_*`` tags would describe another run: both are dropped.
    """
    return {
        k: v for k, v in tags.items()
        if not k.startswith("TIFFTAG_") and not k.startswith("GEOSR_")
    }


def carried_band_tags(tags):
    """Source band tags worth keeping: statistics change, so they are dropped."""
    return {
        k: v for k, v in tags.items()
        if not k.startswith("STATISTICS_") and not k.startswith("GEOSR_")
    }
