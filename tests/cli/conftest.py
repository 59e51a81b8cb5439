"""Fixtures of the command-line tests: recording how a command calls the library."""

from __future__ import annotations

import inspect
from pathlib import Path

import pytest


def _stand_in(name, args):
    """What the recorded library function returns instead: the least the CLI reads."""
    if name == "magnify_raster":
        from geosr.pipeline.magnify import MagnifyResult

        return MagnifyResult(dst=Path(args[1]), stac=None, width=4, height=4, count=1, scale=2,
                             method="anchored", model_sha256="0" * 64, blocks=1, halo=0,
                             chunk_size=1024, seconds=0.0, scheduler="threads")
    if name == "train_from_rasters":
        return [None]  # one model
    if name == "assess_raster":
        overall = {"overall": {"psnr": 30.0}}
        return {"geosr": overall, "bicubic": overall}
    raise ValueError(f"no stand-in result for {name!r}")


@pytest.fixture
def recorder(monkeypatch):
    """Replace a library function by one that records how the CLI called it.

    ``recorder(module, name, keep=None)`` returns the list of calls, each
    ``(args, kwargs)`` or what ``keep(args, kwargs)`` makes of it. Every call
    must bind to the real function's signature, so a keyword the library does
    not have fails the test. This checks the CLI's wiring (which keyword gets
    which value); the real library runs in the happy-path tests.
    """
    calls = []

    def install(module, name, keep=None):
        signature = inspect.signature(getattr(module, name))

        def record(*args, **kwargs):
            signature.bind(*args, **kwargs)  # TypeError when a keyword does not match
            calls.append(keep(args, kwargs) if keep else (args, kwargs))
            return _stand_in(name, args)

        monkeypatch.setattr(module, name, record)
        return calls

    return install
