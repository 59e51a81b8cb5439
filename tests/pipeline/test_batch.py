"""magnify_many: many rasters in one run, one scheduler, resumable, failures recorded."""

from __future__ import annotations

import contextlib
import hashlib
import json
import shutil

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.windows import Window

from geosr.errors import DestinationError, InputError, ParameterError
from geosr.pipeline import batch
from geosr.pipeline.batch import (
    BatchItem,
    magnify_many,
    output_names,
    read_sources,
    summary_table,
)
from geosr.pipeline.magnify import magnify_raster

from helpers import TEST_DATA, list_dir, sha256_of

#: The vendored rasters the tiles are cut from (tests/data/SOURCES.md).
TILE_SOURCES = ("rgb-byte-crop.tif", "landsat8-b2-crop.tif", "landsat8-b3-crop.tif", "landsat8-b4-crop.tif")
N_TILES = 20
CORRUPT = "tile-13.tif"


def _cut(src_name, row, col, dst):
    """Write a 32 x 32 crop of a vendored raster, georeferenced as the crop."""
    with rasterio.open(TEST_DATA / src_name) as src:
        window = Window(col, row, 32, 32)
        profile = dict(src.profile, width=32, height=32, transform=src.transform @ Affine.translation(col, row))
        profile.pop("blockxsize", None), profile.pop("blockysize", None), profile.pop("tiled", None)
        with rasterio.open(dst, "w", **profile) as out:
            out.write(src.read(window=window))


@pytest.fixture
def tiles(tmp_path):
    """Twenty 32 x 32 tiles in tmp_path/tiles, one of them a copy of tests/data/corrupt.tif."""
    folder = tmp_path / "tiles"
    folder.mkdir()
    paths = []
    for k in range(N_TILES):
        path = folder / f"tile-{k:02d}.tif"
        if path.name == CORRUPT:
            shutil.copyfile(TEST_DATA / "corrupt.tif", path)
        else:
            _cut(TILE_SOURCES[k % len(TILE_SOURCES)], 32 * (k // 4), 100 + 30 * (k % 4), path)
        paths.append(path)
    return paths


def _tags(path):
    with rasterio.open(path) as ds:
        return ds.tags()


def _same_output(a, b):
    """Pixels, grid and every tag equal, except the creation time."""
    with rasterio.open(a) as da, rasterio.open(b) as db:
        np.testing.assert_array_equal(da.read(), db.read())
        assert da.transform == db.transform and da.crs == db.crs
        ta, tb = da.tags(), db.tags()
        assert ta.pop("GEOSR_CREATED") and tb.pop("GEOSR_CREATED")
        assert ta == tb
        for band in range(1, da.count + 1):
            assert da.tags(band) == db.tags(band)


def test_twenty_tiles_one_corrupt_one_done(tiles, tmp_path, tiny_model):
    out = tmp_path / "out"
    out.mkdir()
    done = magnify_raster(tiles[4], out / "tile-04-x2.tif", tiny_model).dst
    done_bytes = done.read_bytes()
    corrupt_sha = sha256_of(tiles[13])
    items = magnify_many(tiles, out, model=tiny_model)
    assert [i.source for i in items] == tiles
    by_status = {s: [i.source.name for i in items if i.status == s] for s in ("written", "skipped", "failed")}
    assert by_status["skipped"] == ["tile-04.tif"]
    assert by_status["failed"] == [CORRUPT]
    assert len(by_status["written"]) == N_TILES - 2
    assert done.read_bytes() == done_bytes  # the skipped output is left byte for byte
    failed = items[13]
    assert failed.size is None and failed.result is None
    assert "must be readable" in failed.error and "\n" not in failed.error
    assert sha256_of(tiles[13]) == corrupt_sha  # the input is never modified
    for item in items:
        if item.status != "failed":
            assert item.size == item.output.stat().st_size
            assert item.output.name == item.source.stem + "-x2.tif"
    assert sorted(list_dir(out)) == sorted(i.output.name for i in items if i.status != "failed")


def test_output_tags_record_source_sha_and_options(tiles, tmp_path, tiny_model):
    items = magnify_many(tiles[:2], tmp_path / "out", model=tiny_model, ensemble=True, bands="1")
    tags = _tags(items[0].output)
    # The reference: hashlib's own file digest, independent of geosr's streaming reader.
    with open(tiles[0], "rb") as fh:
        assert tags["GEOSR_SOURCE_SHA256"] == hashlib.file_digest(fh, "sha256").hexdigest()
    options = json.loads(tags["GEOSR_OPTIONS"])
    assert options["ensemble"] is True and options["bands"] == ["1"] and options["consistency"] is False
    assert "chunk_size" not in options and "workers" not in options
    assert tags["GEOSR_MODEL_SHA256"] == tiny_model.sha256_


def test_interrupted_run_resumes_to_the_uninterrupted_outputs(tiles, tmp_path, tiny_model):
    whole = magnify_many(tiles, tmp_path / "whole", model=tiny_model)

    def stop_after_seven(done, total):
        if done == 7:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        magnify_many(tiles, tmp_path / "resumed", model=tiny_model, progress=stop_after_seven)
    # Seven files were done when the run stopped; no temporary is left.
    assert list_dir(tmp_path / "resumed") == sorted(f"tile-{k:02d}-x2.tif" for k in range(7))
    resumed = magnify_many(tiles, tmp_path / "resumed", model=tiny_model)
    assert [i.status for i in resumed[:7]] == ["skipped"] * 7
    assert [i.status for i in resumed] == [i.status if k >= 7 else "skipped" for k, i in enumerate(whole)]
    for a, b in zip(whole, resumed):
        if a.status != "failed":
            _same_output(a.output, b.output)


def test_a_different_output_is_refused_unless_overwrite(tiles, tmp_path, tiny_model):
    out = tmp_path / "out"
    first = magnify_many(tiles[:2], out, model=tiny_model, ensemble=True)
    before = [i.output.read_bytes() for i in first]
    refused = magnify_many(tiles[:2], out, model=tiny_model)  # other options than the outputs record
    assert [i.status for i in refused] == ["failed", "failed"]
    assert "must not exist, or be an up-to-date output" in refused[0].error
    assert [i.output.read_bytes() for i in first] == before
    redone = magnify_many(tiles[:2], out, model=tiny_model, overwrite=True)
    assert [i.status for i in redone] == ["written", "written"]
    assert json.loads(_tags(redone[0].output)["GEOSR_OPTIONS"])["ensemble"] is False
    assert [i.status for i in magnify_many(tiles[:2], out, model=tiny_model)] == ["skipped", "skipped"]


def test_a_changed_source_or_model_is_not_up_to_date(tiles, tmp_path, tiny_model, bicubic_model):
    out = tmp_path / "out"
    magnify_many(tiles[:2], out, model=tiny_model)
    with rasterio.open(tiles[0], "r+") as ds:
        ds.write(255 - ds.read())
    other_model = magnify_many(tiles[1:2], out, model=bicubic_model)
    assert [i.status for i in magnify_many(tiles[:1], out, model=tiny_model)] == ["failed"]
    assert other_model[0].status == "failed"


def test_a_file_that_is_not_a_raster_at_the_output_is_refused(tiles, tmp_path, tiny_model):
    out = tmp_path / "out"
    out.mkdir()
    note = out / "tile-00-x2.tif"
    note.write_text("my notes")
    item = magnify_many(tiles[:1], out, model=tiny_model)[0]
    assert item.status == "failed" and note.read_text() == "my notes"


def test_one_scheduler_for_the_whole_run(tiles, tmp_path, tiny_model, monkeypatch):
    """A LocalCluster (workers=N) is opened once, and every file gets that one client."""
    opened, seen = [], []

    @contextlib.contextmanager
    def fake_client(spec):
        opened.append(spec)
        yield f"client-{len(opened)}"

    def record(src, dst, model, *, scheduler, **kwargs):
        seen.append(scheduler)
        return magnify_raster(src, dst, model, **kwargs)

    monkeypatch.setattr(batch, "_client_for", fake_client)
    monkeypatch.setattr(batch, "magnify_raster", record)
    items = magnify_many(tiles[:4], tmp_path / "out", model=tiny_model, workers=3)
    assert [i.status for i in items] == ["written"] * 4
    assert len(opened) == 1 and opened[0].kind == "local-cluster" and opened[0].workers == 3
    assert {s.client for s in seen} == {"client-1"} and len(seen) == 4


def test_no_cluster_is_started_when_every_output_is_up_to_date(tiles, tmp_path, tiny_model, monkeypatch):
    magnify_many(tiles[:2], tmp_path / "out", model=tiny_model)

    def refuse(spec):
        raise AssertionError("a cluster was started")

    monkeypatch.setattr(batch, "_client_for", refuse)
    items = magnify_many(tiles[:2], tmp_path / "out", model=tiny_model, workers=2)
    assert [i.status for i in items] == ["skipped", "skipped"]


@pytest.mark.slow
def test_a_real_local_cluster_serves_every_file(tiles, tmp_path, tiny_model, monkeypatch):
    import distributed

    started = []
    real = distributed.LocalCluster

    def counted(*args, **kwargs):
        started.append(kwargs.get("n_workers"))
        return real(*args, **kwargs)

    monkeypatch.setattr(distributed, "LocalCluster", counted)
    items = magnify_many(tiles[:3], tmp_path / "out", model=tiny_model, workers=1)
    assert [i.status for i in items] == ["written"] * 3 and started == [1]
    assert {i.result.scheduler for i in items} == {"dask.distributed LocalCluster of 1 worker processes"}


# ------------------------------------------------------------ names and lists
def test_output_names_default_and_fields():
    assert output_names(["a/b.tif", "c.jp2"], batch.DEFAULT_NAME, scale=3, method="sparse") == [
        "b-x3.tif", "c-x3.tif"]
    assert output_names(["b.tif"], "{method}_{stem}_{scale}.tif", scale=2, method="anchored") == [
        "anchored_b_2.tif"]


@pytest.mark.parametrize(
    ("template", "message"),
    [
        ("{stem}-{band}.tif", "must use only {stem}, {scale} and {method}, got {band}"),
        ("{0}.tif", "must use only"),
        ("{stem.tif", "must be a valid format string"),
        ("sub/{stem}.tif", "without folders"),
        ("out-x{scale}.tif", "must give every source its own output"),
    ],
)
def test_bad_templates_are_refused_up_front(template, message):
    with pytest.raises(ParameterError, match=message.replace("{", r"\{").replace("}", r"\}")):
        output_names(["a.tif", "b.tif"], template, scale=2, method="anchored")


def test_two_sources_with_one_stem_collide(tiles, tmp_path, tiny_model):
    other = tmp_path / "elsewhere"
    other.mkdir()
    twin = other / tiles[0].name
    shutil.copyfile(tiles[0], twin)
    with pytest.raises(ParameterError, match="'tile-00-x2.tif' for both"):
        magnify_many([tiles[0], twin], tmp_path / "out", model=tiny_model)
    assert not (tmp_path / "out").exists()  # refused before anything is made


def test_scale_field_needs_a_known_scale():
    with pytest.raises(ParameterError, match="'scale' parameter must be given"):
        output_names(["a.tif"], "{stem}-x{scale}.tif", scale=None, method="guided")


def test_read_sources_from_a_list(tmp_path):
    listing = tmp_path / "list.txt"
    listing.write_text("# tiles of the north strip\n\na.tif\n  b.tif  \n#c.tif\n")
    assert read_sources([f"@{listing}", "d.tif"]) == ["a.tif", "b.tif", "d.tif"]
    with pytest.raises(InputError, match="must be a readable text file"):
        read_sources([f"@{tmp_path / 'missing.txt'}"])
    (tmp_path / "empty.txt").write_text("# nothing yet\n")
    with pytest.raises(ParameterError, match="at least one raster"):
        read_sources([f"@{tmp_path / 'empty.txt'}"])


def test_unknown_options_and_a_file_as_output_dir_are_refused(tiles, tmp_path, tiny_model):
    with pytest.raises(ParameterError, match="keywords of magnify_raster, got dst"):
        magnify_many(tiles[:1], tmp_path / "out", model=tiny_model, dst="x.tif")
    blocker = tmp_path / "blocker"
    blocker.write_text("")
    with pytest.raises(DestinationError, match="must be a folder"):
        magnify_many(tiles[:1], blocker, model=tiny_model)


def test_summary_table():
    from pathlib import Path

    items = [
        BatchItem(Path("t/a.tif"), Path("o/a-x2.tif"), "written", 1.25, 2048),
        BatchItem(Path("t/bb.tif"), Path("o/bb-x2.tif"), "skipped", 0.0, 100),
        BatchItem(Path("t/c.tif"), Path("o/c-x2.tif"), "failed", 0.04, None, "broken"),
    ]
    lines = summary_table(items)
    assert lines[0].split() == ["file", "status", "size", "seconds"]
    assert lines[1].split() == ["a.tif", "written", "2.0", "KiB", "1.2"]
    assert lines[2].split() == ["bb.tif", "skipped", "100", "bytes", "0.0"]
    assert lines[3].split() == ["c.tif", "failed", "-", "0.0"]
    assert lines[4] == "1 written, 1 skipped, 1 failed of 3 files"
    # The columns line up: each row's status starts where the header's does.
    assert {line.index(word) for line, word in zip(lines, ["status", "written", "skipped", "failed"])} == {
        lines[0].index("status")}
    assert lines[1].index("a.tif") == 0 and lines[3].index("c.tif") == 0
