"""``geosr magnify SRC... --output-dir DIR`` from the command line, run for real."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner

from geosr.cli.main import geosr as cli

from helpers import TEST_DATA, camera, list_dir, sha256_of


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def error_lines(result):
    return [line for line in result.stderr.splitlines() if line.startswith("geosr: error: ")]


def summary(result):
    """The summary table of a run: the lines from the header to the counts."""
    lines = result.stderr.splitlines()
    start = next(i for i, line in enumerate(lines) if line.split() == ["file", "status", "size", "seconds"])
    return [line.split() for line in lines[start + 1 : -1]], lines[-1]


@pytest.fixture
def scenes(make_raster, tmp_path):
    """Three 24 x 24 crops of the camera photo and a copy of tests/data/corrupt.tif."""
    paths = [make_raster(camera(24, 24, 100 + 40 * k, 90).astype(np.uint8), name=f"scene{k}.tif")
             for k in range(3)]
    bad = tmp_path / "broken.tif"
    shutil.copyfile(TEST_DATA / "corrupt.tif", bad)
    return [*paths, bad]


def test_batch_run_reports_failures_and_summary(scenes, tmp_path):
    out = tmp_path / "out"
    result = run("magnify", *scenes, "--output-dir", out, "-s", 2)
    assert result.exit_code == 1, result.stderr
    errors = error_lines(result)
    assert len(errors) == 1 and errors[0].startswith(f"geosr: error: {scenes[3]}: ") and "must be readable" in errors[0]
    assert "Traceback" not in result.stderr and result.stdout == ""
    rows, counts = summary(result)
    assert [(r[0], r[1]) for r in rows] == [
        ("scene0.tif", "written"), ("scene1.tif", "written"), ("scene2.tif", "written"), ("broken.tif", "failed")]
    assert counts == "3 written, 0 skipped, 1 failed of 4 files"
    assert "magnify: 4/4 files (100%)" in result.stderr  # one bar over the files
    assert list_dir(out) == ["scene0-x2.tif", "scene1-x2.tif", "scene2-x2.tif"]
    with rasterio.open(out / "scene1-x2.tif") as ds:
        assert (ds.width, ds.height) == (48, 48)
        size = f"{(out / 'scene1-x2.tif').stat().st_size / 1024:.1f}"
    assert rows[1][2:4] == [size, "KiB"]

    again = run("magnify", *scenes[:3], "--output-dir", out, "-s", 2)
    assert again.exit_code == 0, again.stderr
    assert [r[1] for r in summary(again)[0]] == ["skipped"] * 3


def test_list_file_and_name_template(scenes, tmp_path):
    listing = tmp_path / "tiles.txt"
    listing.write_text(f"# the good tiles\n{scenes[0]}\n\n{scenes[2]}\n")
    out = tmp_path / "named"
    result = run("magnify", f"@{listing}", "-O", out, "-s", 2, "--name", "{stem}_{method}{scale}.tif")
    assert result.exit_code == 0, result.stderr
    with rasterio.open(out / list_dir(out)[0]) as ds:
        method = ds.tags()["GEOSR_METHOD"]
    assert list_dir(out) == [f"scene0_{method}2.tif", f"scene2_{method}2.tif"]


def test_a_template_collision_is_refused_before_any_work(scenes, tmp_path):
    out = tmp_path / "out"
    result = run("magnify", *scenes[:2], "--output-dir", out, "-s", 2, "--name", "same-{scale}.tif")
    assert result.exit_code == 2
    assert error_lines(result) == [
        f"geosr: error: The 'name' template must give every source its own output, got 'same-2.tif' "
        f"for both {str(scenes[0])!r} and {str(scenes[1])!r}"]
    assert not out.exists()


def test_unknown_template_field_is_a_usage_error(scenes, tmp_path):
    result = run("magnify", *scenes[:2], "--output-dir", tmp_path / "out", "-s", 2, "--name", "{stem}-{date}.tif")
    assert result.exit_code == 2
    assert error_lines(result) == [
        "geosr: error: The 'name' template must use only {stem}, {scale} and {method}, got {date} in "
        "'{stem}-{date}.tif'"]
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (("a.tif", "b.tif", "c.tif"), "SRC DST for one raster, or SRC... --output-dir DIR"),
        (("@list.txt", "b.tif"), "SRC DST for one raster"),
        (("a.tif", "b.tif", "--name", "{stem}.tif"), "--name only applies with --output-dir"),
        (("--output-dir", "out"), "--output-dir needs at least one source"),
    ],
)
def test_usage_errors(args, needle, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run("magnify", *args, "-s", 2)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0], result.stderr
    assert list_dir(tmp_path) == []


def test_a_different_output_needs_overwrite(scenes, tmp_path):
    out = tmp_path / "out"
    assert run("magnify", scenes[0], "-O", out, "-s", 2, "--ensemble").exit_code == 0
    before = sha256_of(out / "scene0-x2.tif")
    refused = run("magnify", scenes[0], "-O", out, "-s", 2)
    assert refused.exit_code == 1
    assert "must not exist, or be an up-to-date output of 'scene0.tif'" in error_lines(refused)[0]
    assert sha256_of(out / "scene0-x2.tif") == before
    replaced = run("magnify", scenes[0], "-O", out, "-s", 2, "--overwrite")
    assert replaced.exit_code == 0 and summary(replaced)[0][0][1] == "written"
    assert sha256_of(out / "scene0-x2.tif") != before


def test_quiet_prints_only_the_failures(scenes, tmp_path):
    result = run("magnify", scenes[0], scenes[3], "-O", tmp_path / "out", "-s", 2, "-q")
    assert result.exit_code == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"geosr: error: {scenes[3]}: ")


def test_the_one_file_form_is_unchanged(scenes, tmp_path):
    dst = tmp_path / "one.tif"
    result = run("magnify", scenes[0], dst, "-s", 2)
    assert result.exit_code == 0, result.stderr
    assert result.stderr.strip().splitlines()[-1].startswith(f"geosr: wrote {dst} (48 x 48, 1 band, x2")
