"""Opening sources, checking destinations, temporaries."""

import errno
import os
import threading
import zipfile

import numpy as np
import pytest
import rasterio

from geosr.errors import DestinationError, InputError, ParameterError
from geosr.raster.io import (
    TempFiles,
    check_bands,
    check_destination,
    check_free_space,
    dataset_files,
    inspect_source,
    parse_bands,
    publish,
    remove_stale_temps,
    temp_path,
)

from helpers import add_sidecars, camera, sha256_of, write_vrt


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
# ----------------------------------------------- files the run reads (issue 16)
@pytest.fixture
def vrt_source(make_raster, tmp_path):
    """A VRT in its own folder reading a GeoTIFF that has .msk, .ovr and .aux.xml sidecars."""
    member = make_raster(camera(16, 16).astype(np.uint8), name="member.tif")
    sidecars = add_sidecars(member)
    (tmp_path / "v").mkdir()
    vrt = write_vrt(tmp_path / "v" / "mosaic.vrt", member)
    return vrt, member, sidecars


def test_dataset_files_follow_vrt_members_and_sidecars(vrt_source):
    vrt, member, sidecars = vrt_source
    with rasterio.open(vrt) as ds:  # GDAL's own list: the VRT and its member
        assert {os.path.realpath(f) for f in ds.files} == {str(vrt), str(member)}
    files = dataset_files(vrt)
    assert files[0] == str(vrt)
    assert set(files) >= {str(member), *map(str, sidecars)}
    with rasterio.open(member) as ds:  # rasterio lists the sidecars of a GeoTIFF itself
        assert set(map(os.path.abspath, ds.files)) <= set(dataset_files(member))


def test_dataset_files_of_archives_remote_paths_and_non_rasters(tmp_path, make_raster):
    member = make_raster(camera(8, 8).astype(np.uint8))
    with zipfile.ZipFile(tmp_path / "a.zip", "w") as z:
        z.write(member, "in.tif")
    assert dataset_files(f"/vsizip/{tmp_path}/a.zip/in.tif") == [str(tmp_path / "a.zip")]
    assert dataset_files("/vsicurl/https://example.invalid/x.tif") == []
    model = tmp_path / "model.npz"
    model.write_bytes(b"not a raster")
    assert dataset_files(model) == [str(model)]


@pytest.mark.parametrize("which", ["member", ".msk", ".ovr", ".aux.xml", "hard-link", "symlink"])
def test_destination_never_a_file_the_source_reads(vrt_source, tmp_path, which):
    vrt, member, sidecars = vrt_source
    if which == "member":
        dst = member
    elif which == "hard-link":
        dst = tmp_path / "hard.tif"
        os.link(member, dst)
    elif which == "symlink":
        dst = tmp_path / "link.tif"
        dst.symlink_to(sidecars[0])
    else:
        dst = next(p for p in sidecars if str(p).endswith(which))
    before = sha256_of(dst)
    with pytest.raises(DestinationError, match="must differ from every file the run reads"):
        check_destination(dst, [vrt], overwrite=True)
    assert sha256_of(dst) == before


def test_destination_never_a_model_file_or_a_guide(make_raster, tmp_path):
    src = make_raster(camera(8, 8).astype(np.uint8))
    guide = make_raster(camera(16, 16).astype(np.uint8), name="guide.tif")
    add_sidecars(guide)
    model = tmp_path / "m.npz"
    model.write_bytes(b"model")
    with pytest.raises(DestinationError, match="reads"):
        check_destination(model, [src], overwrite=True, reads=[model])
    with pytest.raises(DestinationError, match="the input .*guide.tif.* itself"):
        check_destination(guide, [src, guide], overwrite=True)
    with pytest.raises(DestinationError, match="guide.tif.msk"):
        check_destination(str(guide) + ".msk", [src, guide], overwrite=True)


def test_sidecar_written_beside_the_destination_is_checked_too(make_raster, tmp_path):
    # o.tif's .aux.xml is replaced when o.tif is written: it must not be a file the run reads
    src = make_raster(camera(8, 8).astype(np.uint8))
    (tmp_path / "o.tif.aux.xml").symlink_to(src)
    with pytest.raises(DestinationError, match="sidecar .*o.tif.aux.xml"):
        check_destination(tmp_path / "o.tif", [src], overwrite=True, sidecars=(".aux.xml",))
    (tmp_path / "o.tif.aux.xml").unlink()
    (tmp_path / "o.tif.aux.xml").write_text("<PAMDataset/>")  # an orphan from an earlier file
    with pytest.raises(DestinationError, match="must not have a sidecar yet"):
        check_destination(tmp_path / "o.tif", [src], sidecars=(".aux.xml",))
    assert check_destination(tmp_path / "o.tif", [src], overwrite=True, sidecars=(".aux.xml",))


@pytest.mark.parametrize("dst", ["out/", "out/.", "..", "."])
def test_destination_that_names_a_folder_is_refused(tmp_path, monkeypatch, dst):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(DestinationError, match="must be a file path, got a folder path"):
        check_destination(dst, overwrite=True)
    assert os.listdir(tmp_path) == []


def test_long_file_names(tmp_path):
    # 255 bytes is the NAME_MAX of Linux file systems (limits.h); 250 is legal, 256 is not.
    final = tmp_path / ("é" * 123 + ".tif")  # 250 bytes in UTF-8
    assert len(os.fsencode(final.name)) == 250
    assert check_destination(final) == final
    with pytest.raises(DestinationError, match="at most 255 bytes, got 256"):
        check_destination(tmp_path / ("x" * 252 + ".tif"))
    with TempFiles() as temps:
        tmp = temps.new(final, ".tif")
        assert len(os.fsencode(tmp.name + ".msk.ovr")) <= 255
        tmp.write_bytes(b"done")
        temps.commit()
    assert final.read_bytes() == b"done" and os.listdir(tmp_path) == [final.name]
    dead = temp_path(final, ".tif")  # a dead run's temporary of the same long name
    dead = dead.with_name(dead.name.replace(f"-{os.getpid()}-", "-4194399-"))
    dead.write_bytes(b"old")
    assert remove_stale_temps(final) == [dead]


# ---------------------------------------------- no-clobber publish (issue 16)
def test_publish_refuses_a_destination_that_exists(tmp_path):
    tmp, final = tmp_path / "t", tmp_path / "o.tif"
    tmp.write_bytes(b"new")
    final.write_bytes(b"theirs")
    with pytest.raises(DestinationError, match="appeared while this run was writing"):
        publish(tmp, final)
    assert final.read_bytes() == b"theirs" and tmp.read_bytes() == b"new"
    publish(tmp, final, overwrite=True)
    assert final.read_bytes() == b"new" and not tmp.exists()


@pytest.mark.parametrize("code", [errno.EPERM, errno.EOPNOTSUPP])
def test_publish_without_hard_links_reserves_the_name_exclusively(tmp_path, monkeypatch, code):
    def no_links(src, dst, **kw):
        raise OSError(code, os.strerror(code))

    monkeypatch.setattr(os, "link", no_links)
    tmp, final = tmp_path / "t", tmp_path / "o.tif"
    tmp.write_bytes(b"new")
    publish(tmp, final)
    assert final.read_bytes() == b"new" and os.listdir(tmp_path) == ["o.tif"]
    tmp.write_bytes(b"second")
    with pytest.raises(DestinationError, match="appeared"):
        publish(tmp, final)
    assert final.read_bytes() == b"new"


def test_two_runs_racing_for_one_destination(tmp_path):
    final = tmp_path / "o.tif"
    barrier = threading.Barrier(2)
    outcome = {}

    def run(name):
        try:
            with TempFiles() as temps:
                temps.new(final, ".tif").write_bytes(name.encode() * 1000)
                barrier.wait()
                temps.commit()
            outcome[name] = "won"
        except DestinationError as exc:
            outcome[name] = str(exc)

    threads = [threading.Thread(target=run, args=(n,)) for n in ("a", "b")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    winners = [n for n, v in outcome.items() if v == "won"]
    assert len(winners) == 1, outcome
    loser = "b" if winners == ["a"] else "a"
    assert "must not exist yet" in outcome[loser] and "\n" not in outcome[loser]
    assert final.read_bytes() == winners[0].encode() * 1000  # the winner's file, intact
    assert os.listdir(tmp_path) == ["o.tif"]


def test_commit_takes_back_what_it_placed_when_a_later_file_appeared(tmp_path):
    raster, sidecar = tmp_path / "o.tif", tmp_path / "o.json"
    with pytest.raises(DestinationError):
        with TempFiles() as temps:
            temps.new(raster, ".tif").write_bytes(b"pixels")
            temps.new(sidecar, ".json").write_text("{}")
            sidecar.write_text("someone else's")  # appears before the commit
            temps.commit()
    assert os.listdir(tmp_path) == ["o.json"] and sidecar.read_text() == "someone else's"


def test_temporaries_never_replace_an_existing_file(tmp_path, monkeypatch):
    import secrets

    final = tmp_path / "o.tif"
    taken = temp_path(final, ".tif")
    token = taken.name.split("-")[-1][:8]
    taken.write_bytes(b"not mine")
    tokens = iter([token, "00000000"])
    monkeypatch.setattr(secrets, "token_hex", lambda n: next(tokens))
    with TempFiles() as temps:
        tmp = temps.new(final, ".tif")
    assert tmp != taken and taken.read_bytes() == b"not mine"
