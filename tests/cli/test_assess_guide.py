"""``geosr assess --guide``: exit codes, one-line messages, wiring, the report folder."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from affine import Affine
from click.testing import CliRunner

import geosr.assess.protocol
from geosr.cli.main import geosr as cli

from helpers import camera

T30 = Affine(30.0, 0.0, 500000.0, 0.0, -30.0, 4200000.0)


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def assert_one_line_error(result, code, needle):
    """Exit code and a single ``geosr: error:`` line on stderr, no traceback."""
    assert result.exit_code == code, (result.exit_code, result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("geosr: error: "), result.stderr
    assert needle in lines[0], (needle, lines[0])
    assert "Traceback" not in result.output


@pytest.fixture
def pair(make_raster):
    """A 64 x 64 uint8 reference at 30 m (scikit-image camera, two bands) and a 128 x 128
    guide at 15 m, the finer camera photo it was degraded from."""
    from geosr.core.resample import degrade

    fine = camera(128, 128).astype(np.float64)
    coarse = degrade(fine, 2)
    ref = make_raster(np.clip(np.rint(np.stack([coarse, 0.8 * coarse + 20])), 0, 255).astype(np.uint8),
                      name="ref.tif", transform=T30)
    guide = make_raster(fine.astype(np.float32), name="guide.tif", transform=T30 @ Affine.scale(0.5))
    return ref, guide


def test_assess_guide_writes_the_report(pair, tmp_path):
    ref, guide = pair
    result = run("assess", ref, "--guide", guide, "-o", tmp_path / "rep")
    assert result.exit_code == 0, (result.stderr, result.exception)
    last = result.stderr.strip().splitlines()[-1]
    assert last.startswith("geosr: PSNR ") and " dB guided, " in last and " dB bicubic; report: " in last
    metrics = json.loads((tmp_path / "rep" / "metrics.json").read_text())
    assert metrics["protocol"]["scale"] == 2 and metrics["guide"]["scale_ratio"] == 2
    assert metrics["guide"]["files"] == ["guide.tif"] and len(metrics["guide"]["correlation"]) == 2
    md = (tmp_path / "rep" / "report.md").read_text()
    assert "| guided (geosr) |" in md and "| method | QNR | D_lambda | D_s |" in md
    # the guide is the finer photo itself: guided detail beats bicubic interpolation
    assert metrics["guided"]["overall"]["psnr"] > metrics["bicubic"]["overall"]["psnr"] + 3


@pytest.mark.parametrize("extra, needle", [
    (["--consistency"], "--consistency does not apply with --guide"),
    (["--ensemble"], "--ensemble does not apply with --guide"),
    (["--self-train"], "--self-train does not apply with --guide"),
])
def test_options_that_do_not_apply_with_a_guide(pair, tmp_path, extra, needle):
    ref, guide = pair
    result = run("assess", ref, "--guide", guide, "-o", tmp_path / "rep", *extra)
    assert result.exit_code == 2, result.stderr
    assert needle in result.stderr and "Traceback" not in result.output


def test_guide_bands_without_guide_and_scale_without_guide(tmp_path):
    result = run("assess", "ref.tif", "-s", "2", "-o", tmp_path / "rep", "--guide-bands", "1")
    assert result.exit_code == 2 and "--guide-bands only applies with --guide" in result.stderr
    # without a guide --scale stays required, with click's own message
    result = run("assess", "ref.tif", "-o", tmp_path / "rep")
    assert result.exit_code == 2 and result.stderr.startswith("geosr: error: Missing option '--scale' / '-s'.")


def test_a_scale_other_than_the_ratio_is_a_one_line_usage_error(pair, tmp_path):
    ref, guide = pair
    result = run("assess", ref, "--guide", guide, "-s", "3", "-o", tmp_path / "rep")
    assert_one_line_error(result, 2, "must equal the guide's ratio 2")
    assert not (tmp_path / "rep").exists()


def test_bad_guides_are_one_line_input_errors(pair, make_raster, tmp_path):
    ref, _ = pair
    away = make_raster(np.ones((128, 128), np.float32), name="away.tif",
                       transform=T30 @ Affine.translation(500, 0) @ Affine.scale(0.5))
    result = run("assess", ref, "--guide", away, "-o", tmp_path / "rep")
    assert_one_line_error(result, 1, "must overlap the reference")
    odd = make_raster(np.ones((96, 96), np.float32), name="odd.tif", transform=T30 @ Affine.scale(1 / 1.5))
    result = run("assess", ref, "--guide", odd, "-o", tmp_path / "rep")
    assert_one_line_error(result, 1, "a whole number of times")
    result = run("assess", ref, "--guide", tmp_path / "nope.tif", "-o", tmp_path / "rep")
    assert_one_line_error(result, 1, "existing rasters")


def test_assess_guide_wiring(monkeypatch):
    """Which keyword gets which value; the real library runs in the tests above."""
    import inspect

    signature = inspect.signature(geosr.assess.protocol.assess_raster)
    calls = []

    def record(*args, **kwargs):
        signature.bind(*args, **kwargs)  # TypeError when a keyword does not match
        calls.append((args, kwargs))
        entry = {"overall": {"psnr": 30.0}}
        return {**{m: entry for m in ("guided", "highpass", "substitution", "geosr", "bicubic")},
                "protocol": {"band_names": ["1", "2"]}, "guide": {"correlation": [0.9, 0.5]}}

    monkeypatch.setattr(geosr.assess.protocol, "assess_raster", record)
    result = run("assess", "r.tif", "-o", "rep", "--guide", "a.tif", "--guide", "b.tif",
                 "--guide-bands", "1,3")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == ("r.tif", "rep", None)
    assert kw["guide"] == ["a.tif", "b.tif"] and kw["guide_bands"] == [1, 3]
    lines = result.stderr.strip().splitlines()
    assert lines[-1] == ("geosr: PSNR 30.00 dB guided, 30.00 dB highpass, 30.00 dB substitution, "
                         f"30.00 dB geosr, 30.00 dB bicubic; report: {os.path.join('rep', 'report.md')}")
    calls.clear()
    assert run("assess", "r.tif", "-o", "rep", "-s", "2").exit_code == 0
    (args, kw), = calls
    assert args == ("r.tif", "rep", 2)
    assert "guide" not in kw and "guide_bands" not in kw  # the single-image call is unchanged
