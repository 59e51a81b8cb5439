"""The command line: exit codes, one-line messages, wiring to the library, the rio plugin."""

from __future__ import annotations

import inspect
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine
from click.testing import CliRunner

import geosr.pipeline.magnify
import geosr.pipeline.train
from geosr._version import __version__
from geosr.cli import options
from geosr.cli.main import geosr as cli
from geosr.cli.progress import ProgressBars
from geosr.errors import DestinationError, InputError, ParameterError, RunError

from helpers import camera

VENV_BIN = Path(sys.executable).parent


def run(*args, **kwargs):
    """Invoke the geosr group in-process; exceptions are caught like a real run."""
    return CliRunner().invoke(cli, [str(a) for a in args], **kwargs)


def assert_one_line_error(result, code, *needles):
    """Exit code, a single ``geosr: error:`` line on stderr, no traceback."""
    assert result.exit_code == code, (result.exit_code, result.stderr, result.exception)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("geosr: error: "), lines[0]
    assert "Traceback" not in result.output
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


@pytest.fixture
def model_file(tmp_path_factory, tiny_model):
    """The tiny x2 anchored model of conftest, saved to a file."""
    path = tmp_path_factory.mktemp("models") / "tiny-x2.npz"
    if not path.exists():
        tiny_model.save(path)
    return path


@pytest.fixture
def src(make_raster):
    return make_raster(camera(48, 56).astype(np.uint8), name="src.tif")


# ---------------------------------------------------------------- the group
def test_help_lists_the_commands_and_the_cli_imports_no_more_library():
    # the CLI imports library modules inside its commands only: importing it adds
    # nothing heavy to what importing the geosr package itself already loads
    code = (
        "import sys, geosr; before = set(sys.modules)\n"
        "import geosr.cli.main\n"
        "added = set(sys.modules) - before\n"
        "heavy = ('numpy', 'scipy', 'rasterio', 'numba', 'dask', 'matplotlib', 'sklearn', "
        "'geosr.pipeline.magnify', 'geosr.core.model', 'geosr.demo.scene')\n"
        "print(','.join(sorted(m for m in added if m.split('.')[0] in heavy or m in heavy)))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
    result = run("--help")
    assert result.exit_code == 0
    for name in ("train", "magnify", "assess", "describe", "demo"):
        assert name in result.output


def test_version():
    result = run("--version")
    assert result.exit_code == 0 and result.output.strip() == f"geosr {__version__}"


def test_no_arguments_show_help():
    result = run()
    assert "Usage:" in result.output and "magnify" in result.output


# ------------------------------------------------------ usage errors: exit 2
@pytest.mark.parametrize(
    "args, needles",
    [
        (["--scale", "9"], ["'--scale'", "integer from 2 to 8", "'9'"]),
        (["--scale", "1"], ["integer from 2 to 8", "'1'"]),
        (["--scale", "0"], ["integer from 2 to 8"]),
        (["--scale", "-3"], ["integer from 2 to 8"]),
        (["--scale", "2.5"], ["integer from 2 to 8", "'2.5'"]),
        (["--scale", "three"], ["integer from 2 to 8", "'three'"]),
        (["-s", "1000000"], ["integer from 2 to 8"]),
        (["-s", "2", "--co", "COMPRESS"], ["'--co'", "KEY=VALUE", "'COMPRESS'"]),
        (["-s", "2", "--co", "=ZSTD"], ["KEY=VALUE"]),
        (["-s", "2", "--co", "COMPRESS="], ["KEY=VALUE"]),
        (["-s", "2", "--workers", "2", "--scheduler", "tcp://10.0.0.5:8786"],
         ["--workers and --scheduler are mutually exclusive"]),
        (["-s", "2", "--workers", "0"], ["'--workers'", "at least 1", "'0'"]),
        (["-s", "2", "--scheduler", "http://host:1"], ["'--scheduler'", "tcp://", "'http://host:1'"]),
        (["-s", "2", "--scheduler", "tcp://host:99999"], ["'--scheduler'"]),
        (["-s", "2", "--bands", "0,1"], ["'--bands'", "starting at 1", "'0,1'"]),
        (["-s", "2", "--bands", "1,1"], ["'--bands'", "distinct"]),
        (["-s", "2", "--bands", "3-1"], ["'--bands'"]),
        (["-s", "2", "--bands", "red"], ["'--bands'"]),
        (["-s", "2", "--chunk", "8"], ["'--chunk'", "at least 16", "'8'"]),
        (["-s", "2", "--chunk", "big"], ["'--chunk'"]),
        (["-s", "2", "--method", "magic"], ["'--method'", "'magic'", "sparse", "anchored"]),
        (["-s", "2", "--max-output", "lots"], ["'--max-output'", "500M"]),
        (["-s", "2", "--atoms", "64"], ["--atoms", "--self-train"]),
        ([], ["Missing option '--scale'"]),
        (["-s", "2", "--frobnicate"], ["No such option", "--frobnicate"]),
    ],
)
def test_magnify_usage_errors(tmp_path, args, needles):
    result = run("magnify", tmp_path / "in.tif", tmp_path / "out.tif", *args)
    line = assert_one_line_error(result, 2, *needles)
    assert "geosr magnify --help" in line
    assert not (tmp_path / "out.tif").exists()


def test_model_and_self_train_are_mutually_exclusive(tmp_path, model_file):
    result = run("magnify", tmp_path / "in.tif", tmp_path / "out.tif", "--model", model_file,
                 "--self-train")
    assert_one_line_error(result, 2, "--model and --self-train are mutually exclusive")


def test_missing_model_file_is_a_usage_error(tmp_path):
    result = run("magnify", tmp_path / "in.tif", tmp_path / "out.tif", "--model", tmp_path / "no.npz")
    assert_one_line_error(result, 2, "'--model'", "no.npz", "does not exist")


@pytest.mark.parametrize(
    "args, needles",
    [
        (["frobnicate"], ["No such command 'frobnicate'"]),
        (["--frobnicate"], ["No such option", "--frobnicate"]),
        (["train", "-o", "m.npz", "-s", "2"], ["Missing argument 'HR_RASTER...'"]),
        (["train", "ref.tif", "-s", "2"], ["Missing option '--output'"]),
        (["train", "ref.tif", "-o", "m.npz"], ["Missing option '--scale'"]),
        (["train", "ref.tif", "-o", "m.npz", "-s", "2", "--sigma", "1.0", "--degradation", "area"],
         ["--sigma", "gaussian"]),
        (["train", "ref.tif", "-o", "m.npz", "-s", "2", "--atoms", "1"], ["'--atoms'", "at least 2"]),
        (["describe"], ["MODEL or --scale", "neither"]),
        (["assess", "ref.tif", "-s", "2"], ["Missing option '--output'"]),
        (["demo", "out", "--seed", "-1"], ["'--seed'", "at least 0"]),
    ],
)
def test_other_usage_errors(tmp_path, args, needles):
    os.chdir(tmp_path)
    assert_one_line_error(run(*args), 2, *needles)


def test_cli_limits_are_the_library_checks(tmp_path):
    # the CLI refuses at parse time (exit 2) exactly what the library refuses
    from geosr.core.resample import check_scale
    from geosr.parallel.schedule import resolve_scheduler
    from geosr.raster.windows import check_chunk_size

    scale = options.ScaleType()
    for value in (options.SCALE_MIN, options.SCALE_MAX):
        assert scale.convert(str(value), None, None) == check_scale(value) == value
    for value in (options.SCALE_MIN - 1, options.SCALE_MAX + 1):
        with pytest.raises(ParameterError):
            check_scale(value)
        assert_one_line_error(run("magnify", "a.tif", "b.tif", "-s", value), 2, "'--scale'")
    assert check_chunk_size(options.MIN_CHUNK) == options.MIN_CHUNK
    with pytest.raises(ParameterError):
        check_chunk_size(options.MIN_CHUNK - 1)
    result = run("magnify", "a.tif", "b.tif", "-s", "2", "--chunk", options.MIN_CHUNK - 1)
    assert_one_line_error(result, 2, "'--chunk'", f"at least {options.MIN_CHUNK}")
    for name in options.LOCAL_SCHEDULERS:  # every local name the CLI lets through is the library's
        assert resolve_scheduler(name).kind == name


def test_byte_sizes():
    t = options.ByteSize()
    # binary multiples, as GDAL's cache sizes and common practice use them
    assert t.convert("1G", None, None) == 2**30
    assert t.convert("500M", None, None) == 500 * 2**20
    assert t.convert("1.5T", None, None) == int(1.5 * 2**40)
    assert t.convert("300GiB", None, None) == 300 * 2**30
    assert t.convert(4096, None, None) == 4096


# ------------------------------------------- library errors keep their codes
@pytest.mark.parametrize(
    "exc, code",
    [
        (ParameterError("The 'x' parameter must be 1, got 2"), 2),
        (InputError("The source raster 'a' must be readable, got garbage"), 1),
        (DestinationError("The destination 'b' must not exist yet, got a file"), 1),
        (RunError("A block failed for good:\nafter 3 attempts"), 1),
    ],
)
def test_geosr_errors_become_one_line_with_their_exit_code(monkeypatch, tmp_path, exc, code):
    def fail(*args, **kwargs):
        raise exc

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", fail)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    line = assert_one_line_error(result, code)
    assert line == "geosr: error: " + " ".join(str(exc).split())


def test_unexpected_error_is_one_line_and_debug_shows_it(monkeypatch, tmp_path):
    def fail(*args, **kwargs):
        return 1 / 0

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", fail)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert_one_line_error(result, 1, "ZeroDivisionError", "--debug")
    result = run("--debug", "magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert result.exit_code == 1 and isinstance(result.exception, ZeroDivisionError)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2",
                 env={"GEOSR_DEBUG": "1"})
    assert isinstance(result.exception, ZeroDivisionError)


def test_debug_reraises_geosr_errors_too(monkeypatch, tmp_path):
    def fail(*args, **kwargs):
        raise InputError("The source raster must be readable, got garbage")

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", fail)
    result = run("--debug", "magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert isinstance(result.exception, InputError)


def test_keyboard_interrupt_exits_130(monkeypatch, tmp_path):
    def interrupt(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", interrupt)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert_one_line_error(result, 130, "interrupted")


def test_sigterm_exits_143(monkeypatch, tmp_path):
    from geosr.cli.main import Terminated

    def terminate(*args, **kwargs):
        raise Terminated("terminated by SIGTERM")

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", terminate)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert_one_line_error(result, 143, "terminated")


def test_library_warnings_are_one_line(recorder, monkeypatch, tmp_path):
    import warnings

    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    record = geosr.pipeline.magnify.magnify_raster

    def warn(*args, **kwargs):
        warnings.warn("The source has no CRS;\n the output will have none", UserWarning, stacklevel=2)
        return record(*args, **kwargs)

    monkeypatch.setattr(geosr.pipeline.magnify, "magnify_raster", warn)
    result = run("magnify", tmp_path / "a.tif", tmp_path / "b.tif", "-s", "2")
    assert result.exit_code == 0, result.stderr
    assert len(calls) == 1
    assert "geosr: warning: The source has no CRS; the output will have none" in result.stderr


def test_assess_writes_the_report(make_raster, tmp_path, model_file):
    pytest.importorskip("geosr.assess.protocol")
    ref = make_raster(camera(64, 64).astype(np.uint8), name="ref.tif")
    result = run("assess", ref, "-s", "2", "-o", tmp_path / "report", "--model", model_file)
    assert result.exit_code == 0, result.stderr
    metrics = json.loads((tmp_path / "report" / "metrics.json").read_text())
    last = result.stderr.strip().splitlines()[-1]
    assert last == (
        f"geosr: PSNR {metrics['geosr']['overall']['psnr']:.2f} dB with geosr, "
        f"{metrics['bicubic']['overall']['psnr']:.2f} dB with bicubic; report: "
        f"{tmp_path / 'report' / 'report.md'}"
    )
    again = run("assess", ref, "-s", "2", "-o", tmp_path / "report", "--model", model_file)
    assert_one_line_error(again, 1)  # an existing report needs --overwrite


def test_assess_wiring(recorder):
    assess_module = pytest.importorskip("geosr.assess.protocol")
    calls = recorder(assess_module, "assess_raster")
    result = run("assess", "ref.tif", "-s", "3", "-o", "rep", "--self-train", "--atoms", "64",
                 "--degradation", "gaussian", "--sigma", "1.2", "--bands", "1-2", "--crop", "64",
                 "--consistency", "--no-spectral-guard", "-q")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == ("ref.tif", "rep", 3)
    assert kw == {
        "model": None, "self_train": True, "method": None, "sigma": 1.2, "bands": [1, 2],
        "consistency": True, "ensemble": False, "spectral_guard": False, "overwrite": False,
        "training": {"n_atoms": 64}, "degradation": "gaussian", "crop_size": 64,
    }
    assert result.stderr == ""  # -q
    result = run("assess", "ref.tif", "-s", "3", "-o", "rep", "--sigma", "1.2")
    assert_one_line_error(result, 2, "--sigma", "gaussian")


# ------------------------------------------------------------- wiring
def test_magnify_passes_every_option(recorder, tmp_path, model_file):
    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    result = run(
        "magnify", "in.tif", "out.tif", "--model", model_file, "--method", "ANCHORED",
        "--bands", "1,3-4", "--chunk", "300", "--workers", "3", "--co", "compress=zstd",
        "--co", "PREDICTOR=2", "--cog", "--overwrite", "--consistency", "--ensemble", "--stac",
        "--max-output", "2G", "--quiet",
    )
    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""  # --quiet
    (args, kw), = calls
    assert args == ("in.tif", "out.tif", str(model_file))
    assert kw["method"] == "anchored" and kw["bands"] == [1, 3, 4] and kw["chunk_size"] == 300
    assert kw["workers"] == 3 and kw["scheduler"] is None
    assert kw["creation_options"] == {"COMPRESS": "zstd", "PREDICTOR": "2"}
    assert kw["cog"] and kw["overwrite"] and kw["consistency"] and kw["ensemble"] and kw["stac"]
    assert kw["max_output_bytes"] == 2 * 2**30 and not kw["self_train"]
    assert kw["progress"] is None  # --quiet: no progress bar


def _library_defaults(func):
    return {name: p.default for name, p in inspect.signature(func).parameters.items()
            if p.default is not inspect.Parameter.empty}


def test_magnify_defaults_are_the_library_defaults(recorder):
    defaults = _library_defaults(geosr.pipeline.magnify.magnify_raster)
    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    result = run("magnify", "in.tif", "out.tif", "-s", "3")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == ("in.tif", "out.tif", None) and kw["scale"] == 3
    bar = kw.pop("progress")  # the CLI's progress bar, drawn from the library's callback
    assert isinstance(bar, ProgressBars) and bar.label == "magnify"
    assert kw["chunk_size"] == 1024 and kw["creation_options"] is None and kw["bands"] is None
    # every option left out gives the library's own default (the --max-output
    # help's 256G among them)
    assert kw == {**{k: defaults[k] for k in kw}, "scale": 3}
    assert result.stderr.strip().splitlines() == [
        "geosr: wrote out.tif (4 x 4, 1 band, x2, anchored, 0.0 s)"
    ]


def test_train_defaults_are_the_library_defaults(recorder, tmp_path):
    defaults = _library_defaults(geosr.pipeline.train.train_from_rasters)
    calls = recorder(geosr.pipeline.train, "train_from_rasters")
    os.chdir(tmp_path)
    result = run("train", "a.tif", "-o", "m.npz", "-s", "2")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == (["a.tif"], 2)
    bar = kw.pop("progress")
    assert isinstance(bar, ProgressBars) and bar.label == "train: collect"
    assert kw == {**{k: defaults[k] for k in kw}, "output": "m.npz"}  # the --samples help's 100000
    assert result.stderr.strip().splitlines()[-1] == "geosr: wrote m.npz (1 model, one per band, x2)"


def test_assess_defaults_are_the_library_defaults(recorder):
    assess_module = pytest.importorskip("geosr.assess.protocol")
    defaults = _library_defaults(assess_module.assess_raster)
    calls = recorder(assess_module, "assess_raster")
    result = run("assess", "r.tif", "-o", "rep", "-s", "2")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == ("r.tif", "rep", 2)
    assert kw.pop("degradation") is None  # assess_raster reads None as its default, "bicubic"
    assert kw == {k: defaults[k] for k in kw}  # the --crop help's 96 among them
    assert result.stderr.strip().splitlines()[-1] == (
        f"geosr: PSNR 30.00 dB with geosr, 30.00 dB with bicubic; report: {os.path.join('rep', 'report.md')}"
    )


def test_self_train_options_go_to_training(recorder):
    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    result = run("magnify", "in.tif", "out.tif", "-s", "2", "--self-train", "--atoms", "64",
                 "--samples", "5000", "--degradation", "gaussian")
    assert result.exit_code == 0, result.stderr
    (_, kw), = calls
    assert kw["self_train"] is True
    bar = kw["training"].pop("progress")  # the self-training stage has its own bar
    assert isinstance(bar, ProgressBars) and bar.label == "train: collect"
    assert kw["training"] == {"n_atoms": 64, "max_samples": 5000, "degradation": "gaussian"}


def test_local_scheduler_names_combine_with_workers(recorder):
    calls = recorder(geosr.pipeline.magnify, "magnify_raster")
    result = run("magnify", "in.tif", "out.tif", "-s", "2", "--scheduler", "processes",
                 "--workers", "2")
    assert result.exit_code == 0, result.stderr
    assert calls[0][1]["scheduler"] == "processes" and calls[0][1]["workers"] == 2


def test_train_passes_model_parameters(recorder, tmp_path):
    calls = recorder(geosr.pipeline.train, "train_from_rasters")
    os.chdir(tmp_path)
    result = run("train", "a.tif", "b.tif", "-o", "m.npz", "-s", "4", "--shared", "--method",
                 "sparse", "--degradation", "gaussian", "--sigma", "1.5", "--atoms", "128",
                 "--sparsity", "2", "--iterations", "5", "--neighbours", "256", "--samples", "20000",
                 "--high-fit", "image", "--seed", "7", "--bands", "2", "--chunk", "512", "-q")
    assert result.exit_code == 0, result.stderr
    (args, kw), = calls
    assert args == (["a.tif", "b.tif"], 4)
    assert kw == {
        "bands": [2], "shared": True, "random_state": 7, "chunk_size": 512, "workers": None,
        "scheduler": None, "progress": None, "output": "m.npz", "method": "sparse",
        "degradation": "gaussian", "sigma": 1.5, "n_atoms": 128, "sparsity": 2, "n_iter": 5,
        "neighbours": 256, "max_samples": 20000, "high_fit": "image", "overwrite": False,
    }


def test_train_refuses_an_existing_model_without_overwrite(recorder, tmp_path):
    calls = recorder(geosr.pipeline.train, "train_from_rasters")
    (tmp_path / "m.npz").write_bytes(b"old")
    os.chdir(tmp_path)
    assert_one_line_error(run("train", "a.tif", "-o", "m.npz", "-s", "2"), 1, "m.npz", "--overwrite")
    assert calls == [] and (tmp_path / "m.npz").read_bytes() == b"old"


# ------------------------------------------------------ real runs (happy paths)
def test_train_magnify_describe_end_to_end(make_raster, tmp_path):
    ref = make_raster(camera(96, 96).astype(np.uint8), name="ref.tif", descriptions=["pan"])
    model = tmp_path / "m.npz"
    result = run("train", ref, "-o", model, "-s", "2", "--method", "anchored", "--atoms", "16",
                 "--iterations", "1", "--neighbours", "64", "--samples", "1500", "--chunk", "64")
    assert result.exit_code == 0, result.stderr
    assert f"wrote {model}" in result.stderr and "1 model, one per band" in result.stderr
    from geosr.modelfile import load_models

    (m,) = load_models(model)
    assert m.scale == 2 and m.method == "anchored" and m.n_atoms == 16

    src = make_raster(camera(40, 52, 300, 300).astype(np.uint8), name="low.tif")
    out = tmp_path / "out.tif"
    result = run("magnify", src, out, "--model", model)
    assert result.exit_code == 0, result.stderr
    assert f"wrote {out} (104 x 80, 1 band, x2, anchored" in result.stderr
    with rasterio.open(src) as s, rasterio.open(out) as o:
        assert (o.width, o.height) == (2 * s.width, 2 * s.height)
        # the affine package's own composition is the reference for the transform
        assert o.transform.almost_equals(s.transform @ Affine.scale(0.5))
        assert o.tags()["GEOSR_SYNTHESIZED"] == "yes"
        assert o.tags()["GEOSR_MODEL_SHA256"] == m.sha256_

    again = run("magnify", src, out, "--model", model)
    assert_one_line_error(again, 1, "--overwrite")
    assert run("magnify", src, out, "--model", model, "--overwrite", "-q").stderr == ""

    card = run("describe", model)
    assert card.exit_code == 0, card.stderr
    text = card.stdout
    assert m.sha256_ in text and "x2" in text and "anchored" in text and "n_atoms=16" in text
    assert f"geosr {__version__}" in text and "not a measurement" in text.replace("\n  ", " ")
    assert "training samples" in text and str(m.training_["n_samples"]) in text
    data = json.loads(run("describe", model, "--json").stdout)
    assert data["scale"] == 2 and data["models"][0]["sha256"] == m.sha256_
    assert data["models"][0]["parameters"]["n_atoms"] == 16
    assert data["written_by"] == __version__ and "statistical model" in data["caution"]


def test_describe_rejects_a_file_that_is_not_a_model(tmp_path):
    bogus = tmp_path / "bogus.npz"
    bogus.write_text("not a model")
    assert_one_line_error(run("describe", bogus), 1, "bogus.npz", "geosr .npz model")


def test_magnify_missing_source_exits_1(tmp_path, model_file):
    result = run("magnify", tmp_path / "missing.tif", tmp_path / "out.tif", "--model", model_file)
    assert_one_line_error(result, 1, "missing.tif")


def test_describe_shipped_model_or_clear_error():
    from geosr.modelfile import default_model_path

    result = run("describe", "--scale", "3")
    if default_model_path(3).is_file():
        assert result.exit_code == 0 and "x3" in result.stdout
    else:
        assert_one_line_error(result, 1, "shipped model", "3")


# ------------------------------------------------- real processes, rio plugin
def _console(name):
    path = VENV_BIN / name
    if not path.exists():
        pytest.skip(f"{name} is not installed beside {sys.executable}")
    return str(path)


@pytest.mark.slow  # three process starts (importing geosr loads sklearn, numba, dask)
def test_console_script_happy_path_and_errors(tmp_path, src, model_file):
    out = tmp_path / "out.tif"
    proc = subprocess.run([_console("geosr"), "magnify", str(src), str(out), "--model",
                           str(model_file), "--quiet"], capture_output=True, text=True)
    assert proc.returncode == 0 and proc.stderr == "" and proc.stdout == "", proc.stderr
    with rasterio.open(src) as s, rasterio.open(out) as o:
        assert (o.width, o.height) == (2 * s.width, 2 * s.height) and o.crs == s.crs
    proc = subprocess.run([_console("geosr"), "magnify", str(tmp_path / "a.tif"),
                           str(tmp_path / "b.tif"), "--scale", "11"],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("geosr: error: ")
    proc = subprocess.run([_console("geosr"), "magnify", str(tmp_path / "a.tif"),
                           str(tmp_path / "b.tif"), "--scale", "2"],
                          capture_output=True, text=True)
    assert proc.returncode == 1 and proc.stderr.startswith("geosr: error: ")
    assert "Traceback" not in proc.stderr and "a.tif" in proc.stderr


@pytest.mark.slow  # three process starts of rio with the plugin loaded
def test_rio_plugin_is_listed_and_works(tmp_path):
    rio = _console("rio")
    listed = subprocess.run([rio, "--help"], capture_output=True, text=True)
    assert listed.returncode == 0 and "geosr" in listed.stdout
    helped = subprocess.run([rio, "geosr", "--help"], capture_output=True, text=True)
    assert helped.returncode == 0 and "magnify" in helped.stdout and "rio" in helped.stdout
    bad = subprocess.run([rio, "geosr", "magnify", str(tmp_path / "a.tif"), str(tmp_path / "b.tif"),
                          "--scale", "1"], capture_output=True, text=True)
    assert bad.returncode == 2
    assert bad.stderr.strip().splitlines() == [
        "geosr: error: Invalid value for '--scale' / '-s': must be an integer from 2 to 8, "
        "got '1'. Try 'rio geosr magnify --help'."
    ]


def test_rio_plugin_entry_point_is_the_group():
    from importlib.metadata import entry_points

    from geosr.cli.main import rio_geosr

    (ep,) = [e for e in entry_points(group="rasterio.rio_plugins") if e.name == "geosr"]
    assert ep.load() is rio_geosr
    assert sorted(rio_geosr.commands) == sorted(cli.commands)
