"""TOML config files: keys named as the options, unknown keys and wrong types refused,
command-line options win, the shipped example configs are valid."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

import geosr.pipeline.magnify
from geosr.cli import options
from geosr.cli.config import Key, check_value, load_config, read_toml
from geosr.cli.main import geosr as cli
from geosr.errors import ParameterError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

CONFIGS = Path(__file__).resolve().parents[2] / "configs"

SCHEMA = {
    "chunk": Key("chunk", "int"),
    "workers": Key("workers", "int"),
    "method": Key("method", "choice", ("sparse", "anchored")),
    "self-train": Key("self_train", "bool"),
    "co": Key("creation_options", "key-value"),
    "bands": Key("bands", "bands"),
    "sigma": Key("sigma", "number"),
    "model": Key("model", "str"),
    "max-output": Key("max_output_bytes", "size"),
}


def write(tmp_path, text, name="c.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


# ------------------------------------------------------------- the loader
def test_values_are_read_and_normalised(tmp_path):
    path = write(tmp_path, """
chunk = 512
workers = 2
method = "Anchored"
self-train = true
bands = [1, 2, 4]
sigma = 1
co = { COMPRESS = "ZSTD", PREDICTOR = 2, TILED = true, SPARSE_OK = false }
""")
    values = load_config(path, SCHEMA)
    assert values == {
        "chunk": 512,
        "workers": 2,
        "method": "anchored",
        "self-train": True,
        "bands": [1, 2, 4],
        "sigma": 1,
        "co": ["COMPRESS=ZSTD", "PREDICTOR=2", "TILED=YES", "SPARSE_OK=NO"],
    }


def test_values_agree_with_the_toml_reference_parser(tmp_path):
    # tomllib (Python's standard library) is the reference for what the file says
    text = 'chunk = 0x200\nmodel = "m\\u00e9.npz"\nco = ["COMPRESS=LZW"]\n'
    path = write(tmp_path, text)
    ref = tomllib.loads(text)
    assert load_config(path, SCHEMA) == ref == {"chunk": 512, "model": "mé.npz", "co": ["COMPRESS=LZW"]}


def test_unknown_key_names_the_key_the_file_and_a_suggestion(tmp_path):
    path = write(tmp_path, "chunks = 512\n")
    with pytest.raises(ParameterError) as err:
        load_config(path, SCHEMA, command="magnify")
    message = str(err.value)
    assert "'chunks'" in message and str(path) in message and "did you mean 'chunk'" in message
    assert "'geosr magnify' takes: bands, chunk, co" in message


@pytest.mark.parametrize(
    "text, needles",
    [
        ('chunk = "big"', ["'chunk'", "an integer", "'big'", "a string"]),
        ("chunk = 512.0", ["'chunk'", "an integer", "a float"]),
        ("chunk = true", ["'chunk'", "an integer", "a boolean"]),
        ('self-train = "yes"', ["'self-train'", "a boolean", "'yes'"]),
        ("self-train = 1", ["'self-train'", "a boolean", "an integer"]),
        ('method = "magic"', ["'method'", "'sparse', 'anchored'", "'magic'"]),
        ("method = 3", ["'method'", "a string", "an integer"]),
        ("bands = [1, true]", ["'bands'", "band numbers"]),
        ("bands = []", ["'bands'"]),
        ("sigma = nan", ["'sigma'", "a number"]),
        ('sigma = "wide"', ["'sigma'", "a number", "a string"]),
        ("co = 5", ["'co'", "creation options", "an integer"]),
        ("co = { COMPRESS = [1] }", ["'COMPRESS'", "'co'", "an array"]),
        ("model = 1", ["'model'", "a string"]),
        ("max-output = 1.5", ["'max-output'", "a size", "a float"]),
    ],
)
def test_wrong_types_name_the_key(tmp_path, text, needles):
    path = write(tmp_path, text + "\n")
    with pytest.raises(ParameterError) as err:
        load_config(path, SCHEMA)
    for needle in needles:
        assert needle in str(err.value), (needle, str(err.value))
    assert err.value.exit_code == 2


def test_command_tables_override_the_top_level_and_other_tables_are_skipped(tmp_path):
    path = write(tmp_path, """
chunk = 512
[magnify]
chunk = 256
workers = 3
[train]
iterations = 5   # not a key of this schema, but only read by 'geosr train'
""")
    assert load_config(path, SCHEMA, command="magnify", sections=("magnify", "train")) == {
        "chunk": 256,
        "workers": 3,
    }
    with pytest.raises(ParameterError, match=r"unknown key 'iterations' in the table \[train\]"):
        load_config(path, SCHEMA, command="train", sections=("magnify", "train"))


def test_an_unknown_table_is_an_unknown_key(tmp_path):
    path = write(tmp_path, "[magnfy]\nchunk = 1\n")
    with pytest.raises(ParameterError, match="unknown key 'magnfy'"):
        load_config(path, SCHEMA, command="magnify", sections=("magnify",))


def test_unreadable_files(tmp_path):
    bad = write(tmp_path, "chunk = = 3\n")
    with pytest.raises(ParameterError, match="is not valid TOML"):
        read_toml(bad)
    with pytest.raises(ParameterError, match="does not exist"):
        read_toml(tmp_path / "missing.toml")
    with pytest.raises(ParameterError, match="directory"):
        read_toml(tmp_path)
    binary = tmp_path / "b.toml"
    binary.write_bytes(b"chunk = \xff\n")
    with pytest.raises(ParameterError):
        read_toml(binary)


def test_sizes_from_the_file_reach_the_library_in_bytes(tmp_path, calls):
    path = write(tmp_path, 'scale = 2\nmax-output = "2G"\n')
    assert magnify("--config", path).exit_code == 0
    assert calls[-1]["max_output_bytes"] == 2 * 2**30
    path = write(tmp_path, "scale = 2\nmax-output = 4096\n")
    assert magnify("--config", path).exit_code == 0
    assert calls[-1]["max_output_bytes"] == 4096


def test_check_value_key_value_forms():
    spec = Key("creation_options", "key-value")
    assert check_value("co", "COMPRESS=ZSTD", spec) == ["COMPRESS=ZSTD"]
    assert check_value("co", ["A=1", "B=2"], spec) == ["A=1", "B=2"]
    assert check_value("co", {"ZLEVEL": 9}, spec) == ["ZLEVEL=9"]


# --------------------------------------------------- through the command line
@pytest.fixture
def calls(recorder):
    """Record how the CLI calls magnify_raster (its wiring, not the library):
    the keywords, and the model as ``"model"``."""
    return recorder(geosr.pipeline.magnify, "magnify_raster",
                    keep=lambda args, kwargs: dict(kwargs, model=args[2]))


def magnify(*args):
    return CliRunner().invoke(cli, ["magnify", "in.tif", "out.tif", *map(str, args)])


def one_line(result):
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("geosr: error: "), result.stderr
    return lines[0]


def test_config_values_reach_the_library(tmp_path, calls):
    path = write(tmp_path, """
scale = 3
bands = "1-3"
[magnify]
chunk = 512
workers = 2
co = { COMPRESS = "ZSTD" }
consistency = true
""")
    result = magnify("--config", path)
    assert result.exit_code == 0, result.stderr
    kw = calls[-1]
    assert kw["scale"] == 3 and kw["chunk_size"] == 512 and kw["workers"] == 2
    assert kw["bands"] == [1, 2, 3] and kw["creation_options"] == {"COMPRESS": "ZSTD"}
    assert kw["consistency"] is True and kw["ensemble"] is False


def test_command_line_wins_over_the_file_and_the_file_over_defaults(tmp_path, calls):
    path = write(tmp_path, "scale = 3\nchunk = 512\n")
    assert magnify("--config", path).exit_code == 0
    assert calls[-1]["chunk_size"] == 512 and calls[-1]["scale"] == 3
    assert magnify("--chunk", "256", "--config", path).exit_code == 0
    assert calls[-1]["chunk_size"] == 256
    assert magnify("--config", path, "--chunk", "128", "-s", "2").exit_code == 0
    assert calls[-1]["chunk_size"] == 128 and calls[-1]["scale"] == 2
    assert magnify("-s", "2").exit_code == 0
    assert calls[-1]["chunk_size"] == 1024  # the option's own default without a file


def test_command_line_alternative_replaces_the_files_choice(tmp_path, calls):
    path = write(tmp_path, 'scale = 2\nworkers = 4\nself-train = true\n')
    model = write(tmp_path, "", "m.npz")
    result = magnify("--config", path, "--scheduler", "tcp://10.0.0.5:8786", "--model", model)
    assert result.exit_code == 0, result.stderr
    kw = calls[-1]
    assert kw["scheduler"] == "tcp://10.0.0.5:8786" and kw["workers"] is None
    assert kw["self_train"] is False and kw["model"] == str(model)


def test_both_alternatives_in_the_file_are_an_error(tmp_path, calls):
    path = write(tmp_path, 'scale = 2\nworkers = 4\nscheduler = "tcp://h:8786"\n')
    result = magnify("--config", path)
    assert result.exit_code == 2 and calls == []
    line = one_line(result)
    assert f"The config keys 'workers' and 'scheduler' in {path} are mutually exclusive" in line


@pytest.mark.parametrize(
    "text, needles",
    [
        ("scale = 9\n", ["'scale'", "c.toml", "integer from 2 to 8", "9"]),
        ("chunk = 8\nscale = 2\n", ["'chunk'", "at least 16"]),
        ('scale = 2\nco = ["COMPRESS"]\n', ["'co'", "KEY=VALUE"]),
        ('scale = 2\nscheduler = "http://x"\n', ["'scheduler'"]),
        ("chunks = 512\n", ["unknown key 'chunks'", "did you mean 'chunk'"]),
        ('chunk = "512"\n', ["'chunk'", "an integer", "a string"]),
        ("debug = true\n", ["unknown key 'debug'"]),
        ("config = 'other.toml'\n", ["unknown key 'config'"]),
        ("[magnify\n", ["not valid TOML"]),
    ],
)
def test_config_errors_are_one_line_exit_2(tmp_path, calls, text, needles):
    path = write(tmp_path, text)
    result = magnify("--config", path)
    assert result.exit_code == 2 and calls == []
    line = one_line(result)
    for needle in needles:
        assert needle in line, (needle, line)


def test_missing_config_file_is_a_usage_error(tmp_path):
    result = magnify("--config", tmp_path / "none.toml")
    assert result.exit_code == 2 and "does not exist" in one_line(result)


def test_schema_keys_are_the_long_option_names():
    from geosr.cli.magnify import magnify as command

    schema = options.config_schema(command)
    longs = {
        o[2:]
        for p in command.params
        for o in p.opts
        if o.startswith("--") and p.name not in ("config", "help")
    }
    assert set(schema) == longs
    assert schema["self-train"] == Key("self_train", "bool")
    assert schema["co"].param == "creation_options" and schema["co"].kind == "key-value"
    assert schema["chunk"].kind == "int" and schema["method"].choices == ("sparse", "anchored")


# ------------------------------------------------------- the example configs
def test_three_example_configs_are_shipped():
    names = sorted(p.name for p in CONFIGS.glob("*.toml"))
    assert names == ["archive-x3.toml", "drone-x4.toml", "satellite-x2.toml"]


@pytest.mark.parametrize("path", sorted(CONFIGS.glob("*.toml")), ids=lambda p: p.name)
def test_example_configs_are_valid_for_the_commands_they_address(path):
    from geosr.cli.assess import assess
    from geosr.cli.magnify import magnify as magnify_command
    from geosr.cli.train import train

    data = read_toml(path)
    commands = {"train": train, "magnify": magnify_command, "assess": assess}
    used = [name for name in commands if name in data] or ["magnify"]
    for name in used:
        values = load_config(path, options.config_schema(commands[name]), command=name,
                             sections=options.COMMANDS)
        assert values["scale"] in (2, 3, 4)
    scale = {"drone-x4.toml": 4, "satellite-x2.toml": 2, "archive-x3.toml": 3}[path.name]
    assert data["scale"] == scale


@pytest.mark.parametrize("path", sorted(CONFIGS.glob("*.toml")), ids=lambda p: p.name)
def test_example_configs_drive_magnify(path, calls, tmp_path):
    model = write(tmp_path, "", "model.npz")
    extra = [] if "self-train" in read_toml(path).get("magnify", {}) else ["--model", model]
    result = magnify("--config", path, *extra)
    assert result.exit_code == 0, result.stderr
    assert calls[-1]["scale"] == read_toml(path)["scale"]


def test_spectral_guard_key_and_flags(tmp_path, calls):
    assert magnify("--scale", 2).exit_code == 0
    assert calls[-1]["spectral_guard"] is True  # on by default
    path = write(tmp_path, "[magnify]\nspectral-guard = false\n")
    result = magnify("--config", path, "--scale", 2)
    assert result.exit_code == 0, result.stderr
    assert calls[-1]["spectral_guard"] is False
    result = magnify("--config", path, "--scale", 2, "--spectral-guard")
    assert result.exit_code == 0, result.stderr
    assert calls[-1]["spectral_guard"] is True  # the command line wins
    bad = write(tmp_path, "spectral-guard = \"maybe\"\n", name="bad.toml")
    result = magnify("--config", bad, "--scale", 2)
    assert result.exit_code != 0 and "spectral-guard" in one_line(result)
