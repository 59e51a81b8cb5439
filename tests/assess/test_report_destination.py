"""Where an assessment report goes: never over files geosr did not write (issue 16)."""

from __future__ import annotations

import json
import os
import shutil
import stat

import numpy as np
import pytest
from click.testing import CliRunner

from geosr.assess import report
from geosr.assess.report import prepare_destination
from geosr.cli.main import geosr as cli
from geosr.errors import DestinationError

from helpers import camera, sha256_of


def _digests(folder):
    return {p.name: sha256_of(p) for p in sorted(folder.iterdir()) if p.is_file()}


def _assess(ref, out, *extra):
    result = CliRunner().invoke(cli, ["assess", str(ref), "-o", str(out), "--scale", "2", "--quiet", *extra])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result.exit_code, result.stderr


def _one_error_line(stderr):
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("geosr: error: ") and "Traceback" not in stderr, stderr
    return lines[0]


@pytest.fixture
def ref(make_raster):
    return make_raster(camera(64, 64).astype(np.uint8), name="ref.tif")


@pytest.fixture(scope="module")
def a_report(tmp_path_factory):
    """A real report folder written by geosr assess (copied by each test that changes it)."""
    import rasterio
    from affine import Affine

    from geosr.assess.protocol import assess_raster

    folder = tmp_path_factory.mktemp("made")
    ref_path = folder / "made.tif"
    with rasterio.open(ref_path, "w", driver="GTiff", width=64, height=64, count=1, dtype="uint8",
                       crs="EPSG:32618", transform=Affine(30, 0, 500000, 0, -30, 4200000)) as ds:
        ds.write(camera(64, 64).astype(np.uint8)[None])
    assess_raster(ref_path, folder / "report", 2)
    return folder / "report"


@pytest.mark.parametrize("where", ["folder-of-ref", "dot"])
def test_overwrite_never_removes_the_folder_that_holds_the_reference(ref, monkeypatch, where):
    folder = ref.parent
    (folder / "notes.txt").write_text("the user's notes")
    before = _digests(folder)
    if where == "dot":
        monkeypatch.chdir(folder)
        code, stderr = _assess("ref.tif", ".", "--overwrite")
    else:
        code, stderr = _assess(ref, folder, "--overwrite")
    assert code == 1
    assert "geosr report folder to replace" in _one_error_line(stderr)
    assert _digests(folder) == before


def test_a_geosr_report_is_replaced_and_nothing_is_left_beside_it(a_report, ref, tmp_path):
    out = tmp_path / "report"
    shutil.copytree(a_report, out)
    old = json.loads((out / "metrics.json").read_text())
    code, stderr = _assess(ref, out, "--overwrite")
    assert code == 0, stderr
    new = json.loads((out / "metrics.json").read_text())
    assert new["protocol"]["reference"] != old["protocol"]["reference"]  # another reference: a new report
    assert sorted(os.listdir(out)) == sorted({"metrics.json", "report.md", *new["figures"]})
    assert not [n for n in os.listdir(tmp_path) if n.startswith(".geosr-report")]


@pytest.mark.parametrize("change", ["extra-file", "sub-folder", "foreign-metrics", "bad-figure-name"])
def test_a_folder_that_is_not_recognisably_a_report_is_refused(a_report, ref, tmp_path, change):
    out = tmp_path / "report"
    shutil.copytree(a_report, out)
    if change == "extra-file":
        (out / "thesis.docx").write_text("months of work")
    elif change == "sub-folder":
        (out / "data").mkdir()
    else:
        metrics = json.loads((out / "metrics.json").read_text())
        if change == "foreign-metrics":
            metrics = {"loss": 0.1, "figures": metrics["figures"]}  # another tool's metrics.json
        else:
            metrics["figures"].append("../ref.tif")
        (out / "metrics.json").write_text(json.dumps(metrics))
    before = _digests(out)
    code, stderr = _assess(ref, out, "--overwrite")
    assert code == 1 and "never removes files it did not write" in _one_error_line(stderr)
    assert _digests(out) == before and sorted(os.listdir(tmp_path)) == ["ref.tif", "report"]


def test_a_reference_inside_the_report_folder_is_refused(a_report, tmp_path):
    out = tmp_path / "report"
    shutil.copytree(a_report, out)
    figure = out / "psnr_gain.png"  # a PNG that GDAL reads as a raster
    before = _digests(out)
    with pytest.raises(DestinationError, match="must not hold a file the run reads"):
        prepare_destination(out, True, [figure])
    assert _digests(out) == before


def test_symlink_to_a_report_folder_with_overwrite(a_report, ref, tmp_path):
    target = tmp_path / "reports" / "x2"
    target.parent.mkdir()
    shutil.copytree(a_report, target)
    link = tmp_path / "latest"
    link.symlink_to(target, target_is_directory=True)
    code, stderr = _assess(ref, link, "--overwrite")
    assert code == 0, stderr
    assert link.is_symlink() and os.readlink(link) == str(target)  # the link stays
    assert json.loads((target / "metrics.json").read_text())["protocol"]["reference"] == "ref.tif"
    leftovers = [n for d in (tmp_path, target.parent) for n in os.listdir(d) if n.startswith(".geosr-report")]
    assert leftovers == []


def test_report_folder_respects_the_umask(ref, tmp_path):
    old = os.umask(0o027)
    try:
        code, stderr = _assess(ref, tmp_path / "report")
    finally:
        os.umask(old)
    assert code == 0, stderr
    assert stat.S_IMODE(os.stat(tmp_path / "report").st_mode) == 0o750  # 0o777 & ~0o027


def test_publish_checks_the_old_report_again(a_report, tmp_path):
    out = tmp_path / "report"
    shutil.copytree(a_report, out)
    assert prepare_destination(out, True) == str(out)
    (out / "added-during-the-run.txt").write_text("keep me")  # appears while the run works
    before = _digests(out)
    new = tmp_path / ".geosr-report-new"
    shutil.copytree(a_report, new)
    with pytest.raises(DestinationError, match="never removes files it did not write"):
        report._publish(str(new), str(out), overwrite=True)
    assert _digests(out) == before
    assert sorted(os.listdir(tmp_path)) == [".geosr-report-new", "report"]


def test_publish_without_overwrite_refuses_a_folder_filled_meanwhile(a_report, tmp_path):
    out = tmp_path / "report"
    out.mkdir()
    assert prepare_destination(out, False) == str(out)
    shutil.copytree(a_report, out, dirs_exist_ok=True)  # another run's report lands first
    before = _digests(out)
    new = tmp_path / ".geosr-report-new"
    shutil.copytree(a_report, new)
    with pytest.raises(DestinationError, match="filled while this run was working"):
        report._publish(str(new), str(out), overwrite=False)
    assert _digests(out) == before
