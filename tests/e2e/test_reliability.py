"""Every bad input and fault, end to end through the command line.

One table, ``CASES``, lists every case of the reliability issue: how its
input is made, the arguments of ``geosr magnify``, the exit code and a
fragment of the one line the user sees. The README's "Troubleshooting"
table is checked against it (``test_readme_table_matches``). After every
case: no traceback, exactly one error line (or none on success), no
destination for a failure, no temporary left, and the input's sha256
unchanged.

Most cases run in-process with click's CliRunner; the interruptions run the
venv's ``geosr`` console script as a real subprocess and send it real
signals; the killed worker is a real dask.distributed LocalCluster worker.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import json
import os
import re
import resource
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import rasterio
import rasterio.shutil
from affine import Affine
from click.testing import CliRunner
from rasterio.control import GroundControlPoint

from geosr.cli.main import geosr as cli

from helpers import add_sidecars, camera, sha256_of, write_vrt

GEOSR = Path(sys.executable).parent / "geosr"
README = Path(__file__).resolve().parents[2] / "README.md"
TEMP_TAG = ".geosr-tmp-"


# ----------------------------------------------------------------- the inputs
def _write(path, data, **profile):
    data = np.asarray(data)
    if data.ndim == 2:
        data = data[None]
    prof = dict(driver="GTiff", width=data.shape[2], height=data.shape[1], count=data.shape[0],
                dtype=data.dtype.name, crs="EPSG:32618",
                transform=Affine(30.0, 0.0, 500000.0, 0.0, -30.0, 4200000.0))
    prof.update(profile)
    with rasterio.open(path, "w", **prof) as ds:
        ds.write(data)
    return path


def scene(env, rows=40, cols=44, bands=1):
    data = np.stack([camera(rows, cols, 100 + 60 * k, 90) for k in range(bands)]).astype(np.uint8)
    return _write(env.work / "src.tif", data)


def make_missing(env):
    return env.work / "missing.tif"


def make_directory(env):
    d = env.work / "folder.tif"
    d.mkdir()
    return d


def make_empty(env):
    p = env.work / "empty.tif"
    p.write_bytes(b"")
    return p


def make_text(env):
    p = env.work / "notes.tif"
    p.write_text("this is a text file, not a raster\n")
    return p


def make_truncated(env):
    good = _write(env.work / "good.tif", camera(128, 128).astype(np.uint8), tiled=True,
                  blockxsize=32, blockysize=32)
    data = good.read_bytes()
    cut = env.work / "cut.tif"
    cut.write_bytes(data[: int(len(data) * 0.7)])
    good.unlink()
    return cut


def shared(name):
    def make(env):
        return env.shared_file(name)  # conftest's fixture: skips when the folder is absent

    return make


def make_tiny(env):
    return _write(env.work / "tiny.tif", camera(3, 4).astype(np.uint8))  # smaller than a 3x3-window patch's context


def make_one_pixel(env):
    return _write(env.work / "one.tif", np.array([[37]], np.uint8))


def _huge(env, side):
    path = env.work / "huge.tif"
    with rasterio.open(path, "w", driver="GTiff", width=side, height=side, count=1, dtype="uint8",
                       blockysize=1000, sparse_ok=True, crs="EPSG:32618",
                       transform=Affine(10, 0, 0, 0, -10, 0)):
        pass
    assert path.stat().st_size < 200_000  # a tiny file that declares a gigantic raster
    return path


def make_huge(env):
    return _huge(env, 400_000)  # 160 gigapixels; 640 GB at x2


def make_huge_for_disk(env):
    path = _huge(env, 1_000_000)  # 4 TB at x2: more than this disk has free
    if shutil.disk_usage(env.out).free >= 4 * 10**12:
        pytest.skip("the test folder has more than 4 TB free")
    return path


def make_dtype(dtype):
    def make(env):
        return _write(env.work / f"{dtype}.tif", np.ones((8, 8), dtype=dtype))

    return make


def make_nan_inf(env):
    img = camera(30, 30).astype(np.float32)
    img[12, 12], img[3, 20], img[20, 5] = np.inf, -np.inf, np.nan
    return _write(env.work / "naninf.tif", img)


def make_gcp_only(env):
    gcps = [GroundControlPoint(row=0, col=0, x=500000, y=4200000),
            GroundControlPoint(row=0, col=30, x=500900, y=4200100),
            GroundControlPoint(row=25, col=0, x=500050, y=4199250),
            GroundControlPoint(row=25, col=30, x=500950, y=4199350)]
    path = env.work / "gcp.tif"
    data = camera(25, 30).astype(np.uint8)
    with rasterio.open(path, "w", driver="GTiff", width=30, height=25, count=1, dtype="uint8") as ds:
        ds.write(data, 1)
        ds.gcps = (gcps, rasterio.crs.CRS.from_epsg(32618))
    return path


def make_three_bands(env):
    return scene(env, bands=3)


# ------------------------------------------------------------------ the models
def _rewrite_model(env, name, change):
    with np.load(env.model, allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    change(arrays)
    path = env.work / name
    np.savez(path, **arrays)
    return path


def _header_change(fn):
    def change(arrays):
        header = json.loads(str(arrays["header"]))
        fn(header)
        arrays["header"] = np.array(json.dumps(header))

    return change


def model_truncated(env):
    path = env.work / "truncated.npz"
    path.write_bytes(env.model.read_bytes()[:2000])
    return path


def model_tampered(env):
    def change(arrays):
        key = next(k for k in arrays if k.endswith("dictionary_low"))
        arrays[key] = arrays[key].copy()
        arrays[key][0, 0] += 0.5

    return _rewrite_model(env, "tampered.npz", change)


def model_edited(env):
    return _rewrite_model(env, "edited.npz", _header_change(
        lambda h: h["models"][0]["params"].__setitem__("sparsity", 5)))


def model_newer(env):
    return _rewrite_model(env, "newer.npz", _header_change(lambda h: h.__setitem__("format_version", 99)))


def model_pickled(env):
    path = env.work / "pickled.npz"
    np.savez(path, header=np.array([{"format": "geosr-model"}], dtype=object))
    return path


def model_two_bands(env):
    from geosr.modelfile import load_models, save_models

    model = load_models(env.model)[0]
    path = env.work / "two-bands.npz"
    save_models(path, [model, model], band_names=["red", "nir"])
    return path


def config_file(text):
    def make(env):
        path = env.work / "run.toml"
        path.write_text(text)
        return path

    return make


# --- round 2: sources at the edges of GDAL's world
def make_palette(env):
    path = _write(env.work / "classes.tif", (camera(40, 44) // 43).astype(np.uint8))
    with rasterio.open(path, "r+") as ds:
        ds.write_colormap(1, {k: (40 * k, 255 - 40 * k, 7 * k, 255) for k in range(6)})
    return path


def make_one_bit(env):
    return _write(env.work / "bits.tif", (camera(40, 44) > 128).astype(np.uint8), nbits=1)


def make_band_nodata_vrt(env):
    a, b = camera(40, 44).astype(np.uint8), camera(40, 44, 300, 200).astype(np.uint8)
    a[4:9, 5:12], b[15:22, 20:27] = 3, 200
    member = _write(env.work / "member.tif", np.stack([a, b]))
    vrt = env.work / "bands.vrt"
    rasterio.shutil.copy(member, vrt, driver="VRT")
    text = vrt.read_text()
    for band, value in ((1, 3), (2, 200)):
        text = text.replace(f'band="{band}">', f'band="{band}">\n    <NoDataValue>{value}</NoDataValue>', 1)
    vrt.write_text(text)
    return vrt


def make_inf_nodata(env):
    img = camera(40, 44).astype(np.float32)
    img[5:8, 6:10] = -np.inf
    return _write(env.work / "inf.tif", img, nodata=-np.inf)


def make_rpc_only(env):
    from rasterio.rpc import RPC

    z = [0.0] * 20
    line, samp, den = list(z), list(z), list(z)
    line[2], samp[1], den[0] = -1.0, 1.0, 1.0
    rpc = RPC(height_off=0, height_scale=500, lat_off=40.0, lat_scale=0.05, line_den_coeff=den,
              line_num_coeff=line, line_off=20.0, line_scale=20.0, long_off=-75.0, long_scale=0.06,
              samp_den_coeff=den, samp_num_coeff=samp, samp_off=22.0, samp_scale=22.0)
    path = env.work / "rpc.tif"
    with rasterio.open(path, "w", driver="GTiff", width=44, height=40, count=1, dtype="uint8") as ds:
        ds.write(camera(40, 44).astype(np.uint8), 1)
        ds.rpcs = rpc
    return path


def _netcdf(env):
    if "netCDF" not in rasterio.drivers.raster_driver_extensions().values():
        pytest.skip("this GDAL has no netCDF driver")
    tif = _write(env.work / "vars.tif", np.stack([camera(40, 44), camera(40, 44, 300, 200)]).astype(np.float32),
                 crs="EPSG:4326", transform=Affine(0.1, 0, 10, 0, -0.1, 50))
    path = env.work / "vars.nc"
    rasterio.shutil.copy(tif, path, driver="netCDF")
    tif.unlink()
    return path


def make_netcdf_subdataset(env):
    path = _netcdf(env)
    with rasterio.open(path) as ds:
        name = ds.subdatasets[1]  # rasterio's lower-case form: netcdf:/path/vars.nc:Band2
    assert name.startswith("netcdf:")
    return Path(name)


def make_netcdf_container(env):
    return _netcdf(env)


def make_vrt_missing_member(env):
    member = _write(env.work / "member.tif", camera(40, 44).astype(np.uint8))
    vrt = env.work / "stack.vrt"
    rasterio.shutil.copy(member, vrt, driver="VRT")
    member.unlink()
    return vrt


def make_non_utf8_name(env):
    good = scene(env)
    name = Path(os.fsdecode(os.path.join(os.fsencode(env.work), b"caf\xe9.tif")))
    os.rename(good, name)
    return name


def _check_categorical(s, d):
    out = d.read(1)
    assert np.array_equal(out, np.repeat(np.repeat(s.read(1), 2, 0), 2, 1))
    assert d.tags(1)["GEOSR_RESAMPLING"] == "nearest"
    assert {k: d.colormap(1)[k] for k in range(2)} == {k: s.colormap(1)[k] for k in range(2)}


def _check_one_bit(s, d):
    _check_categorical(s, d)
    assert d.tags(1, ns="IMAGE_STRUCTURE")["NBITS"] == "1" and set(np.unique(d.read(1))) == {0, 1}


def _check_band_masks(s, d):
    for band in (1, 2):  # GDAL's own per-band masks, magnified
        assert np.array_equal(d.read_masks(band) > 0, np.repeat(np.repeat(s.read_masks(band) > 0, 2, 0), 2, 1))


def _check_inf_nodata(s, d):
    assert d.nodata == -np.inf
    assert np.array_equal(d.read(1) == -np.inf, np.repeat(np.repeat(np.isinf(s.read(1)), 2, 0), 2, 1))


def _check_rpcs(s, d):
    assert d.transform.is_identity and d.rpcs.line_off == 2 * s.rpcs.line_off + 0.5
    assert d.rpcs.samp_scale == 2 * s.rpcs.samp_scale


def _check_same_crs(s, d):
    assert d.crs == s.crs and np.isfinite(d.read(1)).all()


#: What each round-2 source case checks in its output (see _check_success_output).
SOURCE_CHECKS = {
    "palette-source": _check_categorical,
    "one-bit-source": _check_one_bit,
    "per-band-nodata": _check_band_masks,
    "infinite-nodata": _check_inf_nodata,
    "rpc-only": _check_rpcs,
    "netcdf-subdataset": _check_same_crs,
}


# --- round 2: options, models, STAC sidecar, interruptions with workers
def make_thin(env):
    return _write(env.work / "thin.tif", camera(5, 40).astype(np.uint8))  # 5 rows: under one 6-row patch at x2


def model_fifo(env):
    path = env.work / "pipe.npz"
    os.mkfifo(path)  # opening it for reading would block until a writer comes
    return path


def model_text(env):
    path = env.work / "notes.npz"
    path.write_text("band,weight\n1,0.5\n")
    return path


def make_geostationary(env):
    crs = rasterio.crs.CRS.from_proj4("+proj=geos +h=35785831 +lon_0=0 +sweep=y +a=6378137 +b=6356752.3")
    return _write(env.work / "geos.tif", camera(40, 40).astype(np.uint8), crs=crs,
                  transform=Affine(300000, 0, -6000000, 0, -300000, 6000000))  # corners in space


def make_local_cs(env):
    crs = rasterio.crs.CRS.from_wkt('LOCAL_CS["site grid",UNIT["metre",1]]')
    return _write(env.work / "local.tif", camera(40, 44).astype(np.uint8), crs=crs,
                  transform=Affine(1, 0, 0, 0, -1, 0.5))


def make_global(env):
    return _write(env.work / "global.tif", camera(40, 40).astype(np.uint8), crs="EPSG:4326",
                  transform=Affine(9, 0, -180, 0, -4.5, 90))


def make_antimeridian(env):
    return _write(env.work / "anti.tif", camera(40, 40).astype(np.uint8), crs="EPSG:4326",
                  transform=Affine(0.1, 0, 178, 0, -0.1, 10))


# --- round 2: data loss and destinations
def make_vrt_with_sidecars(env):
    """A VRT reading member.tif, which has .msk, .ovr and .aux.xml sidecars."""
    member = _write(env.work / "member.tif", camera(40, 44).astype(np.uint8))
    add_sidecars(member)
    return write_vrt(env.work / "mosaic.vrt", member)


def make_with_mask_sidecar(env):
    src = scene(env)
    add_sidecars(src)
    return src


def model_copy(env):
    path = env.work / "model.npz"
    shutil.copyfile(env.model, path)
    return path


# ------------------------------------------------------------------- the table
@dataclasses.dataclass(frozen=True)
class Case:
    """One row of the table (and of the README's troubleshooting table)."""

    id: str
    what: str                 # what happened, as the README says it
    make: object              # env -> source path
    args: tuple = ()          # extra arguments; "{model}", "{extra}" are filled in
    code: int = 1             # expected exit code
    message: str = ""         # fragment of the line on stderr
    advice: str = ""          # what to do, as the README says it
    kind: str = "cli"         # how it is driven (see test_case)
    extra: object = None      # env -> path substituted for "{extra}"
    covered_by: str = ""      # an existing test that checks it in more depth


CASES = [
    # ---------------------------------------------------------------- inputs
    Case("missing-source", "SRC does not exist", make_missing, code=1,
         message="must exist, got no such file", advice="Check the path."),
    Case("source-is-directory", "SRC is a folder", make_directory, code=1,
         message="must be a file, got a directory", advice="Name a raster file, not its folder."),
    Case("empty-file", "SRC is an empty file", make_empty, code=1,
         message="got an empty file", advice="Fetch the file again; the download failed."),
    Case("text-file-named-tif", "SRC is a text file named .tif", make_text, code=1,
         message="must be a raster that GDAL can read", advice="Name a raster GDAL can open."),
    Case("truncated-geotiff", "SRC is a GeoTIFF cut short", make_truncated, code=1,
         message="damaged or truncated", advice="Fetch the file again; it is incomplete."),
    Case("corrupt-blocks", "SRC's header opens but its blocks fail to decode (corrupt.tif)",
         shared("corrupt.tif"), ("--chunk", "512"), code=1, message="read error",
         advice="Fetch the file again or repair it with GDAL.",
         covered_by="tests/pipeline/test_pipeline.py::test_corrupt_blocks_give_one_clear_error_and_no_output"),
    Case("smaller-than-patch", "SRC is 3 x 4 pixels, smaller than one patch", make_tiny, code=0,
         message="geosr: wrote", kind="success", advice="Nothing: it is magnified."),
    Case("one-pixel", "SRC is 1 x 1 pixel", make_one_pixel, code=0, message="geosr: wrote",
         kind="success", advice="Nothing: a constant stays constant."),
    Case("enormous-declared-size", "SRC's header declares 400000 x 400000 pixels in a tiny file",
         make_huge, code=1, message="--max-output", kind="memory",
         advice="Check the file; raise --max-output only if that size is intended."),
    Case("output-size-guard", "the output would exceed --max-output", scene,
         ("--max-output", "1K"), code=1, message="must be at most",
         advice="Raise --max-output, or magnify fewer bands."),
    Case("output-size-guard-raised", "the same run with --max-output raised", scene,
         ("--max-output", "1M"), code=0, message="geosr: wrote", kind="success",
         advice="Nothing: the option raises the guard."),
    Case("free-disk-guard", "the destination's disk has less room than the output",
         make_huge_for_disk, ("--max-output", "100T"), code=1, message="free",
         advice="Free some space, write elsewhere, or pass --no-space-check if compression will make it fit."),
    Case("free-disk-guard-skipped", "the same on a small disk with --no-space-check, the compressed output fits",
         None, ("--no-space-check",), code=0, message="geosr: wrote", kind="small-disk",
         advice="Nothing: the option skips the guard."),
    Case("complex-dtype", "SRC has complex pixels", make_dtype("complex64"), code=1,
         message="got complex64 in band 1", advice="Convert to a real pixel type first."),
    Case("int64-dtype", "SRC has 64-bit integer pixels", make_dtype("int64"), code=1,
         message="got int64 in band 1", advice="Convert to int32 or float64 first."),
    Case("all-nodata", "every pixel of SRC is nodata (all-nodata.tif)", shared("all-nodata.tif"),
         ("--chunk", "512"), code=0, message="geosr: warning: The source raster 'all-nodata.tif' has no valid pixel",
         kind="success", advice="Check the scene; the output is all nodata."),
    Case("nan-inf-in-valid-data", "float SRC holds NaN and infinity among valid pixels",
         make_nan_inf, code=0, message="geosr: wrote", kind="success",
         advice="Nothing: those pixels come out as nodata.",
         covered_by="tests/pipeline/test_pipeline.py::test_infinity_inside_valid_float_data"),
    Case("no-crs", "SRC has no CRS (float_nan.tif)", shared("float_nan.tif"), code=0,
         message="geosr: warning: The source raster 'float_nan.tif' has no CRS", kind="success",
         advice="Nothing, or assign a CRS to SRC first."),
    Case("rotated-transform", "SRC has a rotated geotransform (rotated.tif)", shared("rotated.tif"),
         code=0, message="geosr: wrote", kind="success",
         advice="Nothing: the rotation is kept.",
         covered_by="tests/pipeline/test_pipeline.py::test_rotated_transform"),
    Case("gcp-only", "SRC is georeferenced by ground control points only", make_gcp_only, code=0,
         message="geosr: wrote", kind="success", advice="Nothing: the GCP pixel coordinates are scaled.",
         covered_by="tests/pipeline/test_pipeline.py::test_gcp_only_georeferencing_scales_pixel_coordinates"),
    # ------------------------------------------------------------ parameters
    Case("scale-0", "--scale 0", scene, ("--scale", "0"), code=2, message="integer from 2 to 8",
         advice="Use a scale from 2 to 8."),
    Case("scale-1", "--scale 1", scene, ("--scale", "1"), code=2, message="integer from 2 to 8",
         advice="Use a scale from 2 to 8."),
    Case("scale-negative", "--scale -3", scene, ("--scale", "-3"), code=2,
         message="integer from 2 to 8", advice="Use a scale from 2 to 8."),
    Case("scale-non-integer", "--scale 2.5", scene, ("--scale", "2.5"), code=2,
         message="integer from 2 to 8", advice="Use a scale from 2 to 8."),
    Case("scale-absurd", "--scale 1000000", scene, ("--scale", "1000000"), code=2,
         message="integer from 2 to 8", advice="Use a scale from 2 to 8."),
    Case("model-other-scale", "--model is an x2 model and --scale 3 is asked", scene,
         ("--model", "{model}", "--scale", "3"), code=1, message="got a model for scale 2",
         advice="Use a model trained for that scale (geosr train)."),
    Case("model-other-band-count", "--model holds 2 per-band models, SRC has 3 bands",
         make_three_bands, ("--model", "{extra}"), code=1, message="one per magnified band",
         extra=model_two_bands, advice="Select as many bands with --bands, or use a shared model."),
    Case("model-truncated", "--model is a cut-short file", scene, ("--model", "{extra}"), code=1,
         message="unreadable file", extra=model_truncated, advice="Copy the model file again."),
    Case("model-tampered", "--model's arrays were changed", scene, ("--model", "{extra}"), code=1,
         message="checksum", extra=model_tampered, advice="Use the original model file."),
    Case("model-hand-edited", "--model's header was edited by hand", scene, ("--model", "{extra}"),
         code=1, message="checksum", extra=model_edited, advice="Use the original model file."),
    Case("model-pickled", "--model holds a pickled object (never unpickled)", scene,
         ("--model", "{extra}"), code=1, message="unreadable file", extra=model_pickled,
         advice="Use a model file written by geosr train."),
    Case("model-newer-format", "--model was written in a newer format version", scene,
         ("--model", "{extra}"), code=1, message="format version", extra=model_newer,
         advice="Upgrade geosr."),
    Case("config-unknown-key", "--config has an unknown key", scene, ("--config", "{extra}"),
         code=2, message="frobnicate", extra=config_file("scale = 2\nfrobnicate = 1\n"),
         advice="Fix the key; keys are the option names."),
    Case("config-wrong-type", "--config has a value of the wrong type", scene,
         ("--config", "{extra}"), code=2, message="chunk", extra=config_file('scale = 2\nchunk = "big"\n'),
         advice="Fix the value's type."),
    Case("co-malformed", "--co is not KEY=VALUE", scene, ("--co", "COMPRESS"), code=2,
         message="KEY=VALUE", advice="Write --co KEY=VALUE, e.g. --co COMPRESS=ZSTD."),
    Case("co-unknown-value", "--co names a value GDAL does not know", scene,
         ("--co", "COMPRESS=NOPE"), code=2, message="creation_options",
         advice="Use a creation option of GDAL's GTiff driver."),
    # ----------------------------------------------------------- destination
    Case("dst-is-src", "DST is SRC", scene, code=1, message="must differ from the source",
         kind="dst-same", advice="Name another output file."),
    Case("dst-symlink-to-src", "DST is a symbolic link to SRC", scene, ("--overwrite",), code=1,
         message="must differ from the source", kind="dst-link", advice="Name another output file."),
    Case("dst-relative-to-src", "DST is SRC spelled as a relative path", scene, ("--overwrite",),
         code=1, message="must differ from the source", kind="dst-relative",
         advice="Name another output file."),
    Case("dst-exists", "DST exists and --overwrite is not given", scene, code=1,
         message="must not exist yet", kind="dst-exists", advice="Pass --overwrite or name another file."),
    Case("dst-folder-missing", "DST's folder does not exist", scene, code=1,
         message="got no such folder", kind="dst-missing-folder", advice="Create the folder first."),
    Case("dst-folder-read-only", "DST's folder is read-only", scene, code=1,
         message="must be writable", kind="dst-read-only", advice="Write to a folder you can write."),
    Case("disk-full-mid-write", "the disk fills up while DST is written", scene, code=1,
         message="No space left", kind="disk-full", advice="Free some space and run again."),
    # --------------------------------------------------------- interruptions
    Case("sigint", "Ctrl-C (SIGINT) mid-run", scene, code=130, message="interrupted",
         kind="signal", advice="Run again; nothing was left behind."),
    Case("sigterm", "SIGTERM mid-run", scene, code=143, message="terminated", kind="signal",
         advice="Run again; nothing was left behind."),
    Case("sigkill", "SIGKILL mid-run, then the same run again", scene, code=0,
         message="geosr: wrote", kind="sigkill",
         advice="Run again: the next run removes the dead run's temporary."),
    Case("worker-killed", "a dask.distributed worker process dies mid-run", scene, code=0,
         message="geosr: wrote", kind="worker-killed",
         advice="Nothing: its tasks are retried; the output equals an undisturbed run."),
    # --- round 2: sources at the edges of GDAL's world
    Case("palette-source", "SRC is a palette (colour-table) raster", make_palette, code=0,
         message="geosr: warning: The source raster 'classes.tif' has categorical band 1", kind="success",
         advice="Nothing: its classes are magnified by nearest neighbour and its colour table is kept.",
         covered_by="tests/pipeline/test_pipeline_sources.py::test_palette_band_keeps_its_classes_and_colour_table"),
    Case("one-bit-source", "SRC is 1-bit (NBITS=1)", make_one_bit, code=0,
         message="geosr: warning: The source raster 'bits.tif' has categorical band 1", kind="success",
         advice="Nothing: it is magnified by nearest neighbour and stays 1-bit (values 0 and 1).",
         covered_by="tests/pipeline/test_pipeline_sources.py::test_one_bit_source_stays_one_bit"),
    Case("per-band-nodata", "SRC's bands have different nodata values (a VRT)", make_band_nodata_vrt,
         code=0, message="geosr: wrote", kind="success",
         advice="Nothing: each band keeps its own invalid pixels, under one nodata value (the first band's; NaN for floats).",
         covered_by="tests/pipeline/test_pipeline_sources.py::test_per_band_nodata_keeps_per_band_validity"),
    Case("infinite-nodata", "SRC's nodata value is -inf", make_inf_nodata, code=0,
         message="geosr: wrote", kind="success", advice="Nothing: the output's nodata is -inf too.",
         covered_by="tests/pipeline/test_pipeline_sources.py::test_infinite_nodata_reaches_the_output"),
    Case("rpc-only", "SRC is georeferenced by RPCs only", make_rpc_only, code=0,
         message="geosr: wrote", kind="success",
         advice="Nothing: the RPC line and sample offsets and scales are scaled to the new grid.",
         covered_by="tests/pipeline/test_pipeline_sources.py::test_rpc_only_source_keeps_its_georeferencing"),
    Case("netcdf-subdataset", "SRC is a netCDF variable named as rasterio lists it (netcdf:file.nc:var)",
         make_netcdf_subdataset, code=0, message="geosr: wrote", kind="success",
         advice="Nothing: the subdataset is opened."),
    Case("netcdf-container", "SRC is a netCDF file of several variables", make_netcdf_container, code=1,
         message="name one of them as the source: netcdf:",
         advice="Name one of the listed subdatasets as SRC."),
    Case("vrt-missing-member", "SRC is a VRT whose member file is missing", make_vrt_missing_member,
         code=1, message="got a missing file", advice="Restore the named file, or fix the VRT's path to it."),
    Case("non-utf8-name", "SRC's name has bytes that are not UTF-8 (caf\\xe9.tif)", make_non_utf8_name,
         code=1, message="must have a name GDAL can open (valid UTF-8)",
         advice="Rename the file, or link to it under a UTF-8 name."),
    # --- round 2: options, models, STAC sidecar, interruptions with workers
    Case("bands-huge-range", "--bands 1-1000000", scene, ("--bands", "1-1000000"), code=2,
         message="from 1 to 65536", advice="Name bands that exist; see gdalinfo for the count."),
    Case("bands-beyond-count", "--bands names a band SRC does not have", scene, ("--bands", "1-3"),
         code=2, message="got 2; the raster has 1 band", advice="Name bands from 1 to SRC's band count."),
    Case("model-named-pipe", "--model is a named pipe", scene, ("--model", "{extra}"), code=1,
         message="must be a regular file, got a named pipe", extra=model_fifo,
         advice="Give the model file itself."),
    Case("model-text-named-npz", "--model is a text file named .npz", scene, ("--model", "{extra}"),
         code=1, message="not an .npz (zip) archive", extra=model_text,
         advice="Use a model file written by geosr train."),
    Case("self-train-too-small", "--self-train on a SRC smaller than one training patch", make_thin,
         ("--self-train", "--scale", "2"), code=1, message="at least 6 x 6 pixels",
         advice="Train on a larger reference (geosr train) and pass --model."),
    Case("co-refused-with-reason", "--co value the format cannot take (WEBP on 1 band)", scene,
         ("--co", "COMPRESS=WEBP"), code=2, message="Must be 3 (RGB) or 4 (RGBA) bands",
         advice="Use a value GDAL's reason allows."),
    Case("cog-overview-resampling", "--cog with --co OVERVIEW_RESAMPLING=FOO", scene,
         ("--cog", "--co", "OVERVIEW_RESAMPLING=FOO"), code=2, message="Unsupported resampling method",
         advice="Use a resampling GDAL knows (NEAREST, AVERAGE, ...)."),
    Case("cog-blocksize", "--cog with --co BLOCKSIZE=17", scene, ("--cog", "--co", "BLOCKSIZE=17"),
         code=2, message="BLOCKSIZE a multiple of 16 from 128 to 4096",
         advice="Use a tile side such as 256 or 512."),
    Case("stac-geostationary", "--stac on a geostationary full disk (corners in space)",
         make_geostationary, ("--stac",), code=0, message="geosr: wrote", kind="stac",
         advice="Nothing: the footprint covers the part on the earth."),
    Case("stac-engineering-crs", "--stac on an engineering (LOCAL_CS) CRS", make_local_cs,
         ("--stac",), code=0, message="geosr: warning: The STAC sidecar has a null geometry",
         kind="stac", advice="Nothing: the raster and the sidecar are written, without a footprint."),
    Case("stac-global", "--stac on a global raster, -180 to 180", make_global, ("--stac",), code=0,
         message="geosr: wrote", kind="stac", advice="Nothing: the bbox is -180 to 180."),
    Case("stac-antimeridian", "--stac on a raster crossing the antimeridian", make_antimeridian,
         ("--stac",), code=0, message="geosr: wrote", kind="stac",
         advice="Nothing: the footprint is cut at 180 and the bbox has west > east (RFC 7946)."),
    Case("stac-gcp-only", "--stac on a GCP-only SRC", make_gcp_only, ("--stac",), code=0,
         message="geosr: wrote", kind="stac", advice="Nothing: the footprint follows the GCPs."),
    Case("sigint-group-workers", "Ctrl-C in a terminal during --workers 2", scene,
         ("--workers", "2"), code=130, message="interrupted", kind="group-signal",
         advice="Run again; nothing was left behind."),
    Case("sigint-group-processes", "Ctrl-C in a terminal during --scheduler processes", scene,
         ("--scheduler", "processes", "--workers", "2"), code=130, message="interrupted",
         kind="group-signal", advice="Run again; nothing was left behind."),
    Case("sigterm-workers", "SIGTERM during --workers 2", scene, ("--workers", "2"), code=143,
         message="terminated", kind="group-signal", advice="Run again; nothing was left behind."),
    # --- round 2: data loss and destinations
    Case("dst-vrt-member", "DST is the file a VRT source reads its pixels from", make_vrt_with_sidecars,
         ("--overwrite",), code=1, message="must differ from every file the run reads", kind="dst-read",
         advice="Name another output file; the source's own files are never written."),
    Case("dst-mask-sidecar", "DST is the source's .msk mask sidecar", make_with_mask_sidecar,
         ("--overwrite",), code=1, message="must differ from every file the run reads", kind="dst-read",
         advice="Name another output file; the source's own files are never written."),
    Case("dst-overview-sidecar", "DST is a hard link to the .ovr overviews of a VRT member",
         make_vrt_with_sidecars, ("--overwrite",), code=1, message="must differ from every file the run reads",
         kind="dst-read", advice="Name another output file; links are resolved before comparing."),
    Case("dst-model-file", "DST is the --model file", scene, ("--model", "{extra}", "--overwrite"), code=1,
         message="must differ from every file the run reads", kind="dst-read", extra=model_copy,
         advice="Name another output file."),
    Case("dst-race", "two runs write the same DST at once, neither with --overwrite", None, code=1,
         message="appeared while this run was writing", kind="race",
         advice="Nothing is lost: the first run's file stands; pass --overwrite to replace it."),
    Case("dst-trailing-slash", "DST ends in '/'", scene, code=1, message="got a folder path",
         kind="dst-slash", advice="Name a file: magnify writes one raster."),
    Case("dst-existing-folder", "DST is an existing folder", scene, ("--overwrite",), code=1,
         message="must be a file path, got a directory", kind="dst-folder", advice="Name a file inside it."),
    Case("dst-long-name", "DST's file name is 250 bytes long", scene, code=0, message="geosr: wrote",
         kind="long-name", advice="Nothing: the temporary's name is shortened."),
    Case("dst-name-too-long", "DST's file name is longer than 255 bytes", scene, code=1,
         message="must have a file name of at most 255 bytes", kind="too-long",
         advice="Use a shorter name."),
    Case("stac-is-dst", "--stac with a DST ending in .json", scene, ("--stac",), code=1,
         message="STAC sidecar", kind="stac-json", advice="Give DST a raster extension such as .tif."),
    Case("dst-stale-aux", "DST's .aux.xml sidecar is left over from an earlier file", scene, code=1,
         message="must not have a sidecar yet", kind="stale-aux",
         advice="Remove the old .aux.xml, or pass --overwrite."),
]


# ------------------------------------------------------------------ machinery
@dataclasses.dataclass
class Env:
    work: Path    # where inputs live
    out: Path     # the destination folder
    model: Path   # the tiny x2 model file
    shared_file: object  # conftest's shared_file fixture


@pytest.fixture(scope="module")
def model_path(tmp_path_factory, tiny_model):
    path = tmp_path_factory.mktemp("reliability-model") / "tiny-x2.npz"
    tiny_model.save(path)
    return path


@pytest.fixture
def env(tmp_path, model_path, shared_file):
    work, out = tmp_path / "in", tmp_path / "out"
    work.mkdir()
    out.mkdir()
    return Env(work, out, model_path, shared_file)


def _fill(args, env, case):
    extra = case.extra(env) if case.extra else None
    out = []
    for a in args:
        a = a.replace("{model}", str(env.model))
        if "{extra}" in a:
            a = a.replace("{extra}", str(extra))
        out.append(a)
    if "--model" not in out and "--scale" not in out and "--config" not in out:
        out += ["--model", str(env.model)]
    return out


def _digest(path):
    """sha256 of a file, or of every file below a folder, or None when absent."""
    path = Path(path)
    if path.is_file():
        return sha256_of(path)
    if path.is_dir():
        return {str(p.relative_to(path)): sha256_of(p) for p in sorted(path.rglob("*")) if p.is_file()}
    return None


def _temps(folder):
    return [n for n in os.listdir(folder) if TEMP_TAG in n]


#: Lines the TIFF library that rasterio bundles prints straight to the
#: process's stderr (not through GDAL's or Python's error handlers) when a
#: write fails; geosr cannot intercept them. Known limitation, disk-full only.
LIBTIFF_LINE = re.compile(r"^_tiff\w+Proc: ")


def check_stderr(stderr, case):
    """No traceback; one error line carrying the fragment, or none on success."""
    assert "Traceback" not in stderr, stderr
    lines = [ln for ln in stderr.strip().splitlines() if ln.strip()]
    if case.kind == "disk-full":
        lines = [ln for ln in lines if not LIBTIFF_LINE.match(ln)]
    errors = [ln for ln in lines if ln.startswith("geosr: error: ")]
    other = [ln for ln in lines if not ln.startswith(("geosr: error: ", "geosr: warning: ",
                                                      "geosr: wrote", "magnify: "))]
    assert not other, lines
    if case.code == 0:
        assert errors == [], errors
    else:
        assert len(errors) == 1, lines
        assert case.message in errors[0], (case.message, errors[0])


def check_message(stdout, stderr, case):
    if case.code == 0:
        assert case.message in stdout + stderr, (case.message, stdout, stderr)


def run_cli(args):
    result = CliRunner().invoke(cli, [str(a) for a in args])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result.exit_code, result.stdout, result.stderr


# ----------------------------------------------------------- mounts (as root)
@contextlib.contextmanager
def tmpfs(where, options):
    """A tmpfs mounted at ``where``; yields False when mounting is not permitted."""
    where.mkdir(exist_ok=True)
    if os.geteuid() != 0 or shutil.which("mount") is None:
        yield False
        return
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(where)],
                          capture_output=True)
    if done.returncode != 0:
        yield False
        return
    try:
        yield True
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


@contextlib.contextmanager
def read_only_folder(where):
    """A folder even root cannot write: a read-only tmpfs, else chattr +i, else skip."""
    with tmpfs(where, "ro,size=1m") as mounted:
        if mounted:
            yield where
            return
        where.mkdir(exist_ok=True)
        done = subprocess.run(["chattr", "+i", str(where)], capture_output=True) \
            if shutil.which("chattr") else None
        if done is None or done.returncode != 0:
            pytest.skip("no way to make a folder read-only for root (no mount, no chattr)")
        try:
            yield where
        finally:
            subprocess.run(["chattr", "-i", str(where)], capture_output=True)


# ------------------------------------------------------------- subprocesses
class Run:
    """The venv's geosr console script in a subprocess, stderr read line by line."""

    def __init__(self, args, cwd=None, session=False):
        # session: a process group of its own, as a terminal's foreground job
        self.proc = subprocess.Popen([str(GEOSR), *map(str, args)], stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True, cwd=cwd,
                                     start_new_session=session)
        self.lines = []
        self.progressed = threading.Event()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        for line in self.proc.stderr:
            self.lines.append(line)
            m = re.match(r"magnify: (\d+)/", line)
            if m and int(m.group(1)) > 0:
                self.progressed.set()

    def wait_for_progress(self, timeout=120):
        assert self.progressed.wait(timeout), "".join(self.lines)
        assert self.proc.poll() is None, "the run finished before it could be disturbed"

    def finish(self, timeout=120):
        try:
            stdout = self.proc.stdout.read()
            self.proc.wait(timeout=timeout)
        finally:
            if self.proc.poll() is None:
                self.proc.kill()
                self.proc.wait()
        self.reader.join(timeout=10)
        return self.proc.returncode, stdout, "".join(self.lines)


def slow_args(src, dst, env):
    """Many small blocks with the 8-fold ensemble: a run of many seconds on a small raster."""
    return ["magnify", src, dst, "--model", env.model, "--chunk", "16", "--ensemble"]


def _big_scene(env, rows=240, cols=240):
    return _write(env.work / "src.tif", camera(rows, cols).astype(np.uint8))


# ------------------------------------------------------------------ the test
#: Cases that run the console script for many seconds (still run by make test).
SLOW_KINDS = ("signal", "sigkill", "worker-killed", "disk-full", "group-signal", "race")


@pytest.mark.parametrize("case", [
    pytest.param(c, id=c.id, marks=[pytest.mark.slow] if c.kind in SLOW_KINDS else [])
    for c in CASES
])
def test_case(case, env, monkeypatch):
    kind = case.kind
    if kind == "small-disk":
        return _small_disk(case, env, _fill(case.args, env, case))
    if kind in ("signal", "sigkill", "worker-killed", "group-signal"):
        pytest.importorskip("distributed")
        return _interruption(case, env)
    if kind in ROUND2_KINDS:
        return _round2(case, env, monkeypatch)
    src = case.make(env)
    dst = env.out / "o.tif"
    args = _fill(case.args, env, case)
    folder = env.out
    before_src = _digest(src)
    preexisting = None
    if kind == "dst-same":
        dst = src
    elif kind == "dst-link":
        dst = env.out / "link.tif"
        dst.symlink_to(src)
    elif kind == "dst-relative":
        sub = env.work / "sub"
        sub.mkdir()
        monkeypatch.chdir(sub)
        dst = Path("..") / src.name
    elif kind == "dst-exists":
        dst.write_bytes(b"an earlier product")
        preexisting = sha256_of(dst)
    elif kind == "dst-missing-folder":
        dst = env.out / "missing" / "o.tif"
    elif kind == "dst-read-only":
        return _read_only(case, env, src, args, before_src)
    elif kind == "disk-full":
        return _disk_full(case, env, src, args, before_src, monkeypatch)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    code, stdout, stderr = run_cli(["magnify", src, dst, *args])
    if kind == "memory":
        # refused before any large allocation: the high-water mark of this
        # process did not move by a strip of the declared raster (400 MB)
        assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak < 100 * 1024
    assert code == case.code, (code, stderr)
    check_stderr(stderr, case)
    check_message(stdout, stderr, case)
    assert _digest(src) == before_src
    if kind in ("dst-same", "dst-link", "dst-relative"):
        assert os.path.exists(dst)  # still the source, untouched
    elif kind == "dst-exists":
        assert sha256_of(dst) == preexisting
        assert os.listdir(folder) == ["o.tif"]
    elif kind == "success":
        assert os.listdir(folder) == ["o.tif"]
        _check_success_output(src, dst, case)
    elif kind == "stac":
        assert sorted(os.listdir(folder)) == ["o.json", "o.tif"]
        _check_stac_sidecar(folder / "o.json", case)
    else:
        assert os.listdir(folder) == [], os.listdir(folder)
    assert _temps(folder) == [] and _temps(src.parent if src.parent.exists() else folder) == []


def _check_success_output(src, dst, case):
    with rasterio.open(src) as s, rasterio.open(dst) as d:
        assert (d.width, d.height, d.count) == (2 * s.width, 2 * s.height, s.count)
        assert d.tags()["GEOSR_SYNTHESIZED"] == "yes"
        if case.id == "gcp-only":
            assert [(g.row, g.col) for g in d.gcps[0]] == [(2 * g.row, 2 * g.col) for g in s.gcps[0]]
        elif case.id in ("nan-inf-in-valid-data", "no-crs"):
            a, b = s.read(1), d.read(1)
            assert np.array_equal(np.isnan(b), np.repeat(np.repeat(~np.isfinite(a), 2, 0), 2, 1))
        elif case.id == "one-pixel":
            assert (d.read() == 37).all()
        elif case.id in SOURCE_CHECKS:
            SOURCE_CHECKS[case.id](s, d)
        else:
            assert d.transform.almost_equals(s.transform @ Affine.scale(0.5))


def _read_only(case, env, src, args, before_src):
    with read_only_folder(env.out / "ro") as ro:
        code, _, stderr = run_cli(["magnify", src, ro / "o.tif", "--quiet", *args])
        assert os.listdir(ro) == []
    assert code == case.code, stderr
    check_stderr(stderr, case)
    assert _digest(src) == before_src


def _small_disk(case, env, args):
    """A 256 KiB disk, a flat 512 x 512 scene: 1 MiB uncompressed at x2, a few KiB deflated."""
    src = _write(env.work / "flat.tif", np.full((512, 512), 90, np.uint8))
    before_src = _digest(src)
    folder = env.out / "small"
    with tmpfs(folder, "size=256k") as mounted:
        if not mounted:
            pytest.skip("mounting a small tmpfs is not permitted here")
        code, _, stderr = run_cli(["magnify", src, folder / "o.tif", "--quiet", "--model", env.model])
        assert code == 1 and "free" in stderr and os.listdir(folder) == []  # the guard refuses
        code, stdout, stderr = run_cli(["magnify", src, folder / "o.tif", *args])
        assert code == case.code, stderr
        check_stderr(stderr, case)
        check_message(stdout, stderr, case)
        assert os.listdir(folder) == ["o.tif"]
        with rasterio.open(folder / "o.tif") as d:
            assert (d.width, d.height) == (1024, 1024) and (d.read() == 90).all()
    assert _digest(src) == before_src


def _disk_full(case, env, src, args, before_src, monkeypatch):
    src = _big_scene(env)
    before_src = _digest(src)
    with tmpfs(env.out / "small", "size=4m") as mounted:
        folder = env.out / "small"
        if mounted:
            # the guard passes (800 x 800 x 1 byte fits), then another writer fills the disk
            run = Run([*slow_args(src, folder / "o.tif", env)])
            run.wait_for_progress()
            filler = folder / "filler.bin"
            with contextlib.suppress(OSError), open(filler, "wb") as fh:
                while True:
                    fh.write(b"\0" * 65536)
                    fh.flush()
            code, stdout, stderr = run.finish()
            filler.unlink()
            assert os.listdir(folder) == [], os.listdir(folder)
        else:
            # no mount allowed: the error is injected where the block is written
            from geosr.raster import writing

            real = writing.OutputRaster.write
            calls = {"n": 0}

            def failing(self, result):
                calls["n"] += 1
                if calls["n"] == 3:
                    raise writing._destination_error(self.path, OSError(errno.ENOSPC, "No space left on device"))
                return real(self, result)

            monkeypatch.setattr(writing.OutputRaster, "write", failing)
            folder = env.out
            code, stdout, stderr = run_cli(["magnify", src, folder / "o.tif", "--quiet",
                                            "--chunk", "16", *args])
            assert os.listdir(folder) == []
    assert code == case.code, stderr
    check_stderr(stderr, case)
    assert _digest(src) == before_src


def _interruption(case, env):
    src = _big_scene(env)
    before_src = _digest(src)
    dst = env.out / "o.tif"
    if case.kind == "signal":
        run = Run(slow_args(src, dst, env))
        run.wait_for_progress()
        assert _temps(env.out), "the run had no temporary open"
        run.proc.send_signal(signal.SIGINT if case.id == "sigint" else signal.SIGTERM)
        code, stdout, stderr = run.finish()
        assert code == case.code, stderr
        check_stderr(stderr, case)
        assert os.listdir(env.out) == []
    elif case.kind == "sigkill":
        run = Run(slow_args(src, dst, env))
        run.wait_for_progress()
        run.proc.send_signal(signal.SIGKILL)
        code, _, stderr = run.finish()
        assert code == -signal.SIGKILL
        stale = _temps(env.out)
        assert not dst.exists() and stale, os.listdir(env.out)  # only the dead run's temporary
        code, stdout, stderr = run_cli(["magnify", src, dst, "--model", env.model,
                                        "--chunk", "64"])
        assert code == case.code, stderr
        check_stderr(stderr, case)
        check_message(stdout, stderr, case)
        assert os.listdir(env.out) == ["o.tif"]  # the stale temporary was recognised and removed
    elif case.kind == "group-signal":
        _group_signal(case, env, src, dst)
    else:
        _worker_killed(case, env, src, dst)
    assert _digest(src) == before_src


def _group_signal(case, env, src, dst):
    """Ctrl-C in a terminal: SIGINT to the whole process group, workers included."""
    run = Run([*slow_args(src, dst, env), *case.args], session=True)
    run.wait_for_progress(timeout=300)
    if case.id.startswith("sigterm"):
        run.proc.send_signal(signal.SIGTERM)  # to geosr only, as a service manager does
    else:
        os.killpg(run.proc.pid, signal.SIGINT)
    code, stdout, stderr = run.finish(timeout=300)
    assert code == case.code, stderr
    check_stderr(stderr, case)  # exactly one line, no worker's traceback
    assert [ln for ln in stderr.splitlines() if not ln.startswith("magnify: ")] == [
        f"geosr: error: {case.message}"], stderr
    assert os.listdir(env.out) == []


def _check_stac_sidecar(path, case):
    """Strict JSON; RFC 7946: bbox [west, south, east, north], south <= north, west > east
    only across the antimeridian (5.2), the geometry cut there (3.1.9), rings closed."""
    def no_constant(name):
        raise AssertionError(f"{name} in the sidecar")

    item = json.loads(path.read_text(), parse_constant=no_constant)
    if case.id == "stac-engineering-crs":
        assert item["geometry"] is None and "bbox" not in item
        return
    west, south, east, north = item["bbox"]
    assert -180 <= min(west, east) and max(west, east) <= 180 and -90 <= south <= north <= 90
    geom = item["geometry"]
    polys = [geom["coordinates"]] if geom["type"] == "Polygon" else geom["coordinates"]
    assert all(p[0][0] == p[0][-1] for p in polys)
    assert all(-180 <= x <= 180 and -90 <= y <= 90 for p in polys for x, y in p[0])
    if case.id == "stac-global":
        assert (west, east) == (-180, 180)
    elif case.id == "stac-antimeridian":
        assert west > east and geom["type"] == "MultiPolygon"
        assert (west, east) == (pytest.approx(178), pytest.approx(-178))
    elif case.id == "stac-gcp-only":
        # the GCPs are at UTM 18N 500000..500950 E, 4199250..4200100 N: about 75 W, 37.9 N
        assert -75.01 < west < east < -74.98 and 37.92 < south < north < 37.95
    else:
        assert west < east


def _worker_killed(case, env, src, dst):
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        client.wait_for_workers(2, timeout=120)
        address = cluster.scheduler_address
        args = ["--scheduler", address, "--chunk", "16"]
        quiet = Run(["magnify", src, env.out / "calm.tif", "--model", env.model, *args])
        code, _, stderr = quiet.finish(timeout=300)
        assert code == 0, stderr
        run = Run(["magnify", src, dst, "--model", env.model, *args])
        run.wait_for_progress(timeout=300)  # at least one task has finished
        pids = client.run(os.getpid)
        victim = sorted(pids.values())[0]
        os.kill(victim, signal.SIGKILL)
        code, stdout, stderr = run.finish(timeout=300)
        assert code == case.code, stderr
        check_stderr(stderr, case)
        check_message(stdout, stderr, case)
        # the worker really died (its nanny started a new process)
        deadline = time.monotonic() + 60
        while victim in client.run(os.getpid).values() and time.monotonic() < deadline:
            time.sleep(0.5)
        assert victim not in client.run(os.getpid).values()
    with rasterio.open(env.out / "calm.tif") as a, rasterio.open(dst) as b:
        assert a.read().tobytes() == b.read().tobytes()
        assert a.profile == b.profile
    assert sorted(os.listdir(env.out)) == ["calm.tif", "o.tif"]


# --- round 2: data loss and destinations
ROUND2_KINDS = ("dst-read", "race", "dst-slash", "dst-folder", "long-name", "too-long", "stac-json", "stale-aux")


def _round2_dst(case, env, src, args):
    """The destination of a round-2 case (made beside the inputs where it is one of them)."""
    if case.kind == "dst-read":
        if case.id == "dst-model-file":
            return Path(args[args.index("--model") + 1])
        if case.id == "dst-mask-sidecar":
            return Path(str(src) + ".msk")
        if case.id == "dst-overview-sidecar":
            link = env.out / "o.tif"
            os.link(env.work / "member.tif.ovr", link)
            return link
        return env.work / "member.tif"
    if case.kind == "dst-slash":
        return str(env.out / "new") + "/"
    if case.kind == "dst-folder":
        (env.out / "o.tif").mkdir()
    if case.kind in ("long-name", "too-long"):
        return env.out / ("x" * (246 if case.kind == "long-name" else 252) + ".tif")
    if case.kind == "stac-json":
        return env.out / "o.json"
    if case.kind == "stale-aux":
        (env.out / "o.tif.aux.xml").write_text("<PAMDataset/>")
    return env.out / "o.tif"


def _round2(case, env, monkeypatch):
    if case.kind == "race":
        return _race(case, env)
    src = case.make(env)
    args = _fill(case.args, env, case)
    dst = _round2_dst(case, env, src, args)
    before = {p: _digest(p) for p in (env.work, env.out)}
    code, stdout, stderr = run_cli(["magnify", src, dst, *args])
    assert code == case.code, (code, stderr)
    check_stderr(stderr, case)
    check_message(stdout, stderr, case)
    if case.code == 0:
        assert os.listdir(env.out) == [Path(dst).name]
        _check_success_output(src, dst, case)
    else:  # nothing written, nothing changed, in the inputs' folder and the destination's
        assert {p: _digest(p) for p in (env.work, env.out)} == before
    assert _temps(env.out) == [] and _temps(env.work) == []


def _race(case, env):
    """A slow run and a quick one to the same DST: the quick one wins, the slow one refuses."""
    src = _big_scene(env)
    before_src = _digest(src)
    dst = env.out / "o.tif"
    slow = Run(slow_args(src, dst, env))
    slow.wait_for_progress()  # past its destination check: DST did not exist then
    quick = ["magnify", src, dst, "--model", env.model, "--chunk", "256", "--quiet"]
    code, _, stderr = run_cli(quick)
    assert code == 0, stderr
    winner = sha256_of(dst)
    code, stdout, stderr = slow.finish()
    assert code == case.code, stderr
    check_stderr(stderr, case)
    assert sha256_of(dst) == winner and os.listdir(env.out) == ["o.tif"]  # the winner's file, intact
    code, _, stderr = run_cli([*quick[:2], env.out / "again.tif", *quick[3:]])
    with rasterio.open(dst) as a, rasterio.open(env.out / "again.tif") as b:
        assert a.read().tobytes() == b.read().tobytes()
    assert _digest(src) == before_src


# ------------------------------------------------------------ the README table
def readme_rows():
    """Rows of the README's troubleshooting table: {id: (what, code, message, advice)}."""
    text = README.read_text()
    section = text.split("## Troubleshooting", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in section.splitlines():
        m = re.match(r"\|\s*`([a-z0-9-]+)`\s*\|(.*)\|\s*$", line)
        if m:
            cells = [c.strip() for c in m.group(2).split("|")]
            rows[m.group(1)] = cells
    return rows


def readme_table():
    """The table as the README has it, made from CASES (print it to update the README)."""
    out = ["| Case | What happened | Exit code | What you see | What to do |", "|---|---|---|---|---|"]
    for c in CASES:
        shown = c.message if c.message.startswith("geosr:") else f"geosr: error: …{c.message}…"
        if c.id == "sigkill":
            shown = "nothing (killed); the next run prints geosr: wrote"
        out.append(f"| `{c.id}` | {c.what} | {c.code} | `{shown}` | {c.advice} |")
    return "\n".join(out)


def test_readme_table_matches():
    rows = readme_rows()
    assert list(rows) == [c.id for c in CASES]
    for c in CASES:
        what, code, shown, advice = rows[c.id]
        assert int(code) == c.code, c.id
        assert c.message in shown or c.id == "sigkill", (c.id, shown)
        assert what == c.what and advice == c.advice, c.id


def test_covering_tests_exist():
    # A case that points to a deeper test must point to one that exists.
    root = README.parent
    for c in CASES:
        if not c.covered_by:
            continue
        path, _, name = c.covered_by.partition("::")
        assert f"def {name}(" in (root / path).read_text(), c.id
