"""Opening sources, checking destinations, temporaries."""

import os

import numpy as np
import pytest
import rasterio

from geosr.errors import DestinationError, InputError, ParameterError
from geosr.raster.io import (
    TempFiles,
    check_bands,
    check_destination,
    check_free_space,
    inspect_source,
    parse_bands,
    remove_stale_temps,
    temp_path,
)

from helpers import camera, sha256_of


def test_inspect_source_describes_the_landsat_scene(shared_file):
    src = shared_file("rgb-byte-crop.tif")
    info = inspect_source(src)
    # Figures from tests/data/SOURCES.md (a 240 x 240 window of RGB.byte.tif).
    assert (info.width, info.height, info.count) == (240, 240, 3)
    assert info.dtypes == ("uint8",) * 3 and info.nodatavals == (0.0,) * 3
    assert info.crs.to_epsg() == 32618 and info.name == "rgb-byte-crop.tif"
    assert os.path.isabs(info.path)


@pytest.mark.parametrize("case", ["missing", "directory", "empty", "text", "truncated"])
def test_unreadable_sources_are_input_errors(tmp_path, make_raster, case):
    if case == "missing":
        path, msg = tmp_path / "nope.tif", "must exist"
    elif case == "directory":
        path, msg = tmp_path, "must be a file"
    elif case == "empty":
        path, msg = tmp_path / "empty.tif", "empty file"
        path.write_bytes(b"")
    elif case == "text":
        path, msg = tmp_path / "notes.tif", "GDAL can read"
        path.write_text("this is not a raster\n")
    else:
        good = make_raster(camera(64, 64).astype(np.uint8), name="good.tif")
        path, msg = tmp_path / "cut.tif", "damaged or truncated"
        path.write_bytes(good.read_bytes()[:200])
    with pytest.raises(InputError, match=msg):
        inspect_source(path)


def test_truncated_pixel_data_found_before_any_output(make_raster, tmp_path):
    good = make_raster(camera(128, 128).astype(np.uint8), name="good.tif", tiled=True,
                       blockxsize=32, blockysize=32)
    data = good.read_bytes()
    cut = tmp_path / "cut.tif"
    cut.write_bytes(data[: int(len(data) * 0.7)])
    with rasterio.open(cut) as ds:  # the header alone still opens
        assert ds.width == 128
    with pytest.raises(InputError, match="damaged or truncated"):
        inspect_source(cut)


@pytest.mark.parametrize("dtype", ["complex64", "int64", "uint64"])
def test_unsupported_dtypes_refused_by_name(make_raster, dtype):
    src = make_raster(np.ones((8, 8), dtype=dtype))
    with pytest.raises(InputError, match=dtype):
        inspect_source(src)


def test_bands():
    assert parse_bands("1,3-5, 7") == [1, 3, 4, 5, 7]
    assert check_bands(None, 3) == (1, 2, 3)
    assert check_bands("2", 3) == (2,)
    assert check_bands([3, 1], 3) == (3, 1)
    for bad in ([], [0], [4], [1, 1], ["1"], "a,b", "3-1"):
        with pytest.raises(ParameterError, match="bands"):
            check_bands(bad, 3)


def test_destination_equal_to_source_in_every_spelling(make_raster, tmp_path):
    src = make_raster(camera(8, 8).astype(np.uint8))
    link = tmp_path / "link.tif"
    link.symlink_to(src)
    hard = tmp_path / "hard.tif"
    os.link(src, hard)
    rel = os.path.relpath(src)
    for dst in (src, str(src), link, hard, rel, tmp_path / "sub" / ".." / "src.tif"):
        with pytest.raises(DestinationError, match="differ from the source"):
            check_destination(dst, [str(src)], overwrite=True)


def test_destination_checks(tmp_path):
    (tmp_path / "exists.tif").write_bytes(b"x")
    with pytest.raises(DestinationError, match="overwrite"):
        check_destination(tmp_path / "exists.tif")
    assert check_destination(tmp_path / "exists.tif", overwrite=True) == tmp_path / "exists.tif"
    with pytest.raises(DestinationError, match="directory"):
        check_destination(tmp_path, overwrite=True)
    with pytest.raises(DestinationError, match="must exist"):
        check_destination(tmp_path / "no" / "o.tif")
    with pytest.raises(DestinationError, match="local file path"):
        check_destination("/vsimem/o.tif")
    with pytest.raises(ParameterError):
        check_destination(3)


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write into read-only folders")
def test_read_only_folder(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        with pytest.raises(DestinationError, match="writable"):
            check_destination(ro / "o.tif")
    finally:
        ro.chmod(0o755)


def test_free_space_guard(tmp_path):
    check_free_space(tmp_path, 1)
    with pytest.raises(DestinationError, match="free"):
        check_free_space(tmp_path, 2**62)


def test_temp_files_commit_and_cleanup(tmp_path):
    final = tmp_path / "o.tif"
    with TempFiles() as temps:
        t = temps.new(final, ".tif")
        assert t.parent == tmp_path and t.name.startswith(".o.tif.geosr-tmp-")
        t.write_bytes(b"done")
        temps.commit()
    assert final.read_bytes() == b"done" and os.listdir(tmp_path) == ["o.tif"]
    with pytest.raises(RuntimeError):
        with TempFiles() as temps:
            t = temps.new(tmp_path / "p.tif", ".tif")
            t.write_bytes(b"half")
            (tmp_path / (t.name + ".aux.xml")).write_text("<PAMDataset/>")
            raise RuntimeError("boom")
    assert os.listdir(tmp_path) == ["o.tif"]


def test_stale_temporaries_of_dead_runs_only(tmp_path):
    final = tmp_path / "o.tif"
    live = temp_path(final, ".tif")  # this process: alive
    live.write_bytes(b"mine")
    dead = live.with_name(live.name.replace(f"-{os.getpid()}-", "-4194399-"))
    dead.write_bytes(b"old")
    other = tmp_path / ".o.tif.geosr-tmp-otherhost-1-abcd.tif"
    other.write_bytes(b"not ours to judge")
    assert remove_stale_temps(final) == [dead]
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([live.name, other.name])


def test_inspect_never_modifies_the_source(shared_file):
    src = shared_file("rgb-byte-crop.tif")
    before = sha256_of(src), sorted(os.listdir(src.parent))
    inspect_source(src)
    with rasterio.open(src) as ds:
        ds.read(1, window=((0, 10), (0, 10)))
    assert (sha256_of(src), sorted(os.listdir(src.parent))) == before


# --- round 2: band lists against the raster's count
def test_check_bands_names_the_raster_count_before_expanding():
    import time

    from geosr.errors import ParameterError
    from geosr.raster.io import check_bands, parse_bands

    start = time.perf_counter()
    with pytest.raises(ParameterError, match=r"from 1 to 3, got 1000000000; the raster has 3 bands"):
        check_bands("1-1000000000", 3)
    with pytest.raises(ParameterError, match=r"from 1 to 1, got 2; the raster has 1 band$"):
        check_bands((1, 2), 1)
    with pytest.raises(ParameterError, match="from 1 to 65536"):
        parse_bands("1-1000000")
    assert time.perf_counter() - start < 0.5
    assert check_bands("2-3,1", 3) == (2, 3, 1)
    with pytest.raises(ParameterError, match="must not repeat"):
        check_bands("1-3,2", 3)
