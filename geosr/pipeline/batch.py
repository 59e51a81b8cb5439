"""Magnify many rasters in one run: one scheduler, named outputs, resumable.

:func:`magnify_many` runs :func:`~geosr.pipeline.magnify.magnify_raster`
on every source, writing ``output_dir / name.format(stem=..., scale=...,
method=...)``. Everything that can be settled once is settled before the
first file: the sources (``@list.txt`` entries read), the models (a model
file is loaded once), the output names (unknown template fields and two
sources with one output are refused) and the scheduler (a LocalCluster or
a connection to a cluster is opened once, on the first file that needs
work, and shared by every file).

An output that exists is checked against its tags: when
``GEOSR_SOURCE_SHA256`` is the source's sha256, ``GEOSR_OPTIONS`` the
run's options and ``GEOSR_MODEL_SHA256`` names the run's models, it is up
to date and skipped; otherwise it is refused (the file fails) unless
``overwrite``. A self-trained or scene-learned guided model is not known
before the run; it is a function of the source and the options (training
is seeded), so those two decide alone.

A file that fails is recorded with its one-line error and the others go
on; an interrupt (KeyboardInterrupt) stops the run and leaves the written
outputs, so a rerun resumes where it stopped.
"""

from __future__ import annotations

import contextlib
import dataclasses
import inspect
import os
import string
import time
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

from ..enums import Method
from ..errors import DestinationError, GeosrError, InputError, ParameterError
from ..parallel.schedule import ProgressCallback, SchedulerSpec, _client_for, resolve_scheduler
from ..raster.io import _human
from ..raster.tags import file_sha256
from .guided import GUIDED_METHOD
from .magnify import magnify_raster, output_options
from .plan import _load, check_models, model_method, model_sha
from .results import MagnifyResult

__all__ = [
    "BatchItem",
    "DEFAULT_NAME",
    "TEMPLATE_FIELDS",
    "magnify_many",
    "output_names",
    "read_sources",
    "summary_table",
]

#: The output name of each source unless ``name`` says otherwise.
DEFAULT_NAME = "{stem}-x{scale}.tif"

#: The fields an output name template may use.
TEMPLATE_FIELDS = ("stem", "scale", "method")

#: What happened to one source.
STATUSES = ("written", "skipped", "failed")

#: The keywords of magnify_raster a batch passes on (the batch sets the others).
_RASTER_OPTIONS = frozenset(inspect.signature(magnify_raster).parameters) - {"src", "dst", "model", "progress"}


@dataclasses.dataclass(frozen=True)
class BatchItem:
    """What became of one source of :func:`magnify_many`.

    Attributes
    ----------
    source : pathlib.Path
    output : pathlib.Path
    status : {"written", "skipped", "failed"}
        ``skipped``: the output was already up to date.
    seconds : float
        Time spent on this source (checking, magnifying).
    size : int or None
        Bytes of the output file (None when it failed).
    error : str or None
        The one-line reason of a failure.
    result : MagnifyResult or None
        What :func:`magnify_raster` reported, for a written output.
    """

    source: Path
    output: Path
    status: str
    seconds: float
    size: int | None = None
    error: str | None = None
    result: MagnifyResult | None = None


def read_sources(sources: Iterable[str | os.PathLike[str]]) -> list[str]:
    """The source paths, with every ``@list.txt`` entry replaced by the paths it lists.

    A list file holds one path per line; blank lines and lines starting
    with ``#`` are ignored; paths are used as written (a relative path is
    relative to the current folder, as when given directly).

    Raises
    ------
    InputError
        A list file cannot be read.
    ParameterError
        No source at all.
    """
    if isinstance(sources, (str, os.PathLike)):
        sources = [sources]
    paths: list[str] = []
    for entry in sources:
        text = os.fspath(entry)
        if not text.startswith("@"):
            paths.append(text)
            continue
        listing = text[1:]
        try:
            with open(listing, encoding="utf-8") as fh:
                lines = [line.strip() for line in fh]
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"The source list {listing!r} must be a readable text file, got: {exc}") from None
        paths += [line for line in lines if line and not line.startswith("#")]
    if not paths:
        raise ParameterError("The 'sources' parameter must name at least one raster, got none")
    return paths


def _template_fields(name: str) -> list[str]:
    """The field names a template uses; unknown fields and bad templates refused."""
    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(name) if f is not None]
    except ValueError as exc:
        raise ParameterError(f"The 'name' template must be a valid format string, got {name!r}: {exc}") from None
    unknown = sorted({f for f in fields} - set(TEMPLATE_FIELDS))
    if unknown:
        raise ParameterError(
            f"The 'name' template must use only {{stem}}, {{scale}} and {{method}}, got "
            f"{', '.join('{' + f + '}' for f in unknown)} in {name!r}"
        )
    return fields


def output_names(sources: Sequence[str], name: str, *, scale: int | None, method: str) -> list[str]:
    """The output file name of every source from the template ``name``.

    Raises
    ------
    ParameterError
        An unknown field, a name that is not a plain file name, ``{scale}``
        when the scale is not known before the run, or two sources with the
        same output name.
    """
    fields = _template_fields(name)
    if "scale" in fields and scale is None:
        raise ParameterError(
            "The 'scale' parameter must be given when the 'name' template uses {scale} and "
            "no model fixes it, got None"
        )
    names: list[str] = []
    seen: dict[str, str] = {}
    for src in sources:
        stem = os.path.splitext(os.path.basename(src.rstrip("/")))[0]
        try:
            out = name.format(stem=stem, scale=scale, method=method)
        except (ValueError, TypeError) as exc:
            raise ParameterError(f"The 'name' template {name!r} must format, got: {exc}") from None
        if out in ("", ".", "..") or os.sep in out or (os.altsep and os.altsep in out):
            raise ParameterError(f"The 'name' template must give a file name without folders, got {out!r}")
        key = os.path.normcase(out)
        if key in seen:
            raise ParameterError(
                f"The 'name' template must give every source its own output, got {out!r} for both "
                f"{seen[key]!r} and {src!r}"
            )
        seen[key] = src
        names.append(out)
    return names


@dataclasses.dataclass(frozen=True)
class _Setup:
    """What is settled once for every file: the model argument, scale, method, checksums."""

    model: Any
    scale: int | None
    method: str
    model_shas: frozenset[str] | None  # None: learned per file, not known before


def _setup(model: Any, options: dict[str, Any]) -> _Setup:
    """Load the models once and find the scale and method the outputs will have."""
    scale, method = options.get("scale"), options.get("method")
    method = None if method is None else str(Method.parse(method, "method"))
    if options.get("guide") is not None:
        shas = None
        if model is not None:
            from ..modelfile import load_guided_model

            given = load_guided_model(model) if isinstance(model, (str, os.PathLike)) else model
            shas = frozenset([str(getattr(given, "sha256_", "unknown"))])
            scale = scale if scale is not None else getattr(given, "scale", None)
        return _Setup(model, scale, GUIDED_METHOD, shas)
    if options.get("self_train"):
        if method is None:
            from ..core.model import CoupledDictionary

            method = str(CoupledDictionary().get_params()["method"])
        return _Setup(model, scale, method, None)
    models, _ = _load(model, scale, method)
    scale = check_models(models, scale, method, tuple(range(len(models))))
    shared = models[0] if len(models) == 1 else models
    return _Setup(shared, scale, model_method(models[0]), frozenset(model_sha(m) for m in models))


def _check_options(options: dict[str, Any]) -> None:
    """Refuse keywords that magnify_raster does not take or that the batch sets."""
    unknown = sorted(set(options) - _RASTER_OPTIONS)
    if unknown:
        raise ParameterError(
            f"The options of magnify_many must be keywords of magnify_raster, got {', '.join(unknown)}"
        )


def _is_current(source: str, output: Path, setup: _Setup, options_tag: str) -> bool:
    """Whether an existing output's tags record this source, these options and models."""
    import rasterio

    try:
        with rasterio.open(output) as ds:
            tags = ds.tags()
    except (rasterio.errors.RasterioError, OSError):
        return False
    if tags.get("GEOSR_OPTIONS") != options_tag:
        return False
    recorded = tags.get("GEOSR_SOURCE_SHA256")
    if recorded is None or recorded != file_sha256(source):
        return False
    if setup.model_shas is None:
        return True
    return set(tags.get("GEOSR_MODEL_SHA256", "").split(",")) <= setup.model_shas


class _OneScheduler:
    """The run's scheduler, with a cluster connection opened on first use and kept to the end."""

    def __init__(self, stack: contextlib.ExitStack, scheduler: Any, workers: int | None) -> None:
        self.stack = stack
        self.spec: SchedulerSpec = resolve_scheduler(scheduler, workers)
        self.opened = self.spec.client is not None or self.spec.kind not in ("local-cluster", "distributed")

    def get(self) -> SchedulerSpec:
        if not self.opened:
            client = self.stack.enter_context(_client_for(self.spec))
            self.spec = dataclasses.replace(self.spec, client=client)
            self.opened = True
        return self.spec


def _one(source: str, output: Path, setup: _Setup, options: dict[str, Any], tag: str,
         scheduler: _OneScheduler) -> BatchItem:
    """Check, skip, refuse or magnify one source; its error recorded, never raised."""
    started = time.monotonic()
    status, error, result = "written", None, None
    try:
        if os.path.lexists(output) and _is_current(source, output, setup, tag):
            status = "skipped"
        elif os.path.lexists(output) and not options.get("overwrite", False):
            raise DestinationError(
                f"The output {os.fspath(output)!r} must not exist, or be an up-to-date output of "
                f"{os.path.basename(source)!r}, got another file; pass overwrite=True (--overwrite) "
                "to replace it"
            )
        else:
            result = magnify_raster(source, output, setup.model, scheduler=scheduler.get(), **options)
    except GeosrError as exc:
        status, error = "failed", str(exc)
    except Exception as exc:  # noqa: BLE001 - one failed file must not stop the others
        status, error = "failed", f"{type(exc).__name__}: {exc}"
    size = output.stat().st_size if status != "failed" else None
    return BatchItem(Path(source), output, status, time.monotonic() - started, size, error, result)


def _output_dir(output_dir: str | os.PathLike[str]) -> Path:
    """The output folder, made when missing."""
    folder = Path(output_dir)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise DestinationError(f"The output folder {os.fspath(folder)!r} must be a folder, got a file") from None
    except OSError as exc:
        raise DestinationError(f"The output folder {os.fspath(folder)!r} must be writable, got: {exc}") from None
    return folder


def magnify_many(
    sources: Iterable[str | os.PathLike[str]],
    output_dir: str | os.PathLike[str],
    model: Any = None,
    *,
    name: str = DEFAULT_NAME,
    progress: ProgressCallback | None = None,
    on_item: Callable[[BatchItem], None] | None = None,
    **options: Any,
) -> list[BatchItem]:
    """Magnify many rasters with one scheduler into ``output_dir``.

    Parameters
    ----------
    sources : iterable of path
        The rasters; an entry ``"@list.txt"`` stands for the paths listed
        in that file (one per line; blank lines and ``#`` lines ignored).
    output_dir : path
        Made when missing.
    model : optional
        As for :func:`magnify_raster`; a model file is loaded once.
    name : str
        Output file name template with the fields ``{stem}`` (the source's
        name without its extension), ``{scale}`` and ``{method}``.
    progress : callable, optional
        ``progress(done, total)`` over files: ``(0, total)`` first, then
        after each file. An exception raised by it (KeyboardInterrupt)
        stops the run; the outputs written so far stay.
    on_item : callable, optional
        Called with each :class:`BatchItem` as soon as its file is done.
    **options
        Keywords of :func:`magnify_raster` (``scale``, ``method``,
        ``overwrite``, ``workers``, ``scheduler``, ``cog``, ...). ``workers``
        and ``scheduler`` are resolved once: a LocalCluster is started once
        for the whole run.

    Returns
    -------
    list of BatchItem
        One per source, in order.

    Raises
    ------
    ParameterError
        Before any file: a bad option, an unknown template field or two
        sources with one output name.
    InputError, ModelError, DestinationError
        Before any file: an unreadable source list or model, an output
        folder that cannot be made. Errors of single files are recorded in
        their items instead.
    """
    _check_options(options)
    paths = read_sources(sources)
    setup = _setup(model, options)
    names = output_names(paths, name, scale=setup.scale, method=setup.method)
    folder = _output_dir(output_dir)
    tag = output_options(**options)
    workers, scheduler = options.pop("workers", None), options.pop("scheduler", None)
    items: list[BatchItem] = []
    with contextlib.ExitStack() as stack:
        shared = _OneScheduler(stack, scheduler, workers)
        if progress is not None:
            progress(0, len(paths))
        for src, out in zip(paths, names):
            item = _one(src, folder / out, setup, options, tag, shared)
            items.append(item)
            if on_item is not None:
                on_item(item)
            if progress is not None:
                progress(len(items), len(paths))
    return items


def summary_table(items: Sequence[BatchItem]) -> list[str]:
    """The lines of a run's summary: a table of file, status, size and seconds, then the counts.

    Returns
    -------
    list of str
        A header line, one line per item (the source's file name), and a
        last line such as ``"18 written, 1 skipped, 1 failed of 20 files"``.
    """
    rows = [("file", "status", "size", "seconds")]
    rows += [
        (item.source.name, item.status, "-" if item.size is None else _human(item.size), f"{item.seconds:.1f}")
        for item in items
    ]
    widths = [max(len(row[k]) for row in rows) for k in range(4)]
    lines = [
        f"{row[0]:<{widths[0]}}  {row[1]:<{widths[1]}}  {row[2]:>{widths[2]}}  {row[3]:>{widths[3]}}".rstrip()
        for row in rows
    ]
    counts = ", ".join(f"{sum(i.status == s for i in items)} {s}" for s in STATUSES)
    lines.append(f"{counts} of {len(items)} file{'s' if len(items) != 1 else ''}")
    return lines
